"""Reading and writing fluorescence traces: ``.npy``, ``.csv`` and HDF5.

Traces are always returned as float64 arrays of shape (rois, frames); a
single trace becomes one row. Missing samples are NaN and stay NaN.

CSV layout (one column per ROI, one line per frame)::

    time_s,roi_0,roi_1
    0.0,101.2,98.7
    0.0333333,,99.1        <- empty cell: missing sample (NaN)
    0.1,103.4,nan          <- a skipped time step: frame 2 is missing for every ROI

The header line is optional. A column named ``time_s`` (or ``time``) holds
the time of each line in seconds: the frame rate is inferred from it, the
spacing is checked, and a step that is a whole number of frame intervals
inserts missing (NaN) frames, which are reported.

What is refused, because it would otherwise be read as wrong numbers
without a word: a column that rises in even steps (a clock or a frame
counter) under a header that is not a time name; ``;`` as the separator
and decimal commas; a time column whose steps give a frame rate outside
the range of calcium imaging (times in milliseconds); boolean arrays; and
tables with ten or more times as many ROIs as frames (read sideways: one
line per ROI).
"""
from __future__ import annotations

import csv
import dataclasses
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .._checks import (MAX_FRAME_RATE_HZ, MIN_FRAME_RATE_HZ, CalciumInputError, MissingFrames, as_traces,
                       check_frame_rate, check_orientation, find_missing)
from .results import _existing_file, _load_npy, _output_suffix, _save_npy, file_sha256, write_csv, write_hdf5

__all__ = ["TraceData", "read_traces", "write_traces", "TraceDataset", "find_trace_dataset", "TRACE_SUFFIXES"]

TRACE_SUFFIXES = (".npy", ".csv", ".h5", ".hdf5")
_TIME_COLUMNS = ("time_s", "time")
_MISSING_CELLS = ("", "nan", "na", "n/a")
# A time step may differ from a whole number of frame intervals by at most
# this fraction of one interval (timestamps printed with few decimals and
# acquisition jitter stay well inside it; a changed frame rate does not).
_SPACING_TOLERANCE = 0.1
# A column under a non-time header is taken for a clock (and refused as a ROI) when it rises in steps equal
# within _SPACING_TOLERANCE over at least this many lines: fluorescence never does that, while a random trace
# rises in seven steps in a row with probability 1/40320 before the steps even have to be equal.
_MIN_CLOCK_LINES = 8
_DECIMAL_COMMA = re.compile(r"\d,\d")
_SEPARATOR_ADVICE = ("this reader takes values separated by ',' (or tabs) with '.' as the decimal mark: save the "
                     "table again as comma-separated values with '.' decimals")


@dataclass(frozen=True)
class TraceData:
    """Traces read from a file.

    Attributes
    ----------
    traces : ndarray of float64, shape (rois, frames)
        The traces; NaN (or inf) marks a missing sample.
    frame_rate : float or None
        Frames per second, from a CSV time column or an HDF5 ``frame_rate``
        attribute; None when the file does not say.
    path : pathlib.Path
        The file read.
    sha256 : str
        SHA-256 of the file's bytes (hex), for provenance.
    missing : MissingFrames
        Where the missing samples are.
    gap_frames : ndarray of int
        Frames inserted as missing because the CSV time column skipped them
        (empty for other files).
    first_frame_time_s : float or None
        Time of frame 0 in the file's own clock (CSV time column), else None.
        Spike times in this package are counted from frame 0.
    roi_names : tuple of str or None
        Column names of a CSV header (time column excluded), else None.
    suspect_orientation : bool
        True when the file holds more ROIs than frames (a warning was
        issued: frames and ROIs may be swapped); see :func:`read_traces`.
    """

    traces: np.ndarray
    frame_rate: float | None
    path: Path
    sha256: str
    missing: MissingFrames = field(default=None, repr=False)
    gap_frames: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64), repr=False)
    first_frame_time_s: float | None = None
    roi_names: tuple | None = None
    suspect_orientation: bool = False

    def __post_init__(self):
        if self.missing is None:
            object.__setattr__(self, "missing", find_missing(self.traces))

    @property
    def n_rois(self) -> int:
        return int(self.traces.shape[0])

    @property
    def n_frames(self) -> int:
        return int(self.traces.shape[1])

    def describe(self) -> str:
        """One line for people: file, shape, rate and missing samples."""
        rate = f"{self.frame_rate:g} Hz" if self.frame_rate else "frame rate not stored"
        text = f"{self.path.name}: {self.n_rois} ROI(s) x {self.n_frames} frame(s), {rate}; "
        text += self.missing.describe(self.frame_rate)
        if self.gap_frames.size:
            text += f"; {self.gap_frames.size} frame(s) absent from the time column inserted as missing"
        return text


