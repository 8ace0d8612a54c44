"""Writing results safely: atomic outputs, HDF5 with provenance attributes, CSV.

Every writer in :mod:`calcium.io` goes through :func:`atomic_output`: the data
are written to a temporary file in the destination folder and moved into place
with :func:`os.replace`, so a crash never leaves a half-written result behind
and a reader never sees one. An output path that is one of the inputs (by
path, through a symbolic link, or as a hard link) is refused before anything
is written (:func:`protect_inputs`), so a result can never overwrite the data
it was computed from.
"""
from __future__ import annotations

import contextlib
import csv
import errno
import hashlib
import json
import numbers
import os
import re
import shutil
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .._checks import CalciumInputError, OutputOverInputError, json_value

__all__ = [
    "file_sha256",
    "atomic_output",
    "protect_inputs",
    "OutputWriteError",
    "size_text",
    "write_hdf5",
    "read_hdf5",
    "write_csv",
    "format_number",
]

# Name of the file attribute listing the attributes stored as JSON text
# (dicts, lists, None), so that read_hdf5 can decode exactly those.
_JSON_ATTRS = "json_attrs"
_PROVENANCE = ("calcium_version", "created", "input_sha256")


def _package_version() -> str:
    # Imported late: calcium/__init__.py may import this module.
    from .. import __version__

    return __version__


def _existing_file(path, what: str = "file", *, suffixes=None, allow_empty: bool = True) -> Path:
    """Return ``path`` as a Path, raising CalciumInputError if it is not a readable file.

    With ``suffixes``, the (case-insensitive) suffix must be one of them; with
    ``allow_empty=False`` a 0-byte file is refused. Messages name the file.
    """
    path = Path(path)
    if not path.exists():
        raise CalciumInputError(f"{what} not found: {path}")
    if not path.is_file():
        raise CalciumInputError(f"{what} is not a regular file: {path}")
    if suffixes is not None and path.suffix.lower() not in suffixes:
        raise CalciumInputError(f"{path}: unsupported {what} type {path.suffix.lower()!r}; "
                                f"use one of {', '.join(suffixes)}")
    if not allow_empty and path.stat().st_size == 0:
        raise CalciumInputError(f"{path} is empty (0 bytes)")
    return path


def _output_suffix(path, suffixes) -> str:
    """Lower-case suffix of an output path, which must be one of ``suffixes`` (ValueError otherwise)."""
    suffix = Path(path).suffix.lower()
    if suffix not in suffixes:
        raise ValueError(f"path must end in one of {', '.join(suffixes)}; got {path}")
    return suffix


def _load_npy(path: Path, *, mmap_mode=None) -> np.ndarray:
    """np.load without pickle; any failure becomes CalciumInputError naming the file."""
    try:
        return np.load(path, mmap_mode=mmap_mode, allow_pickle=False)
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise CalciumInputError(f"{path} holds an object (pickled) array, which is never loaded; "
                                    f"save a numeric array instead") from None
        raise CalciumInputError(f"{path} is not a valid .npy file: {exc}") from None
    except (OSError, EOFError) as exc:
        raise CalciumInputError(f"{path} is not a valid .npy file: {exc}") from None


def _save_npy(path, array: np.ndarray, *, inputs=()) -> Path:
    """np.save (no pickle) through :func:`atomic_output`, refused at once when the disk has no room for it."""
    _refuse_inputs(path, inputs)
    _check_room(path, array.nbytes + 4096)
    with atomic_output(path, inputs=inputs) as tmp:
        with open(tmp, "wb") as handle:
            np.save(handle, array, allow_pickle=False)
    return Path(path)


def file_sha256(path) -> str:
    """SHA-256 digest of a file's bytes, as 64 lowercase hex digits.

    Parameters
    ----------
    path : str or path-like
        The file to hash; read in 1 MiB blocks, so any size works.

    Returns
    -------
    str
        The hex digest.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     name = os.path.join(folder, "empty.bin")
    ...     open(name, "wb").close()
    ...     file_sha256(name)[:16]
    'e3b0c44298fc1c14'
    """
    path = _existing_file(path)
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _identity(path: Path):
    """(device, inode) of the file ``path`` leads to, or None when there is none."""
    try:
        info = os.stat(path)
    except (OSError, ValueError):
        return None
    return info.st_dev, info.st_ino


