"""The results file of a run: HDF5, written chunk by chunk, resumable after any interruption.

How a run survives a crash, a kill or a power cut
-------------------------------------------------
* The file is created in one go, under a temporary name, then renamed into
  place: a results file either does not exist or has its full layout.
* Every dataset is created with its final shape, contiguous, with its disk
  space allocated at creation. Afterwards a chunk of results only overwrites
  bytes at fixed places: no HDF5 metadata (object headers, B-trees, heaps)
  changes while the run goes on, so killing the writer at any instant cannot
  damage the structure of the file. Strings are stored fixed-length for the
  same reason.
* A chunk's rows are written, flushed and synced to disk, and only then is
  the chunk's byte in ``progress/chunk_done`` set (and flushed). A chunk
  killed half-way keeps its flag 0 and is computed again on the next run.
  The chunks finished within about a second share one sync (a sync per
  chunk would cost more than writing them), which runs in a thread while
  the run goes on; their flags are set once it has finished. A kill loses
  at most the last second or two of work.
* The file records the SHA-256 of the inputs and of the results-affecting
  parameters (``run_hash``). A rerun with the same ones continues where the
  last one stopped; with different ones it is refused unless the caller asks
  to overwrite.
* The per-ROI datasets are written by whoever computed the rows, straight
  into their bytes (:class:`RowWriter`: plain positioned writes at offsets
  HDF5 fixed at creation, no HDF5 library call), so the results never travel
  through the parent process. Everything else (the done flags, all HDF5
  metadata) is written by the parent alone, and the parent's sync before a
  chunk's done flag covers the rows the workers wrote (a sync flushes the
  file, whoever wrote to it).

The layout is documented in ``docs/hdf5-layout.md``.
"""
from __future__ import annotations

import contextlib
import errno
import json
import math
import os
import time
import shutil
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

__all__ = ["DatasetSpec", "ResultStore", "RowWriter", "OutputError", "OutputMismatchError", "ResultsFile",
           "open_results", "read_results", "FORMAT_NAME", "FORMAT_VERSION"]

FORMAT_NAME = "calcium session results"
FORMAT_VERSION = 1
_PROGRESS = "progress"


class OutputError(OSError):
    """The results cannot be written (folder missing or read-only, disk full, file locked or damaged).

    ``errno`` says why (ENOSPC, EACCES, ...); the message says what to do.
    """

    def __str__(self):
        return self.strerror if self.strerror else super().__str__()


class OutputMismatchError(ValueError):
    """An existing results file was made from other inputs or parameters; overwrite it explicitly."""


@dataclass(frozen=True)
class DatasetSpec:
    """One dataset of the results file.

    Attributes
    ----------
    name : str
        Path inside the file (``"dff"``, ``"electrical/fit_decay_s"``).
    shape : tuple of int
        Final shape. For ``per_roi`` datasets the first axis is the ROI.
    dtype : str
        numpy dtype (``"f4"``, ``"u2"``, ...) or ``"text<N>"`` for UTF-8
        strings of at most N bytes.
    description : str
        What it holds (stored as the ``description`` attribute).
    unit : str
        Unit (``"s"``, ``"ΔF/F"``, ``""``), stored as the ``unit`` attribute.
    per_roi : bool
        Written chunk by chunk (rows = ROIs); otherwise written once, after
        the chunks.
    fill : float or None
        Written over the whole dataset at creation (e.g. NaN for results
        that exist only for some ROIs); None leaves the space unwritten.
    """

    name: str
    shape: tuple
    dtype: str
    description: str
    unit: str = ""
    per_roi: bool = True
    fill: float | None = None

    @property
    def numpy_dtype(self) -> np.dtype:
        if self.dtype.startswith("text"):
            return np.dtype(f"S{int(self.dtype[4:])}")
        return np.dtype(self.dtype)

    @property
    def nbytes(self) -> int:
        return int(np.prod(self.shape, dtype=np.int64)) * self.numpy_dtype.itemsize


def _text_bytes(values, size: int) -> np.ndarray:
    """UTF-8 bytes of each string, cut at ``size`` bytes on a character boundary."""
    out = []
    for value in np.ravel(np.asarray(values, dtype=object)):
        data = str(value).encode("utf-8")
        if len(data) > size:
            data = data[:size].decode("utf-8", errors="ignore").encode("utf-8")
        out.append(data)
    return np.array(out, dtype=f"S{size}").reshape(np.shape(values))