def _checked_traces(data, path: Path) -> np.ndarray:
    """Validate shape/type of loaded data and return float64 (rois, frames)."""
    if np.asarray(data).dtype == bool:
        raise CalciumInputError(f"{path} holds boolean (True/False) values, not fluorescence: is it a spike raster "
                                f"or a mask? Give the fluorescence or ΔF/F traces")
    try:
        arr = as_traces(data, name=f"traces in {path}")
    except ValueError as exc:
        raise CalciumInputError(str(exc)) from None
    return np.ascontiguousarray(arr.reshape(1, -1) if arr.ndim == 1 else arr)


def read_traces(path, *, dataset: str | None = None, time_column="auto",
                orientation_check: bool = True) -> TraceData:
    """Read fluorescence traces from ``.npy``, ``.csv``, ``.h5`` or ``.hdf5``.

    Parameters
    ----------
    path : str or path-like
        The file. ``.npy``: an array (rois, frames) or (frames,), loaded
        without pickle. ``.csv``: one column per ROI, one line per frame,
        optional header, optional ``time_s``/``time`` column (see the module
        notes). ``.h5``/``.hdf5``: a numeric dataset (rois, frames) or
        (frames,), with an optional ``frame_rate`` attribute on the dataset or
        on the file.
    dataset : str, optional
        HDF5 only: the dataset to read. By default the dataset named
        ``traces``, else ``dff`` (what ``calcium dff`` writes beside ``f0``),
        else the only 1-D/2-D numeric dataset in the file.
    time_column : "auto", str, int or None, default "auto"
        CSV only. ``"auto"``: the column named ``time_s`` or ``time`` is the
        time column; a column under another name that rises in even steps
        (a clock or a frame counter) is refused rather than read as a ROI.
        A column name (or 0-based index): that column holds the time in
        seconds. None: there is no time column; every column is a ROI.
    orientation_check : bool, default True
        Refuse a file with ten or more times as many ROIs as frames, and
        warn (``suspect_orientation``) when ROIs merely outnumber frames:
        such a file was usually written with one line per ROI. False
        skips the check (a file that really is that wide). Not applied to a
        CSV file with a time column, whose lines are frames by construction.

    Returns
    -------
    TraceData
        ``traces`` is float64 of shape (rois, frames).

    Raises
    ------
    CalciumInputError
        Missing, empty, corrupt or unreadable file; object (pickled) or
        boolean arrays; wrong number of dimensions; non-numeric cells; an
        unevenly spaced time column, or one giving a frame rate outside
        0.1-20,000 Hz; an unnamed clock-like column; ``;`` separators or
        decimal commas; ten times more ROIs than frames (unless
        ``orientation_check=False``); an ambiguous or absent HDF5 dataset.
        The message names the file.
    ValueError
        ``dataset`` given for a file that is not HDF5, or ``time_column``
        given for one that is not CSV.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     name = os.path.join(folder, "f.csv")
    ...     _ = open(name, "w").write("time_s,a,b\\n0.0,1,5\\n0.5,2,\\n1.0,3,7\\n")
    ...     data = read_traces(name)
    >>> data.frame_rate, data.traces.tolist()
    (2.0, [[1.0, 2.0, 3.0], [5.0, nan, 7.0]])
    """
    path = _existing_file(path, "trace file", suffixes=TRACE_SUFFIXES, allow_empty=False)
    suffix = path.suffix.lower()
    if dataset is not None and suffix not in (".h5", ".hdf5"):
        raise ValueError(f"dataset={dataset!r} only applies to HDF5 files, not {path}")
    if time_column != "auto" and suffix != ".csv":
        raise ValueError(f"time_column={time_column!r} only applies to CSV files, not {path}")
    if not (time_column is None or isinstance(time_column, str)
            or (isinstance(time_column, (int, np.integer)) and not isinstance(time_column, bool))):
        raise ValueError(f"time_column must be 'auto', a column name, a column index or None; got {time_column!r}")
    sha = file_sha256(path)
    if suffix == ".npy":
        data = TraceData(traces=_checked_traces(_load_npy(path), path), frame_rate=None, path=path, sha256=sha)
    elif suffix == ".csv":
        data = _read_csv(path, sha, time_column)
    else:
        traces, frame_rate = _read_hdf5_traces(path, dataset)
        data = TraceData(traces=traces, frame_rate=frame_rate, path=path, sha256=sha)
    if orientation_check and data.first_frame_time_s is None:  # (a CSV time column fixes the orientation)
        if check_orientation(data.traces, str(path), remedy="pass orientation_check=False to read_traces"):
            data = dataclasses.replace(data, suspect_orientation=True)
    return data