def _entry_identities(folder: Path) -> dict:
    """(device, inode) -> path of every file under ``folder`` (links inside it are not followed: a run that
    replaces or deletes a link leaves what it points at alone)."""
    found = {}
    for root, _, names in os.walk(folder):
        for name in names:
            entry = Path(root, name)
            try:
                info = os.lstat(entry)
            except OSError:
                continue
            found[(info.st_dev, info.st_ino)] = entry
    return found


def _inside(path: str, folder: str) -> bool:
    try:
        return os.path.commonpath([path, folder]) == folder
    except ValueError:  # different drives
        return False


def _named_paths(items) -> list:
    """(label, path) pairs from a path, a sequence of paths or (label, path) pairs, or a dict label -> path;
    None entries are skipped."""
    if items is None:
        return []
    if isinstance(items, (str, os.PathLike)):
        items = [items]
    elif isinstance(items, dict):
        items = list(items.items())
    pairs = []
    for item in items:
        label, path = item if isinstance(item, tuple) else (None, item)
        if path is not None:
            pairs.append((label, Path(path)))
    return pairs


def protect_inputs(inputs, *, files=(), folders=(), remedy: str = "choose another output path") -> None:
    """Refuse, before anything is written, outputs that would replace or remove one of the inputs.

    Every output of a run is checked against every input by its resolved
    path (symbolic links and ``..`` followed) and by its file identity
    (device and inode: a hard link is the same file under another name).

    Parameters
    ----------
    inputs : path, sequence of paths or (role, path) pairs, or dict role -> path
        The files the run reads (None entries are skipped). A role
        (``"inputs.traces"``, ``"INPUT"``) is named in the message.
    files : same forms as ``inputs``
        Files the run writes (replaced whole, through :func:`atomic_output`).
    folders : same forms as ``inputs``
        Folders the run owns and may fill, replace or delete (a work
        folder, the report's figures): no input may lie inside one.
    remedy : str
        What the user can change, ending the message ("choose another
        --out").

    Raises
    ------
    calcium._checks.OutputOverInputError
        (a ValueError) naming the output, the input and ``remedy``.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     data = os.path.join(folder, "traces.csv")
    ...     open(data, "w").close()
    ...     os.link(data, os.path.join(folder, "spikes.csv"))       # the same file under a second name
    ...     try:
    ...         protect_inputs({"traces": data}, files=[os.path.join(folder, "spikes.csv")])
    ...     except ValueError as exc:
    ...         print(type(exc).__name__)
    OutputOverInputError
    """
    sources = []
    for label, path in _named_paths(inputs):
        sources.append((label, path, os.path.realpath(path), _identity(path)))
    if not sources:
        return

    def refuse(output, label, path, how):
        role = f" ({label})" if label else ""
        raise OutputOverInputError(f"refusing to write {output}: {how} the input file {path}{role}; {remedy}")

    for _, output in _named_paths(files):
        real, identity = os.path.realpath(output), _identity(output)
        for label, path, source_real, source_identity in sources:
            if real == source_real:
                refuse(output, label, path, "it is")
            if identity is not None and identity == source_identity:
                refuse(output, label, path, "it is a link to")
    for _, folder in _named_paths(folders):
        real = os.path.realpath(folder)
        for label, path, source_real, _ in sources:
            if _inside(source_real, real):
                refuse(folder, label, path, "this folder is written by the run and holds")
        if os.path.isdir(folder):
            entries = _entry_identities(Path(real))
            for label, path, _, source_identity in sources:
                if source_identity in entries:
                    refuse(entries[source_identity], label, path, "it is a link to")


def _refuse_inputs(path: Path, inputs) -> None:
    """:func:`protect_inputs` for one output file."""
    protect_inputs(inputs, files=[path])


class OutputWriteError(OSError):
    """A file could not be written (a full disk above all); the message names the file, the reason and a remedy.

    ``errno`` says why (ENOSPC for a full disk).
    """

    def __str__(self):
        return self.strerror if self.strerror else super().__str__()