def _fixed_dcpl():
    """Creation properties: contiguous, space allocated now, no fill written (see the module notes)."""
    import h5py

    dcpl = h5py.h5p.create(h5py.h5p.DATASET_CREATE)
    dcpl.set_layout(h5py.h5d.CONTIGUOUS)
    dcpl.set_alloc_time(h5py.h5d.ALLOC_TIME_EARLY)
    dcpl.set_fill_time(h5py.h5d.FILL_TIME_NEVER)
    return dcpl


@dataclass(frozen=True)
class RowWriter:
    """Writes rows of the per-ROI datasets of a results file straight into their bytes.

    Made by :meth:`ResultStore.row_writer`; small and picklable, so it goes to
    the workers with their work. The datasets are contiguous, uncompressed,
    little-endian and allocated at creation, so row ``i`` of a dataset is a
    fixed byte range of the file: writing it changes nothing HDF5 keeps track
    of. Several processes may write disjoint rows at once.

    Attributes
    ----------
    path : str
        The results file.
    targets : tuple of (name, byte offset, dtype, shape of one row, text size)
        The text size is the byte length of a fixed-length text dataset
        (written as UTF-8, see :func:`_text_bytes`), 0 for numbers.
    """

    path: str
    targets: tuple

    @property
    def names(self) -> tuple:
        return tuple(name for name, *_ in self.targets)

    def write(self, first_row: int, values: dict) -> None:
        """Write ``values[name]`` (rows first) at rows ``first_row:...`` of every target dataset.

        Raises
        ------
        OutputError
            The write failed (disk full, file gone, permission); the chunk
            is then not marked done and is computed again by a rerun.
        KeyError, ValueError
            A target missing from ``values`` or of the wrong shape.
        """
        arrays = []
        for name, offset, dtype, row_shape, text_size in self.targets:
            if text_size:
                array = _text_bytes(values[name], text_size)
            else:
                array = np.ascontiguousarray(values[name], dtype=np.dtype(dtype))
            if array.ndim != 1 + len(row_shape) or array.shape[1:] != tuple(row_shape):
                raise ValueError(f"{name}: expected rows of shape {tuple(row_shape)}, got shape {array.shape}")
            arrays.append((array, offset + first_row * array[:1].nbytes))
        fd = None
        try:
            fd = os.open(self.path, os.O_WRONLY)
            for array, offset in arrays:
                _pwrite_all(fd, memoryview(array).cast("B"), offset)
        except OSError as exc:
            raise OutputError(getattr(exc, "errno", None) or errno.EIO,
                              f"writing rows {first_row}+ to {self.path} failed: {_describe_oserror(exc)}. The "
                              f"file stays marked incomplete and keeps every chunk finished so far; fix the cause "
                              f"and rerun the same command to continue") from None
        finally:
            if fd is not None:
                os.close(fd)


def _pwrite_all(fd: int, data: memoryview, offset: int) -> None:
    """os.pwrite until every byte is written (a positioned write may write fewer bytes than asked)."""
    while len(data):
        written = os.pwrite(fd, data, offset)
        if written <= 0:
            raise OSError(errno.EIO, "the write made no progress")
        data = data[written:]
        offset += written


def _sync_descriptor(fd) -> None:
    """os.fsync(fd), or nothing for None (runs in the store's sync thread: no HDF5 call here)."""
    if fd is not None:
        os.fsync(fd)


def _describe_oserror(exc: BaseException) -> str:
    code = getattr(exc, "errno", None)
    text = str(exc)
    if code == errno.ENOSPC or "No space left" in text:
        return "no space left on the device (the disk is full)"
    if code == errno.EDQUOT or "quota" in text.lower():
        return "no space left under your disk quota"
    if code in (errno.EACCES, errno.EPERM, errno.EROFS) or "ermission denied" in text or "Read-only" in text:
        return "permission denied (read-only folder or file system?)"
    return text or type(exc).__name__