def _is_number(text: str) -> bool:
    if text.strip().lower() in _MISSING_CELLS:
        return True
    try:
        float(text)
    except ValueError:
        return False
    return True


def _read_csv(path: Path, sha: str, time_column="auto") -> TraceData:
    try:
        with open(path, newline="", encoding="utf-8-sig") as handle:
            text = handle.read()
    except UnicodeDecodeError:
        raise CalciumInputError(f"{path} is not a text (UTF-8) CSV file") from None
    lines = text.splitlines()
    content = [ln for ln in lines if ln.strip() and not ln.lstrip().startswith("#")]
    if not content:
        raise CalciumInputError(f"{path} holds no data lines")
    first = content[0]
    if ";" in first and "\t" not in first and first.count(";") >= first.count(","):
        commas = " and decimal commas (1,5 for 1.5)" if any(_DECIMAL_COMMA.search(ln) for ln in content[:50]) else ""
        raise CalciumInputError(f"{path} separates its values with ';'{commas}; {_SEPARATOR_ADVICE}")
    delimiter = "\t" if "\t" in first else ","
    rows = []  # (line number, cells)
    for number, cells in enumerate(csv.reader(lines, delimiter=delimiter), start=1):
        if not cells or (len(cells) == 1 and not cells[0].strip()) or cells[0].lstrip().startswith("#"):
            continue
        rows.append((number, [c.strip() for c in cells]))
    header = None
    if not all(_is_number(c) for c in rows[0][1]):
        header = rows.pop(0)[1]
    if not rows:
        raise CalciumInputError(f"{path} has a header but no data lines")
    n_columns = len(header) if header is not None else len(rows[0][1])
    for number, cells in rows:
        if len(cells) != n_columns:
            hint = ""
            if len(cells) > n_columns and delimiter == "," and any(_DECIMAL_COMMA.search(ln) for ln in content[:50]):
                hint = (f" (decimal commas such as 1,5 for 1.5 split a value in two: {_SEPARATOR_ADVICE})")
            raise CalciumInputError(f"{path}, line {number}: {len(cells)} value(s), expected {n_columns}{hint}")
    if delimiter == "," and _looks_like_decimal_commas(rows):
        raise CalciumInputError(f"{path} seems to write decimal commas (1,05 for 1.05: every value is a whole "
                                f"number and some have leading zeros, the digits after a decimal comma); "
                                f"{_SEPARATOR_ADVICE}")
    try:  # fast path: numpy parses the whole table at once
        values = np.array([[("nan" if c.lower() in _MISSING_CELLS else c) for c in cells] for _, cells in rows],
                          dtype=np.float64)
    except ValueError:
        for number, cells in rows:  # find the offending cell for the message
            for c, cell in enumerate(cells):
                if not _is_number(cell):
                    raise CalciumInputError(
                        f"{path}, line {number}, column {c + 1}: {cell!r} is not a number{_cell_hint(cell)}") from None
        raise
    time_index = _time_column_index(header, n_columns, time_column, path)
    if time_column == "auto" and time_index is None:
        _refuse_unnamed_clock(values, header, path)
    roi_columns = [c for c in range(n_columns) if c != time_index]
    if not roi_columns:
        raise CalciumInputError(f"{path} has a time column but no ROI columns")
    data = values[:, roi_columns].T
    names = tuple(header[c] for c in roi_columns) if header is not None else None
    if time_index is None:
        return TraceData(traces=_checked_traces(data, path), frame_rate=None, path=path, sha256=sha, roi_names=names)
    line_numbers = np.array([number for number, _ in rows])
    frame_index, frame_rate = _frames_from_times(values[:, time_index], line_numbers, path)
    if frame_rate is not None and not MIN_FRAME_RATE_HZ <= frame_rate <= MAX_FRAME_RATE_HZ:
        label = repr(header[time_index]) if header is not None else f"column {time_index + 1}"
        hint = (f" (times in milliseconds? that would be {frame_rate * 1000:.6g} Hz)"
                if MIN_FRAME_RATE_HZ <= frame_rate * 1000 <= MAX_FRAME_RATE_HZ else "")
        raise CalciumInputError(
            f"{path}: the time column {label} steps by {1 / frame_rate:.6g} per frame, a frame rate of "
            f"{frame_rate:.6g} Hz, outside the range of calcium imaging ({MIN_FRAME_RATE_HZ:g}-"
            f"{MAX_FRAME_RATE_HZ:g} Hz){hint}: the time column must hold seconds; convert it, or pass "
            f"time_column=None to read the file without it")
    n_frames = int(frame_index[-1]) + 1
    traces = np.full((len(roi_columns), n_frames), np.nan)
    traces[:, frame_index] = data
    gaps = np.setdiff1d(np.arange(n_frames), frame_index)
    if gaps.size:
        warnings.warn(f"{path}: the time column skips {gaps.size} frame(s) (first at frame {int(gaps[0])}, "
                      f"{gaps[0] / frame_rate:.4g} s); they are marked missing (NaN)", stacklevel=3)
    return TraceData(traces=_checked_traces(traces, path), frame_rate=frame_rate, path=path, sha256=sha,
                     gap_frames=gaps, first_frame_time_s=float(values[0, time_index]), roi_names=names)