def _short_write(text: str):
    """(bytes requested, bytes written) from numpy's message for a write cut short, or None."""
    found = re.search(r"(\d+) requested and (\d+) written", text)
    return (int(found.group(1)), int(found.group(2))) if found else None


def _no_space(exc: OSError, folder: Path) -> bool:
    """Whether ``exc`` says that the disk holding ``folder`` is full (or the user's quota used up)."""
    if getattr(exc, "errno", None) in (errno.ENOSPC, errno.EDQUOT):
        return True
    text = str(exc)
    if "No space left" in text or "Disk quota exceeded" in text:  # (h5py and others put errno in the text)
        return True
    short = _short_write(text)  # numpy writes arrays with fwrite and reports only the counts
    if short is not None:
        try:  # (measured while the part written is still there)
            return shutil.disk_usage(folder).free < short[0] - short[1]
        except OSError:
            return False
    return False


def space_error(path, exc: OSError, folder=None):
    """An :class:`OutputWriteError` naming ``path`` and saying "no space left" when ``exc`` is a full disk (or a
    used-up quota); else None."""
    path = Path(path)
    if isinstance(exc, OutputWriteError) or not _no_space(exc, Path(folder) if folder else path.parent):
        return None
    return OutputWriteError(errno.ENOSPC, f"cannot write {path}: no space left on the device (the disk or your "
                                          f"quota is full); free some space, or write to another disk")


def _check_room(path, n_bytes: int) -> None:
    """Refuse, before writing, a file of about ``n_bytes`` that cannot fit on the disk of its folder.

    (HDF5 cannot be relied on to fail cleanly when the disk fills up under it: the message comes, but the
    library may crash the process afterwards.)
    """
    path = Path(path)
    try:
        free = shutil.disk_usage(path.parent if str(path.parent) else ".").free
    except OSError:
        return
    if n_bytes > free:
        raise OutputWriteError(errno.ENOSPC, f"cannot write {path}: no space left on the device (it needs about "
                                             f"{size_text(n_bytes)}, {size_text(free)} are free); free some "
                                             f"space, or write to another disk")


def size_text(n_bytes: int) -> str:
    """A size for people: '820 bytes', '1.5 kB', '12 MB', '3.2 GB' (decimal units)."""
    if n_bytes < 1000:
        return f"{int(n_bytes)} bytes"
    for unit, scale in (("kB", 1e3), ("MB", 1e6), ("GB", 1e9), ("TB", 1e12)):
        value = n_bytes / scale
        if value < 999.5 or unit == "TB":
            return f"{value:.1f} {unit}" if value < 9.95 else f"{value:.0f} {unit}"


#: Bytes of HDF5 bookkeeping counted per dataset or attribute when the room a file needs is estimated: an
#: upper bound (measured on our files: about 1 kB per dataset of a results file, 0.5 kB per item of a small
#: ΔF/F file, superblock and heaps included).
HDF5_OVERHEAD_BYTES = 2048