def check_output_folder(folder) -> Path:
    """Return ``folder`` as a Path if it is an existing, writable folder; else raise :class:`OutputError`."""
    folder = Path(folder)
    for parent in [folder, *folder.parents]:
        if parent.exists():
            if not parent.is_dir():
                raise OutputError(errno.ENOTDIR, f"cannot write into {folder}: {parent} is a file, not a folder")
            break
    if not folder.is_dir():
        raise OutputError(errno.ENOENT, f"cannot write into {folder}: the folder does not exist")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(errno.EACCES, f"cannot write into {folder}: the folder is read-only (no write "
                                        f"permission); choose another output folder")
    return folder


def _differences(old: dict, new: dict, prefix: str = "") -> list[str]:
    out = []
    for key in sorted(set(old) | set(new)):
        a, b = old.get(key, "<not set>"), new.get(key, "<not set>")
        if isinstance(a, dict) and isinstance(b, dict):
            out.extend(_differences(a, b, f"{prefix}{key}."))
        elif a != b:
            out.append(f"{prefix}{key}: {a!r} -> {b!r}")
    return out


class ResultStore:
    """Writer of a results file. Open with :meth:`open`; used as a context manager.

    Attributes
    ----------
    path : pathlib.Path
    chunk_bounds : ndarray of int
        ROI index where each chunk starts, plus the end (length n_chunks + 1).
    resumed : bool
        True when an existing file of the same run was reopened.
    commit_interval_s : float
        Chunks written within this many seconds of the last commit share
        its next sync (see :meth:`commit`); 0 syncs after every chunk.
    """

    commit_interval_s = 1.0

    def __init__(self, path: Path, handle, resumed: bool):
        self.path = path
        self._file = handle
        self.resumed = resumed
        self.chunk_bounds = handle[f"{_PROGRESS}/chunk_bounds"][()]
        self._specs = json.loads(handle.attrs["datasets_json"])
        self._done = handle[f"{_PROGRESS}/chunk_done"][()].astype(bool)
        self._written: list[int] = []  # chunks written since the last commit began (not yet marked done)
        self._syncing = None            # (chunks, future of their sync) while a sync runs
        self._open_datasets: dict = {}
        self._sync_thread = None
        self._last_commit = -math.inf

    # -- opening ---------------------------------------------------------
    @classmethod
    def open(cls, path, *, datasets, chunk_bounds, run_hash: str, attrs: dict, parameters: dict,
             flags=(), overwrite: bool = False) -> "ResultStore":
        """Create the results file, or reopen it to resume the same run.

        Parameters
        ----------
        path : path-like
            The ``.h5`` file. Its folder must exist and be writable.
        datasets : sequence of DatasetSpec
            The layout (see :class:`DatasetSpec`).
        chunk_bounds : sequence of int
            Start ROI of each chunk and the end (strictly increasing, from 0).
        run_hash : str
            Identifies inputs + results-affecting parameters + package version.
        attrs : dict
            File attributes written at creation (provenance); values must be
            numbers or strings.
        parameters : dict
            The parameters behind ``run_hash`` (JSON-serialisable); stored, and
            used to say what differs when a rerun is refused.
        flags : sequence of str
            Names of one-off steps with their own done flag
            (``progress/<name>_done``), e.g. "extraction".
        overwrite : bool
            Replace a file made by a different run (otherwise refused).

        Raises
        ------
        OutputError
            Folder missing or read-only, not enough disk space, the file is
            locked by another run or unreadable.
        OutputMismatchError
            The file exists and was made by a different run (and not
            ``overwrite``).
        """
        path = Path(path)
        check_output_folder(path.parent if str(path.parent) else Path("."))
        if path.exists():
            if path.is_dir():
                raise OutputError(errno.EISDIR, f"cannot write {path}: it is a folder")
            if not os.access(path, os.W_OK):
                raise OutputError(errno.EACCES, f"cannot resume {path}: the file is read-only")
            verdict = cls._existing_run(path, run_hash, parameters)
            if verdict == "same":
                return cls(path, cls._open_handle(path), resumed=True)
            if not overwrite:
                raise OutputMismatchError(verdict)
        specs = list(datasets)
        cls._check_space(path, specs)
        cls._create(path, specs, np.asarray(chunk_bounds, dtype=np.int64), run_hash, attrs, parameters,
                    tuple(flags))
        return cls(path, cls._open_handle(path), resumed=False)

    @staticmethod
    def _open_handle(path: Path):
        import h5py

        try:
            return h5py.File(path, "r+")
        except OSError as exc:
            if "lock" in str(exc).lower():
                raise OutputError(errno.EBUSY, f"{path} is in use by another run (the file is locked); wait for "
                                               f"it to finish, or choose another output folder") from None
            raise OutputError(getattr(exc, "errno", None) or errno.EIO,
                              f"cannot open {path} for writing: {_describe_oserror(exc)}") from None

    @staticmethod
    def _existing_run(path: Path, run_hash: str, parameters: dict) -> str:
        """'same', or a message saying why the existing file belongs to another run."""
        import h5py

        try:
            with h5py.File(path, "r", locking=False) as handle:
                attrs = dict(handle.attrs)
        except OSError as exc:
            if "lock" in str(exc).lower():
                raise OutputError(errno.EBUSY, f"{path} is in use by another run (the file is locked); wait for "
                                               f"it to finish, or choose another output folder") from None
            return (f"{path} exists but cannot be read as a results file ({exc}); use overwrite=True "
                    f"(--overwrite on the command line) to replace it")
        if attrs.get("format") != FORMAT_NAME:
            return (f"{path} exists and is not a calcium results file; refusing to replace it (move it away, "
                    f"or use overwrite=True / --overwrite on the command line)")
        if attrs.get("run_hash") == run_hash:
            return "same"
        try:
            old = json.loads(attrs.get("parameters_json", "{}"))
        except ValueError:
            old = {}
        changes = _differences(old, json.loads(json.dumps(parameters, default=str)))
        listing = "; ".join(changes[:8]) + (f"; and {len(changes) - 8} more" if len(changes) > 8 else "")
        return (f"{path} holds results of a different run ({listing or 'package version or inputs differ'}). "
                f"Refusing to mix them: use overwrite=True (--overwrite on the command line) to start again, or "
                f"choose another output")

    @staticmethod
    def _check_space(path: Path, specs) -> None:
        from ..io.results import HDF5_OVERHEAD_BYTES, size_text

        needed = sum(spec.nbytes + HDF5_OVERHEAD_BYTES for spec in specs) + 16 * HDF5_OVERHEAD_BYTES
        try:
            free = shutil.disk_usage(path.parent if str(path.parent) else Path(".")).free
        except OSError:
            return
        if needed > free:
            raise OutputError(errno.ENOSPC, f"cannot create {path}: no space left on the device for it (it needs "
                                            f"{size_text(needed)}, {size_text(free)} are free); free some "
                                            f"space, or write the results to another disk")

    @staticmethod
    def _create(path: Path, specs, bounds: np.ndarray, run_hash, attrs, parameters, flags) -> None:
        import h5py

        from ..io.results import atomic_output

        if bounds.ndim != 1 or bounds.size < 2 or bounds[0] != 0 or np.any(np.diff(bounds) <= 0):
            raise ValueError(f"chunk_bounds must rise strictly from 0, got {bounds!r}")
        progress = [
            DatasetSpec(f"{_PROGRESS}/chunk_bounds", (bounds.size,), "i8",
                        "first ROI of each chunk, then the number of ROIs", per_roi=False),
            DatasetSpec(f"{_PROGRESS}/chunk_done", (bounds.size - 1,), "u1",
                        "1 once the chunk's rows are written and flushed", per_roi=False, fill=0),
            DatasetSpec(f"{_PROGRESS}/complete", (1,), "u1", "1 once every result is written", per_roi=False,
                        fill=0),
            DatasetSpec(f"{_PROGRESS}/finished_utc", (1,), "text40", "when the run completed (ISO 8601, UTC)",
                        per_roi=False, fill=None),
            *[DatasetSpec(f"{_PROGRESS}/{flag}_done", (1,), "u1", f"1 once the {flag} step is written",
                          per_roi=False, fill=0) for flag in flags],
        ]
        try:
            with atomic_output(path) as tmp:
                with h5py.File(tmp, "w") as handle:
                    dcpl = _fixed_dcpl()
                    for spec in [*progress, *specs]:
                        dset = handle.create_dataset(spec.name, shape=spec.shape, dtype=spec.numpy_dtype,
                                                     dcpl=dcpl, track_times=False)
                        dset.attrs["description"] = spec.description
                        dset.attrs["unit"] = spec.unit
                        if spec.dtype.startswith("text"):
                            dset.attrs["encoding"] = "utf-8"
                        if spec.fill is not None and dset.size:
                            dset[...] = spec.fill
                    handle[f"{_PROGRESS}/chunk_bounds"][...] = bounds
                    handle[f"{_PROGRESS}/finished_utc"][...] = b""
                    handle.attrs["format"] = FORMAT_NAME
                    handle.attrs["format_version"] = FORMAT_VERSION
                    handle.attrs["run_hash"] = run_hash
                    handle.attrs["created_utc"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
                    handle.attrs["parameters_json"] = json.dumps(parameters, sort_keys=True, default=str)
                    handle.attrs["datasets_json"] = json.dumps(
                        {spec.name: {"shape": list(spec.shape), "dtype": spec.dtype, "per_roi": spec.per_roi}
                         for spec in specs})
                    for key, value in attrs.items():
                        handle.attrs[key] = value
        except OSError as exc:
            raise OutputError(getattr(exc, "errno", None) or errno.EIO,
                              f"cannot create {path}: {_describe_oserror(exc)}") from exc

    # -- state -----------------------------------------------------------
    @property
    def n_chunks(self) -> int:
        return int(self.chunk_bounds.size - 1)

    @property
    def done(self) -> np.ndarray:
        """Boolean per chunk: its results are on disk."""
        return self._done.copy()

    def chunk_rows(self, chunk_id: int) -> slice:
        return slice(int(self.chunk_bounds[chunk_id]), int(self.chunk_bounds[chunk_id + 1]))

    def flag(self, name: str) -> bool:
        return bool(self._file[f"{_PROGRESS}/{name}_done"][0])

    @property
    def complete(self) -> bool:
        return bool(self._file[f"{_PROGRESS}/complete"][0])

    def read(self, name: str, selection=()) -> np.ndarray:
        """Read (part of) a dataset, e.g. ``store.read("dff", np.s_[10:20])``."""
        return self._file[name][selection]

    # -- writing ---------------------------------------------------------
    def row_writer(self) -> RowWriter:
        """A :class:`RowWriter` for every per-ROI dataset of the file.

        With it a worker writes all of its chunk's results, and this process
        only sets the done flags. (Every dataset this module creates can be
        written so; one that cannot raises RuntimeError.)
        """
        targets = []
        for name, spec in self._specs.items():
            if not spec["per_roi"]:
                continue
            dset = self._file[name]
            offset = dset.id.get_offset()
            if dset.chunks is not None or dset.compression is not None or offset is None or \
                    dset.dtype.byteorder not in ("<", "|", "=" if np.little_endian else "<"):
                raise RuntimeError(f"{self.path}:{name} is not a contiguous, allocated little-endian dataset")
            text_size = int(spec["dtype"][4:]) if spec["dtype"].startswith("text") else 0
            targets.append((name, int(offset), dset.dtype.str, tuple(int(n) for n in dset.shape[1:]), text_size))
        # (absolute: whatever folder a worker runs in)
        return RowWriter(os.path.abspath(self.path), tuple(targets))

    def _write(self, name: str, selection, values) -> None:
        """The single place where data reach the file (tests patch it to simulate a full disk)."""
        dataset = self._open_datasets.get(name)
        if dataset is None:  # (looking a dataset up by name costs more than writing a chunk's values)
            dataset = self._open_datasets[name] = self._file[name]
        dataset[selection] = values

    def _encode(self, name: str, values):
        dtype = self._specs[name]["dtype"] if name in self._specs else None
        if dtype is not None and dtype.startswith("text"):
            return _text_bytes(values, int(dtype[4:]))
        return values

    @property
    def _fd(self) -> int:
        return self._file.id.get_vfd_handle()

    def _flush(self, *, sync: bool) -> None:
        self._file.flush()
        if sync:
            try:
                fd = self._fd
            except (ValueError, TypeError, AttributeError):  # a driver without a file descriptor: nothing to sync
                return
            _sync_descriptor(fd)  # (a failing sync raises OSError, as in the sync thread)

    def _fail(self, what: str, exc: BaseException):
        reason = _describe_oserror(exc)
        raise OutputError(getattr(exc, "errno", None) or errno.EIO,
                          f"writing {what} to {self.path} failed: {reason}. The file stays marked incomplete "
                          f"and keeps every chunk finished so far; fix the cause and rerun the same command to "
                          f"continue") from exc

    def write_chunk(self, chunk_id: int, values: dict) -> None:
        """Write one chunk's rows of every dataset in ``values``; the chunk is marked done by a later commit.

        Rows written by a :class:`RowWriter` for this chunk must be written
        before the call: the commit's sync covers them (see :meth:`commit`).

        Parameters
        ----------
        chunk_id : int
        values : dict of name -> array
            Per-ROI datasets; the first axis of each array must be the
            chunk's number of ROIs.
        """
        rows = self.chunk_rows(chunk_id)
        n = rows.stop - rows.start
        for name, array in values.items():
            spec = self._specs.get(name)
            if spec is None or not spec["per_roi"]:
                raise KeyError(f"{name!r} is not a per-ROI dataset of {self.path}")
            if np.shape(array)[0] != n:
                raise ValueError(f"chunk {chunk_id} has {n} ROIs but values[{name!r}] has {np.shape(array)[0]} rows")
        try:
            for name, array in values.items():
                self._write(name, rows, self._encode(name, array))
        except OSError as exc:
            self._fail(f"chunk {chunk_id}", exc)
        self._written.append(int(chunk_id))
        self._finish_sync(wait=False)
        if self._syncing is None and time.monotonic() - self._last_commit >= self.commit_interval_s:
            self._start_sync()

    def commit(self) -> None:
        """Sync everything written so far to disk, then mark the chunks written since the last commit done.

        :meth:`write_chunk` commits by itself, without waiting: when
        ``commit_interval_s`` has passed since the last commit, a thread
        syncs the file while the run goes on, and the chunks written before
        the sync began are marked done by a later call once it has finished
        (one sync for the chunks of an interval instead of one per chunk, and
        no wait for the disk). This method, :meth:`mark_complete` and
        :meth:`close` wait for it.
        """
        self._finish_sync(wait=True)
        if self._written:
            self._start_sync()
            self._finish_sync(wait=True)

    def _start_sync(self) -> None:
        """Hand what HDF5 holds to the system, then sync the file in a thread; the chunks written so far wait."""
        chunks, self._written = sorted(self._written), []
        try:
            self._flush(sync=False)
        except OSError as exc:
            self._fail("chunk(s) " + ", ".join(map(str, chunks)), exc)
        if self._sync_thread is None:
            from concurrent.futures import ThreadPoolExecutor

            self._sync_thread = ThreadPoolExecutor(max_workers=1, thread_name_prefix="results-sync")
        try:
            fd = self._fd
        except (ValueError, TypeError, AttributeError):  # a driver without a file descriptor: nothing to sync
            fd = None
        self._syncing = (chunks, self._sync_thread.submit(_sync_descriptor, fd))
        self._last_commit = time.monotonic()

    def _finish_sync(self, *, wait: bool) -> None:
        """Once the sync has finished (or at once, with ``wait``): mark its chunks done."""
        if self._syncing is None:
            return
        chunks, future = self._syncing
        if not wait and not future.done():
            return
        self._syncing = None
        try:
            future.result()
            for chunk_id in chunks:
                self._write(f"{_PROGRESS}/chunk_done", chunk_id, 1)
            self._flush(sync=False)
        except OSError as exc:
            self._fail("chunk(s) " + ", ".join(map(str, chunks)), exc)
        self._done[chunks] = True

    def write_rows(self, name: str, selection, values) -> None:
        """Write part of any dataset (for the steps done once, after the chunks); not flushed."""
        try:
            self._write(name, selection, self._encode(name, values))
        except OSError as exc:
            self._fail(name, exc)

    def set_flag(self, name: str) -> None:
        """Flush everything written so far, then mark the one-off step ``name`` done."""
        try:
            self._flush(sync=True)
            self._write(f"{_PROGRESS}/{name}_done", 0, 1)
            self._flush(sync=False)
        except OSError as exc:
            self._fail(f"the {name} step", exc)

    def mark_complete(self) -> None:
        """Commit, then set ``progress/complete`` (only when every chunk is done)."""
        self.commit()
        if not self._done.all():
            missing = np.flatnonzero(~self._done)
            raise RuntimeError(f"cannot mark {self.path} complete: chunk(s) {missing[:10].tolist()} not done")
        try:
            self._write(f"{_PROGRESS}/finished_utc", 0,
                        datetime.now(timezone.utc).isoformat(timespec="seconds").encode())
            self._flush(sync=True)
            self._write(f"{_PROGRESS}/complete", 0, 1)
            self._flush(sync=True)
        except OSError as exc:
            self._fail("the completion mark", exc)

    def close(self) -> None:
        """Commit the chunks written (when that still works: an earlier error is not hidden), close the file."""
        if self._file is not None and (self._written or self._syncing is not None):
            with contextlib.suppress(OSError):
                self.commit()
        if self._sync_thread is not None:
            self._sync_thread.shutdown(wait=True)
            self._sync_thread = None
        handle, self._file = self._file, None
        self._open_datasets = {}
        if handle is not None:
            with contextlib.suppress(Exception):
                handle.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------
class ResultsFile:
    """Read-only view of a results file (from :func:`open_results`).

    Attributes
    ----------
    path : pathlib.Path
    complete : bool
        Every chunk and step finished.
    chunk_done : ndarray of bool
    attrs : dict
        File attributes; the ``*_json`` ones decoded (``parameters``,
        ``inputs`` ...) under their name without the suffix.
    frame_rate : float
    n_rois, n_frames : int
    """

    def __init__(self, handle, path: Path):
        self._file = handle
        self.path = path
        attrs = {}
        for key, value in handle.attrs.items():
            value = value.decode() if isinstance(value, bytes) else value
            value = value.item() if isinstance(value, np.generic) else value
            if key.endswith("_json") and isinstance(value, str):
                attrs[key[:-5]] = json.loads(value)
            else:
                attrs[key] = value
        self.attrs = attrs
        self.complete = bool(handle[f"{_PROGRESS}/complete"][0])
        self.chunk_done = handle[f"{_PROGRESS}/chunk_done"][()].astype(bool)
        self.frame_rate = float(attrs.get("frame_rate", np.nan))
        self.n_rois = int(attrs.get("n_rois", 0))
        self.n_frames = int(attrs.get("n_frames", 0))

    def __contains__(self, name):
        return name in self._file

    def names(self) -> list[str]:
        """Every dataset path in the file."""
        import h5py

        found = []
        self._file.visititems(lambda name, node: found.append(name) if isinstance(node, h5py.Dataset) else None)
        return found

    def dataset(self, name: str):
        """The h5py dataset ``name`` itself (for reading in blocks)."""
        return self._file[name]

    def read(self, name: str, selection=()) -> np.ndarray:
        """A dataset (or part of it); fixed-length text comes back as ``str``."""
        node = self._file[name]
        data = node[selection]
        if node.attrs.get("encoding") == "utf-8":
            return np.char.decode(np.asarray(data), "utf-8")
        return data

    def close(self):
        self._file.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def open_results(path, *, allow_incomplete: bool = False) -> ResultsFile:
    """Open a results file for reading.

    Parameters
    ----------
    path : path-like
    allow_incomplete : bool
        Open a file whose run has not finished (rows of unfinished chunks
        hold no results; see ``chunk_done``). By default refused.

    Raises
    ------
    calcium._checks.CalciumInputError
        Missing or unreadable file, not a results file, or incomplete.
    """
    import h5py

    from .._checks import CalciumInputError

    path = Path(path)
    if not path.is_file():
        raise CalciumInputError(f"results file not found: {path}")
    try:
        handle = h5py.File(path, "r", locking=False)
    except OSError as exc:
        raise CalciumInputError(f"{path} is not a readable HDF5 file: {exc}") from None
    if handle.attrs.get("format") != FORMAT_NAME:
        handle.close()
        raise CalciumInputError(f"{path} is not a calcium results file")
    view = ResultsFile(handle, path)
    if not view.complete and not allow_incomplete:
        done = int(view.chunk_done.sum())
        view.close()
        raise CalciumInputError(f"{path} is incomplete ({done} of {view.chunk_done.size} chunks done): the run was "
                                f"interrupted; rerun the same command to finish it")
    return view


def read_results(path, *, allow_incomplete: bool = False) -> tuple[dict, dict]:
    """Every dataset (as arrays) and the attributes of a results file.

    Loads everything into memory: for large sessions use :func:`open_results`
    and read the parts you need.
    """
    with open_results(path, allow_incomplete=allow_incomplete) as view:
        return {name: view.read(name) for name in view.names()}, dict(view.attrs)