def _cell_hint(cell: str) -> str:
    """Why a cell is not a number, when it is something a user may not have meant to write."""
    if re.fullmatch(r"[+-]?\d+,\d+", cell):
        return f" (a decimal comma? {_SEPARATOR_ADVICE})"
    if cell.lower() in ("true", "false"):
        return " (boolean values are not fluorescence: is it a spike raster or a mask?)"
    return ""


def _looks_like_decimal_commas(rows) -> bool:
    """Comma-separated cells that are all whole numbers, some with leading zeros ("1,05" read as 1 and 05).

    A whole number is not written with a leading zero, but the digits after a decimal comma often start with
    one; a table of true whole numbers (photon counts) has none.
    """
    leading_zero = False
    for _, cells in rows:
        for cell in cells:
            if not cell or cell.lower() in _MISSING_CELLS:
                continue
            if not cell.lstrip("+-").isdigit():
                return False
            leading_zero = leading_zero or (len(cell.lstrip("+-")) > 1 and cell.lstrip("+-")[0] == "0")
    return leading_zero


def _time_column_index(header, n_columns: int, time_column, path: Path):
    """Index of the time column, from its name in the header or the ``time_column`` argument (None: none)."""
    if time_column is None:
        return None
    if time_column == "auto":
        if header is None:
            return None
        found = [i for i, name in enumerate(header) if name.lower() in _TIME_COLUMNS]
        if len(found) > 1:
            raise CalciumInputError(f"{path}: more than one time column ({', '.join(header[i] for i in found)})")
        return found[0] if found else None
    if isinstance(time_column, str):
        if header is None or time_column not in header:
            names = ", ".join(repr(h) for h in header) if header is not None else "none (no header line)"
            raise ValueError(f"time_column={time_column!r} is not a column of {path}; columns: {names}")
        return header.index(time_column)
    if not 0 <= int(time_column) < n_columns:
        raise ValueError(f"time_column={time_column!r} is not a column index of {path} (0 to {n_columns - 1})")
    return int(time_column)