@contextlib.contextmanager
def atomic_output(path, *, inputs=()):
    """Write a file atomically: yield a temporary path, then move it onto ``path``.

    The temporary file lives in the destination folder (so the final
    :func:`os.replace` is a rename on one file system, which POSIX and Windows
    make atomic) and keeps the suffix of ``path`` (so writers that choose a
    format from the suffix behave). If the ``with`` block raises, the
    temporary file is removed and ``path`` is left untouched.

    Parameters
    ----------
    path : str or path-like
        Final destination. Its folder must exist.
    inputs : sequence of path-like, optional
        Input files of the computation; ``path`` may not be any of them.

    Yields
    ------
    pathlib.Path
        The temporary path to write to (an empty file already exists there).

    Raises
    ------
    OutputWriteError
        (an OSError) naming ``path`` and saying "no space left" when the
        disk fills up while the ``with`` block writes (the temporary file
        is removed).
    ValueError
        If ``path`` is one of ``inputs`` (by path or file identity, see
        :func:`protect_inputs`; then :class:`~calcium._checks.OutputOverInputError`),
        is a folder, or its folder does not exist.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     out = os.path.join(folder, "notes.txt")
    ...     with atomic_output(out) as tmp:
    ...         _ = tmp.write_text("done")
    ...     open(out).read()
    'done'
    """
    path = Path(path)
    _refuse_inputs(path, inputs)
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ValueError(f"cannot write {path}: folder {folder} does not exist")
    if path.is_dir():
        raise ValueError(f"cannot write {path}: it is a folder")
    try:
        handle, tmp_name = tempfile.mkstemp(prefix=f".{path.name}.", suffix=f".part{path.suffix}", dir=folder)
    except OSError as exc:  # (no room even for an empty file: inodes or quota)
        raise space_error(path, exc, folder) or exc
    os.close(handle)
    tmp = Path(tmp_name)
    try:
        yield tmp
        # mkstemp makes the file private (0600); give the result the usual permissions (umask applies)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException as exc:
        full = space_error(path, exc, folder) if isinstance(exc, OSError) else None  # (measured before the unlink)
        with contextlib.suppress(OSError):
            tmp.unlink()
        if full is not None:
            raise full from exc
        raise


def _hash_inputs(inputs) -> dict:
    if isinstance(inputs, (str, os.PathLike)):
        inputs = (inputs,)
    return {str(item): file_sha256(item) for item in inputs}


def _attr_value(name, value):
    """Return (value as stored in HDF5, stored_as_json)."""
    if isinstance(value, (str, bool, np.bool_)) or (isinstance(value, numbers.Number) and not isinstance(value, complex)):
        return value, False
    if isinstance(value, np.ndarray) and value.dtype.kind in "biuf" and value.ndim <= 1:
        return value, False
    try:
        return json.dumps(value, default=_json_default), True
    except TypeError as exc:
        raise ValueError(f"attrs[{name!r}] cannot be stored in HDF5: {exc}") from None


def _json_default(value):
    converted = json_value(value)
    if converted is value:
        raise TypeError(f"{type(value).__name__} is not JSON serialisable")
    return converted


def _dataset_array(name, value) -> np.ndarray:
    arr = np.asarray(value)
    if arr.dtype == object:
        raise ValueError(f"datasets[{name!r}] must be a numeric, boolean or string array, got dtype object")
    return arr