def _clock_step(column: np.ndarray) -> float | None:
    """The step of a column that rises in equal steps (a clock or a frame counter), else None."""
    if column.size < _MIN_CLOCK_LINES or not np.all(np.isfinite(column)):
        return None
    steps = np.diff(column)
    if not np.all(steps > 0):
        return None
    step = float(np.median(steps))
    return step if np.all(np.abs(steps - step) <= _SPACING_TOLERANCE * step) else None


def _refuse_unnamed_clock(values: np.ndarray, header, path: Path) -> None:
    for c in range(values.shape[1]):
        step = _clock_step(values[:, c])
        if step is None:
            continue
        label = f"column {c + 1} ({header[c]!r})" if header is not None else f"column {c + 1} (no header)"
        fix = (f"name it 'time_s' if it holds seconds (or pass time_column={header[c]!r})" if header is not None
               else f"add a header line naming it 'time_s' if it holds seconds (or pass time_column={c})")
        raise CalciumInputError(
            f"{path}: {label} rises in even steps of {step:.6g}, like a clock or a frame counter, not like "
            f"fluorescence: {fix}, delete it if it counts frames, or pass time_column=None to read it as a ROI")


def _frames_from_times(times: np.ndarray, line_numbers: np.ndarray, path: Path):
    """Frame index of each line and the frame rate, from a time column.

    The frame interval starts as the median step (robust to a minority of
    skipped frames); each step must then be a whole number k >= 1 of
    intervals within ``_SPACING_TOLERANCE``, and at most half of the frames
    may be absent (more suggests a typing error in a time); the rate is refined by a least
    squares line through (frame index, time) (rounded to 12 significant
    digits) and the residuals checked again.
    """
    bad = np.flatnonzero(~np.isfinite(times))
    if bad.size:
        raise CalciumInputError(f"{path}, line {line_numbers[bad[0]]}: time is missing or not finite")
    if times.size == 1:
        return np.zeros(1, dtype=np.int64), None
    steps = np.diff(times)
    bad = np.flatnonzero(steps <= 0)
    if bad.size:
        i = bad[0] + 1
        raise CalciumInputError(f"{path}, line {line_numbers[i]}: time {float(times[i])!r} does not increase "
                                f"(previous line: {float(times[i - 1])!r})")
    interval = float(np.median(steps))
    multiples = np.rint(steps / interval)
    off = np.abs(steps - multiples * interval) > _SPACING_TOLERANCE * interval
    off |= multiples < 1  # a step far below one frame would put two lines on the same frame
    if off.any():
        i = int(np.flatnonzero(off)[0]) + 1
        raise CalciumInputError(
            f"{path}, line {line_numbers[i]}: uneven time spacing: step {steps[i - 1]:.6g} s is not a whole "
            f"number of frame intervals ({interval:.6g} s, i.e. {1 / interval:.6g} Hz)")
    frame_index = np.concatenate([[0], np.cumsum(multiples)]).astype(np.int64)
    if frame_index[-1] + 1 > 2 * times.size:
        i = int(np.argmax(steps)) + 1
        raise CalciumInputError(f"{path}, line {line_numbers[i]}: the time column would leave more frames missing "
                                f"than present (largest step {steps[i - 1]:.6g} s = {int(multiples[i - 1])} frame "
                                f"intervals); check the times")
    slope, intercept = np.polyfit(frame_index, times, 1)
    residual = times - (intercept + slope * frame_index)
    worst = int(np.argmax(np.abs(residual)))
    if abs(residual[worst]) > _SPACING_TOLERANCE * slope:
        raise CalciumInputError(f"{path}, line {line_numbers[worst]}: uneven time spacing: time drifts "
                                f"{residual[worst]:.3g} s from a constant frame rate of {1 / slope:.6g} Hz")
    # 12 significant digits: far beyond any clock's accuracy, and it removes
    # the last-bit noise of the fit (times k / 30 give 30.0, not 29.999999999999996).
    return frame_index, float(f"{1.0 / slope:.12g}")


def _numeric_datasets(handle):
    import h5py

    found = {}

    def visit(name, node):
        if isinstance(node, h5py.Dataset):
            found[name] = node

    handle.visititems(visit)
    return found


def _is_trace_dataset(node) -> bool:
    return node.ndim in (1, 2) and (np.issubdtype(node.dtype, np.number) or node.dtype == bool) \
        and not np.issubdtype(node.dtype, np.complexfloating)


@dataclass(frozen=True)
class TraceDataset:
    """Where the traces are in an HDF5 file, without reading them.

    Attributes
    ----------
    path : pathlib.Path
        The file.
    dataset : str
        Path of the dataset inside the file (no leading ``/``).
    shape : tuple of int
        Stored shape: (rois, frames) or (frames,).
    dtype : numpy.dtype
        Stored type.
    frame_rate : float or None
        The ``frame_rate`` attribute of the dataset, else of the file, else None.
    """

    path: Path
    dataset: str
    shape: tuple
    dtype: np.dtype
    frame_rate: float | None

    @property
    def n_rois(self) -> int:
        return 1 if len(self.shape) == 1 else int(self.shape[0])

    @property
    def n_frames(self) -> int:
        return int(self.shape[-1])


def _open_hdf5(path: Path):
    import h5py

    try:
        return h5py.File(path, "r")
    except OSError as exc:
        raise CalciumInputError(f"{path} is not a readable HDF5 file: {exc}") from None


_DEFAULT_DATASETS = ("traces", "dff")


def _select_dataset(handle, path: Path, dataset: str | None):
    """(key, node, frame_rate) of the traces dataset, chosen as :func:`read_traces` documents."""
    nodes = _numeric_datasets(handle)
    listing = ", ".join(f"{name} {node.shape} {node.dtype}" for name, node in nodes.items()) or "none"
    if dataset is None:
        candidates = [name for name, node in nodes.items() if _is_trace_dataset(node)]
        # the traces the tool's own commands write: 'traces', else the ΔF/F of `calcium dff` ('dff' beside 'f0')
        named = [name for name in _DEFAULT_DATASETS if name in nodes]
        if named:
            dataset = named[0]
        elif len(candidates) == 1:
            dataset = candidates[0]
        else:
            what = "no" if not candidates else "more than one"
            raise CalciumInputError(f"{path} has {what} 1-D/2-D numeric dataset; name the one to read (dataset=..., "
                                    f"--dataset) (datasets available: {listing})")
    key = dataset.strip("/")
    if key not in nodes:
        raise CalciumInputError(f"{path} has no dataset {dataset!r} (datasets available: {listing})")
    node = nodes[key]
    if not _is_trace_dataset(node):
        raise CalciumInputError(f"{path}: dataset {key!r} has shape {node.shape} and dtype {node.dtype}; "
                                f"expected numeric (rois, frames) or (frames,)")
    rate = _checked_rate(node.attrs.get("frame_rate", handle.attrs.get("frame_rate")), path)
    return key, node, rate