def write_hdf5(path, datasets: dict, *, attrs: dict | None = None, inputs=()) -> Path:
    """Write arrays and parameters to an HDF5 file, atomically, with provenance.

    Parameters
    ----------
    path : str or path-like
        Output file (``.h5`` or ``.hdf5`` by convention).
    datasets : dict of str -> array_like
        Dataset name -> numeric, boolean or string array. A ``/`` in a name
        creates groups (``"rois/0/trace"``).
    attrs : dict, optional
        File attributes (parameters of the run). Numbers, strings, booleans
        and 1-D numeric arrays are stored as HDF5 attributes; anything else
        (dicts, lists, None) as JSON text, decoded again by :func:`read_hdf5`.
    inputs : sequence of path-like, optional
        Input files: their SHA-256 goes into the ``input_sha256`` attribute,
        and ``path`` may not be one of them.

    Returns
    -------
    pathlib.Path
        ``path``.

    Notes
    -----
    Three attributes are always added: ``calcium_version``
    (``calcium.__version__``), ``created`` (UTC time, ISO 8601) and
    ``input_sha256`` (JSON object: input path -> hex digest).

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     out = os.path.join(folder, "run.h5")
    ...     _ = write_hdf5(out, {"dff": [[0.0, 1.0]]}, attrs={"frame_rate": 30.0})
    ...     data, meta = read_hdf5(out)
    >>> data["dff"].shape, meta["frame_rate"]
    ((1, 2), 30.0)
    """
    import h5py

    if not isinstance(datasets, dict) or not datasets:
        raise ValueError(f"datasets must be a non-empty dict of name -> array, got {type(datasets).__name__}")
    attrs = dict(attrs or {})
    clash = [key for key in _PROVENANCE + (_JSON_ATTRS,) if key in attrs]
    if clash:
        raise ValueError(f"attrs may not use the reserved name(s) {clash}; they are filled in by write_hdf5")
    arrays = {str(name): _dataset_array(name, value) for name, value in datasets.items()}
    attrs["calcium_version"] = _package_version()
    attrs["created"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
    attrs["input_sha256"] = _hash_inputs(inputs)
    stored = {name: _attr_value(name, value) for name, value in attrs.items()}
    _refuse_inputs(path, inputs)
    _check_room(path, sum(arr.nbytes for arr in arrays.values())
                + HDF5_OVERHEAD_BYTES * (2 + len(arrays) + len(stored)))
    with atomic_output(path, inputs=inputs) as tmp:
        with h5py.File(tmp, "w") as handle:
            for name, arr in arrays.items():
                if arr.dtype.kind == "U":
                    handle.create_dataset(name, data=arr.astype(object), dtype=h5py.string_dtype())
                else:
                    handle.create_dataset(name, data=arr)
            for name, (value, _) in stored.items():
                handle.attrs[name] = value
            handle.attrs[_JSON_ATTRS] = json.dumps(sorted(k for k, (_, js) in stored.items() if js))
    return Path(path)


def _plain(value):
    if isinstance(value, bytes):
        return value.decode("utf-8")
    if isinstance(value, np.generic):
        return value.item()
    return value


def read_hdf5(path) -> tuple[dict, dict]:
    """Read every dataset and the file attributes of an HDF5 file.

    Parameters
    ----------
    path : str or path-like
        File written by :func:`write_hdf5` (or any HDF5 file).

    Returns
    -------
    datasets : dict of str -> ndarray
        Every dataset, keyed by its path without the leading ``/``
        (``"rois/0/trace"``); string datasets come back as ``str`` arrays.
    attrs : dict
        File attributes; those stored as JSON text by :func:`write_hdf5`
        (including ``input_sha256``) are decoded.

    Raises
    ------
    CalciumInputError
        If the file is missing or is not a readable HDF5 file.
    """
    import h5py

    path = _existing_file(path, "HDF5 file")
    datasets: dict = {}
    try:
        with h5py.File(path, "r") as handle:
            def collect(name, node):
                if isinstance(node, h5py.Dataset):
                    if h5py.check_string_dtype(node.dtype) is not None:
                        datasets[name] = np.asarray(node.asstr("utf-8")[()], dtype=str)
                    else:
                        datasets[name] = node[()]

            handle.visititems(collect)
            attrs = {key: _plain(value) for key, value in handle.attrs.items()}
    except OSError as exc:
        raise CalciumInputError(f"{path} is not a readable HDF5 file: {exc}") from None
    json_names = json.loads(attrs.pop(_JSON_ATTRS, "[]"))
    for key in json_names:
        if key in attrs:
            attrs[key] = json.loads(attrs[key])
    return datasets, attrs


def format_number(value) -> str:
    """Text for one CSV cell: integers as such, floats with full precision (``repr``), NaN as ``nan``."""
    if isinstance(value, (bool, np.bool_)):
        return str(int(value))
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        return repr(float(value))
    return str(value)


def write_csv(path, header, rows, *, inputs=()) -> Path:
    """Write a CSV table atomically.

    Parameters
    ----------
    path : str or path-like
        Output file.
    header : sequence of str
        Column names (written as the first line).
    rows : iterable of sequences
        One sequence per line, as long as ``header``. Floats are written with
        full precision (``repr``) so that a round trip is exact; NaN as ``nan``.
    inputs : sequence of path-like, optional
        Input files; ``path`` may not be one of them.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    ValueError
        If a row's length differs from the header's.
    """
    header = [str(name) for name in header]
    if not header:
        raise ValueError("header must name at least one column")
    with atomic_output(path, inputs=inputs) as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as handle:
            writer = csv.writer(handle, lineterminator="\n")
            writer.writerow(header)
            for number, row in enumerate(rows):
                cells = [format_number(v) for v in row]
                if len(cells) != len(header):
                    raise ValueError(f"rows[{number}] has {len(cells)} value(s), the header has {len(header)}")
                writer.writerow(cells)
    return Path(path)