def find_trace_dataset(path, *, dataset: str | None = None) -> TraceDataset:
    """Locate the traces in an HDF5 file (as :func:`read_traces` would) without reading them.

    For callers that stream a large dataset in blocks with h5py themselves.

    Parameters
    ----------
    path : str or path-like
        ``.h5``/``.hdf5`` file.
    dataset : str, optional
        As in :func:`read_traces`.

    Returns
    -------
    TraceDataset

    Raises
    ------
    CalciumInputError
        As :func:`read_traces` for HDF5 files.
    """
    path = _existing_file(path, "trace file", suffixes=(".h5", ".hdf5"), allow_empty=False)
    with _open_hdf5(path) as handle:
        key, node, rate = _select_dataset(handle, path, dataset)
        return TraceDataset(path=path, dataset=key, shape=tuple(node.shape), dtype=node.dtype, frame_rate=rate)


def _read_hdf5_traces(path: Path, dataset: str | None):
    with _open_hdf5(path) as handle:
        key, node, rate = _select_dataset(handle, path, dataset)
        try:
            data = node[()]
        except OSError as exc:
            raise CalciumInputError(f"{path}: dataset {key!r} cannot be read: {exc}") from None
    return _checked_traces(data, path), rate


def _checked_rate(rate, path: Path):
    if rate is None:
        return None
    arr = np.asarray(rate)
    if arr.size != 1 or not np.issubdtype(arr.dtype, np.number):
        raise CalciumInputError(f"{path}: frame_rate attribute must be one number, got {rate!r}")
    value = float(arr.reshape(()))
    if not np.isfinite(value) or value <= 0:
        raise CalciumInputError(f"{path}: frame_rate attribute must be positive and finite, got {value!r}")
    try:
        return check_frame_rate(value, "the frame_rate attribute")
    except ValueError as exc:
        raise CalciumInputError(f"{path}: {exc}") from None


def write_traces(path, traces, *, frame_rate: float | None = None, dataset: str = "traces", inputs=()) -> Path:
    """Write traces to ``.npy``, ``.csv``, ``.h5`` or ``.hdf5`` (chosen by suffix), atomically.

    Parameters
    ----------
    path : str or path-like
        Output file; the suffix chooses the format.
    traces : array_like, shape (rois, frames) or (frames,)
        The traces; NaN/inf are written as such (``nan``/``inf`` in CSV).
    frame_rate : float, optional
        Frames per second. CSV: a ``time_s`` column (frame k at k /
        frame_rate) is written first. HDF5: a ``frame_rate`` file attribute.
        ``.npy`` cannot hold it: a UserWarning says so and the rate is not stored.
    dataset : str, default "traces"
        HDF5 only: name of the dataset.
    inputs : sequence of path-like, optional
        Input files; ``path`` may not be one of them.

    Returns
    -------
    pathlib.Path
        ``path``.

    Notes
    -----
    CSV columns are named ``roi_0``, ``roi_1``, ... (one per ROI, one line per
    frame); values use full float precision so :func:`read_traces` gives back
    the same numbers.
    """
    path = Path(path)
    suffix = _output_suffix(path, TRACE_SUFFIXES)
    arr = as_traces(traces)
    if frame_rate is not None:
        frame_rate = check_frame_rate(frame_rate)
    if suffix == ".npy":
        if frame_rate is not None:
            warnings.warn(f"{path}: a .npy file cannot hold the frame rate ({frame_rate:g} Hz); it is not "
                          f"stored (write .csv or .h5 to keep it)", stacklevel=2)
        return _save_npy(path, arr, inputs=inputs)
    if suffix == ".csv":
        table = arr.reshape(-1, arr.shape[-1]).T  # (frames, rois)
        header = [f"roi_{i}" for i in range(table.shape[1])]
        if frame_rate is None:
            return write_csv(path, header, table, inputs=inputs)
        rows = ([k / frame_rate, *row] for k, row in enumerate(table))
        return write_csv(path, ["time_s"] + header, rows, inputs=inputs)
    if not isinstance(dataset, str) or not dataset.strip("/"):
        raise ValueError(f"dataset must be a non-empty name, got {dataset!r}")
    attrs = {} if frame_rate is None else {"frame_rate": frame_rate}
    return write_hdf5(path, {dataset: arr}, attrs=attrs, inputs=inputs)
