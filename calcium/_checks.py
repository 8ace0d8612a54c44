"""Argument validation shared by every stage.

Every public function validates its arguments here, once, at the top, and
raises :class:`ValueError` (or a subclass defined below) whose message names
the argument, the value received and what is allowed.
"""
from __future__ import annotations

import numbers
import os
import warnings
from dataclasses import dataclass

import numpy as np

__all__ = [
    "CalciumInputError",
    "MissingDataError",
    "OutputOverInputError",
    "MissingFrames",
    "check_frame_rate",
    "check_positive",
    "check_nonnegative",
    "check_int",
    "check_choice",
    "as_traces",
    "find_missing",
    "require_some_data",
    "MIN_FRAME_RATE_HZ",
    "MAX_FRAME_RATE_HZ",
    "check_orientation",
    "check_dff_like",
    "available_memory",
    "check_memory",
]


class CalciumInputError(ValueError):
    """Bad input data (not a bad argument value): wrong shape, unreadable file, ..."""


class MissingDataError(CalciumInputError):
    """A trace (or ROI) has no finite sample at all."""


class OutputOverInputError(ValueError):
    """An output of a run would replace, or sit inside a folder that replaces, one of the run's inputs.

    Raised before anything is written (see :func:`calcium.io.results.protect_inputs`).
    """


def _is_real_number(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def check_positive(value, name: str, *, finite: bool = True) -> float:
    """Return ``value`` as float if it is a real number > 0, else raise ValueError."""
    if not _is_real_number(value) or not (value > 0) or (finite and not np.isfinite(value)):
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")
    return float(value)


def check_nonnegative(value, name: str) -> float:
    """Return ``value`` as float if it is a finite real number >= 0, else raise ValueError."""
    if not _is_real_number(value) or not np.isfinite(value) or value < 0:
        raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
    return float(value)


def check_int(value, name: str, *, minimum: int | None = None, maximum: int | None = None) -> int:
    """Return ``value`` as int if it is an integer within [minimum, maximum]."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ValueError(f"{name} must be an integer, got {value!r}")
    value = int(value)
    if minimum is not None and value < minimum:
        raise ValueError(f"{name} must be >= {minimum}, got {value}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{name} must be <= {maximum}, got {value}")
    return value


def check_choice(value, name: str, allowed) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise ValueError listing them."""
    if value not in allowed:
        choices = ", ".join(repr(a) for a in allowed)
        raise ValueError(f"{name} must be one of {choices}; got {value!r}")
    return value


# Plausible frame rates of calcium imaging, in Hz.
# Lower bound: below 0.1 Hz a frame comes less often than every 10 s, longer than the slowest single-spike decays
# of calcium indicators (GCaMP6s: a half-decay of about half a second after one spike, well under 10 s after bursts;
# Chen et al. 2013, Nature 499:295, from memory), so a transient would be seen in at most one frame; slow volumetric
# scans of whole brains run near or above 1 Hz (Ahrens et al. 2013, Nat Methods 10:413, about 0.8 Hz, from memory).
# The bound also catches a frame period typed for the rate (0.0333 for 30 Hz: any rate above 10 Hz).
# Upper bound: the fastest calcium recordings are line scans, each line a "frame"; a resonant scanner of 8 kHz
# scanning both ways gives 16,000 lines per second (common practice), the most any of them can deliver.
MIN_FRAME_RATE_HZ = 0.1
MAX_FRAME_RATE_HZ = 20_000.0


def check_frame_rate(frame_rate, name: str = "frame_rate") -> float:
    """Validate a frame rate in Hz: a finite number in [MIN_FRAME_RATE_HZ, MAX_FRAME_RATE_HZ].

    The range (0.1 Hz to 20 kHz) spans slow volumetric scans to fast line scans (see the module constants for
    the sources); a value outside it is almost always a frame period given for the rate, or a typing error,
    and the message says which reciprocal would be plausible.
    """
    rate = check_positive(frame_rate, name)
    if MIN_FRAME_RATE_HZ <= rate <= MAX_FRAME_RATE_HZ:
        return rate
    side = "below" if rate < MIN_FRAME_RATE_HZ else "above"
    text = (f"{name}={frame_rate!r} Hz is {side} the range of calcium imaging this package accepts "
            f"({MIN_FRAME_RATE_HZ:g} Hz, a frame every {1 / MIN_FRAME_RATE_HZ:g} s, to {MAX_FRAME_RATE_HZ:g} Hz, "
            f"the line rate of a fast line scan)")
    reciprocal = 1.0 / rate
    if MIN_FRAME_RATE_HZ <= reciprocal <= MAX_FRAME_RATE_HZ:
        text += (f": if {frame_rate!r} is the frame period in seconds, the frame rate is 1/{frame_rate!r} = "
                 f"{reciprocal:.6g} Hz")
    else:
        text += "; give the number of frames per second"
    raise ValueError(text)


def as_traces(traces, name: str = "traces", *, min_frames: int = 1) -> np.ndarray:
    """Return ``traces`` as a C-contiguous float64 array of shape (frames,) or (rois, frames).

    NaN and inf are kept: they mark missing frames and are handled by the
    caller (see :func:`find_missing`). Raises ValueError for other shapes,
    for non-numeric data and for fewer than ``min_frames`` frames.
    """
    try:
        arr = np.asarray(traces)
    except Exception as exc:  # ragged lists and the like
        raise ValueError(f"{name} must be a numeric array of shape (frames,) or (rois, frames): {exc}") from None
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
        raise ValueError(f"{name} must be numeric, got dtype {arr.dtype}")
    if np.iscomplexobj(arr):
        raise ValueError(f"{name} must be real-valued, got dtype {arr.dtype}")
    if arr.ndim not in (1, 2):
        raise ValueError(f"{name} must have shape (frames,) or (rois, frames), got shape {arr.shape}")
    if arr.shape[-1] < min_frames:
        raise ValueError(f"{name} must have at least {min_frames} frame(s) on the last axis, got shape {arr.shape}")
    if arr.ndim == 2 and arr.shape[0] < 1:
        raise ValueError(f"{name} has no ROIs (shape {arr.shape})")
    # C order always: the compiled loops and BLAS sum in an order that can depend on the strides, and the same
    # values must give the same results whether they come as a row of a Fortran-order array or as a copy
    return np.ascontiguousarray(arr, dtype=np.float64)


@dataclass(frozen=True)
class MissingFrames:
    """Where a trace (or a stack of traces) has missing samples (NaN or inf).

    Attributes
    ----------
    mask : ndarray of bool
        True where the sample is missing, same shape as the traces.
    count : int
        Total number of missing samples.
    per_roi : ndarray of int
        Missing samples per ROI (length 1 for a 1-D trace).
    """

    mask: np.ndarray
    count: int
    per_roi: np.ndarray

    @property
    def any(self) -> bool:
        return self.count > 0

    def frames(self, roi: int = 0) -> np.ndarray:
        """Indices of the missing frames of one ROI."""
        m = self.mask if self.mask.ndim == 1 else self.mask[roi]
        return np.flatnonzero(m)

    def describe(self, frame_rate: float | None = None) -> str:
        """One line for people: how many frames are missing and where."""
        if not self.any:
            return "no missing frames"
        rois = np.flatnonzero(self.per_roi)
        first = self.frames(int(rois[0]))[:5]
        where = ", ".join(str(int(i)) for i in first)
        if frame_rate:
            where += f" (first at {first[0] / frame_rate:.3f} s)"
        return (f"{self.count} missing sample(s) in {rois.size} ROI(s); "
                f"ROI {int(rois[0])} first missing frame(s): {where}")


def find_missing(traces: np.ndarray) -> MissingFrames:
    """Report the NaN/inf samples of ``traces`` (1-D or 2-D, time last)."""
    mask = ~np.isfinite(traces)
    if mask.ndim == 1:  # (one trace: a plain count, much faster than the sum over an axis)
        per_roi = np.array([np.count_nonzero(mask)], dtype=np.int64)
    else:
        per_roi = mask.reshape(-1, mask.shape[-1]).sum(axis=1)
    return MissingFrames(mask=mask, count=int(per_roi.sum()), per_roi=per_roi)


def require_some_data(traces: np.ndarray, name: str = "traces") -> MissingFrames:
    """Find missing samples; raise :class:`MissingDataError` if any ROI is all missing."""
    missing = find_missing(traces)
    n_frames = traces.shape[-1]
    empty = np.flatnonzero(missing.per_roi == n_frames)
    if empty.size:
        if traces.ndim == 1:
            raise MissingDataError(f"{name}: every frame is missing (NaN or inf)")
        raise MissingDataError(
            f"{name}: ROI(s) {', '.join(str(int(i)) for i in empty[:10])} have every frame missing (NaN or inf)")
    return missing


# ---------------------------------------------------------------------------
# plausibility of data: orientation, ΔF/F, memory
# ---------------------------------------------------------------------------
# Traces with at least this many times more ROIs than frames are refused as sideways (frames, rois). A recording
# has more frames than ROIs in nearly every design (one minute at 30 Hz is 1,800 frames); short or slow recordings
# of large populations can have somewhat more ROIs than frames (10,000 ROIs at 3 Hz for half an hour: 5,400
# frames), which passes with a warning; ten times as many ROIs as frames (600 "ROIs" of 5 frames) is what a table
# read the wrong way round looks like. Our own choice; a caller can let the user insist.
ORIENTATION_REFUSE_RATIO = 10
# ΔF/F = (F - F0) / F0 is 0 at the baseline by definition, and a cell spends most of a recording near it: a trace
# whose lowest tenth of values lies above this level would be at more than twice its resting fluorescence nine
# tenths of the time, which is raw fluorescence (photon counts, camera units), not ΔF/F. Single-spike ΔF/F of
# common indicators is 0.01-0.5 (Chen et al. 2013, Nature 499:295, from memory), far below it.
DFF_BASELINE_LIMIT = 1.0
_DFF_BASELINE_QUANTILE = 0.1
_DFF_CHECK_FRAMES = 4096  # frames per ROI looked at (evenly spaced): the decile of a long trace needs no more


def check_orientation(traces: np.ndarray, name: str = "traces", *, remedy: str = "") -> bool:
    """Refuse traces that look like (frames, rois); warn when ROIs merely outnumber frames.

    Parameters
    ----------
    traces : ndarray, shape (frames,) or (rois, frames)
        The traces as the caller holds them (time on the last axis).
    name : str
        What to call them in messages (a file name, an argument name).
    remedy : str
        How the user can insist that the orientation is right (a keyword or a CLI flag), added to the
        message.

    Returns
    -------
    bool
        True when the traces have more ROIs than frames (a ``UserWarning`` was issued: the caller may flag
        the result); False otherwise.

    Raises
    ------
    CalciumInputError
        When there are at least ``ORIENTATION_REFUSE_RATIO`` (10) times as many ROIs as frames.

    Notes
    -----
    The rule looks at the shape only (see ``ORIENTATION_REFUSE_RATIO`` for the reasoning). Time is the last
    axis everywhere in this package; a table with one line per ROI and one column per frame, or an array
    saved as (frames, rois), comes out transposed.
    """
    shape = np.shape(traces)
    if len(shape) != 2:
        return False
    n_rois, n_frames = shape
    if n_rois <= n_frames:
        return False
    text = (f"{name} has {n_rois} ROIs of {n_frames} frame(s) each (shape {shape}; time is the last axis): "
            f"were frames and ROIs swapped, e.g. a table with one line per ROI, or an array saved as "
            f"(frames, rois)? Transpose it (one column per ROI in a CSV file, shape (rois, frames) in .npy/HDF5)")
    if remedy:
        text += f", or {remedy} if it really has {n_rois} ROIs"
    if n_rois >= ORIENTATION_REFUSE_RATIO * n_frames:
        raise CalciumInputError(text)
    warnings.warn(text.replace("were frames and ROIs swapped", "more ROIs than frames: were frames and ROIs "
                               "swapped", 1), UserWarning, stacklevel=3)
    return True


def check_dff_like(dff, name: str = "dff", *, allow_raw: bool = False, remedy: str = "") -> np.ndarray:
    """Refuse data that cannot be ΔF/F: booleans, 0/1 rasters and raw fluorescence.

    Parameters
    ----------
    dff : array_like, shape (frames,) or (rois, frames)
        What the caller was given as ΔF/F. NaN/inf are missing samples and are skipped.
    name : str
        Argument name used in messages.
    allow_raw : bool, default False
        Return the raw-looking ROIs instead of raising (the caller then flags them).
    remedy : str
        How the user can insist (keyword or CLI flag); replaces ``allow_raw=True`` in the message.

    Returns
    -------
    ndarray of bool, shape (rois,)
        True for each ROI that looks like raw fluorescence (only possible with ``allow_raw=True``).

    Raises
    ------
    ValueError
        Boolean data, data holding only the values 0 and 1 (a spike raster or a mask), or, unless
        ``allow_raw``, a ROI that looks like raw fluorescence; the message names the ROIs and their level.

    Notes
    -----
    A ROI looks like raw fluorescence when the 10th percentile of its finite values exceeds
    ``DFF_BASELINE_LIMIT`` = 1: ΔF/F = (F - F0) / F0 is 0 at rest by definition (Grienberger & Konnerth
    2012), so a ΔF/F trace spends most of its frames near 0, while raw fluorescence sits on a positive
    baseline far above 1 in any detector's units. The percentile is taken over at most 4,096 evenly spaced
    frames per ROI. Raw fluorescence scaled into [0, 1] (a normalised movie) is not caught.

    References
    ----------
    Grienberger C, Konnerth A (2012) Imaging calcium in neurons. Neuron 73:862-885.
    """
    original = np.asarray(dff) if not isinstance(dff, np.ndarray) else dff
    if original.dtype == bool:
        raise ValueError(f"{name} holds boolean (True/False) values, which are not ΔF/F: is it a spike raster or "
                         f"a mask? Give the ΔF/F traces (float values near 0 at rest)")
    x = as_traces(original, name)
    rows = x.reshape(-1, x.shape[-1])
    step = max(1, rows.shape[1] // _DFF_CHECK_FRAMES)
    sample = rows[:, ::step]
    finite = np.isfinite(sample)
    if _only_zeros_and_ones(sample, finite) and _only_zeros_and_ones(rows, np.isfinite(rows)):
        raise ValueError(f"{name} holds only the values 0 and 1, which is not ΔF/F: is it a spike raster or a "
                         f"mask? Give the ΔF/F traces")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-missing ROIs: NaN, handled by the caller
        level = np.nanquantile(np.where(finite, sample, np.nan), _DFF_BASELINE_QUANTILE, axis=1)
    raw = level > DFF_BASELINE_LIMIT
    if raw.any() and not allow_raw:
        which = np.flatnonzero(raw)
        listed = ", ".join(str(int(i)) for i in which[:10]) + (", ..." if which.size > 10 else "")
        first = int(which[0])
        rois = (f"the trace (10th percentile {level[first]:.4g})" if x.ndim == 1 else
                f"ROI(s) {listed} ({which.size} of {rows.shape[0]}; ROI {first}: 10th percentile "
                f"{level[first]:.4g})")
        raise ValueError(
            f"{name} looks like raw fluorescence, not ΔF/F: in {rois}, nine tenths of the values lie above "
            f"{DFF_BASELINE_LIMIT:g}, while ΔF/F sits near 0 at rest. Compute ΔF/F first "
            f"(calcium.delta_f_over_f, or the `calcium dff` command), or "
            f"{remedy or 'pass allow_raw=True'} if these really are ΔF/F values")
    return raw


def _only_zeros_and_ones(values: np.ndarray, finite: np.ndarray) -> bool:
    kept = values[finite]
    return bool(kept.size and np.any(kept == 1.0) and np.all((kept == 0.0) | (kept == 1.0)))


def _format_bytes(n_bytes: float) -> str:
    """Bytes for people, three significant digits and a decimal unit (kB = 1000 B)."""
    value = float(n_bytes)
    units = ("B", "kB", "MB", "GB", "TB", "PB", "EB", "ZB", "YB")
    for unit in units[:-1]:
        if value < 999.5:
            return f"{value:.3g} {unit}"
        value /= 1000.0
    return f"{value:.3g} {units[-1]}"


def _read_int(path: str) -> int | None:
    try:
        with open(path) as handle:
            text = handle.read().strip()
    except OSError:
        return None
    return int(text) if text.isdigit() else None


def available_memory() -> int | None:
    """Bytes of memory this process can still allocate without swapping, or None when unknown.

    The kernel's estimate ``MemAvailable`` in ``/proc/meminfo`` (Linux), lowered to what is left under a
    control-group memory limit (version 2 ``memory.max``, version 1 ``memory.limit_in_bytes``) when one is
    set; elsewhere ``os.sysconf('SC_AVPHYS_PAGES')`` pages.
    """
    available = None
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    available = int(line.split()[1]) * 1024
                    break
    except (OSError, ValueError, IndexError):
        available = None
    if available is None:
        try:
            available = int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
        except (ValueError, OSError, AttributeError):
            return None
    for limit_path, usage_path in (("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current"),
                                   ("/sys/fs/cgroup/memory/memory.limit_in_bytes",
                                    "/sys/fs/cgroup/memory/memory.usage_in_bytes")):
        limit, usage = _read_int(limit_path), _read_int(usage_path)
        if limit is not None and usage is not None and limit < 2 ** 60:  # "max" / a huge number: no limit
            available = min(available, max(limit - usage, 0))
            break
    return available


def check_memory(n_bytes, what: str, *, remedy: str = "") -> None:
    """Refuse a request that needs more memory than the machine has available.

    Parameters
    ----------
    n_bytes : float
        Estimated bytes the request allocates (may be astronomically large; it is never allocated).
    what : str
        The request, naming the argument or option that sets its size (e.g. ``"n_rois=1000000000 x 36000
        frames"``).
    remedy : str
        What the user can change, appended to the message.

    Raises
    ------
    ValueError
        When ``n_bytes`` exceeds :func:`available_memory`; the message gives both figures. Nothing is
        checked when the available memory cannot be found.
    """
    available = available_memory()
    if available is None or not n_bytes > available:
        return
    text = (f"{what} would need about {_format_bytes(n_bytes)} of memory, more than the "
            f"{_format_bytes(available)} available on this machine")
    raise ValueError(text + (f"; {remedy}" if remedy else ""))


def as_spike_times(times, name: str = "spike_times", *, warn_unsorted: bool = True,
                   stacklevel: int = 3, nonnegative: bool = False) -> np.ndarray:
    """Return spike times (seconds) as a sorted 1-D float64 array.

    Parameters
    ----------
    times : array_like
        Spike times in seconds. A repeated time means several spikes at once.
    name : str
        Argument name used in messages.
    warn_unsorted : bool
        Warn (``UserWarning``) when the times were not in ascending order; they
        are sorted either way.
    stacklevel : int
        Passed to :func:`warnings.warn`.
    nonnegative : bool
        Refuse negative times (times counted from the first frame, as in a
        spike table; see :func:`calcium.io.read_spike_times`).

    Raises
    ------
    ValueError
        If ``times`` is not one-dimensional, not numeric, or holds NaN or inf
        (or, with ``nonnegative``, a negative time).
    """
    if times is None:
        raise ValueError(f"{name} must be an array of spike times in seconds, got None")
    try:
        arr = np.asarray(times, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a 1-D array of spike times in seconds: {exc}") from None
    if arr.ndim == 0:
        arr = arr.reshape(1)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array of spike times in seconds, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        bad = np.flatnonzero(~np.isfinite(arr))
        raise ValueError(f"{name} holds {bad.size} non-finite time(s) (NaN or inf), first at index {bad[0]}")
    if nonnegative and arr.size and arr.min() < 0:
        bad = np.flatnonzero(arr < 0)
        raise ValueError(f"{name} holds {bad.size} negative time(s) (first {float(arr[bad[0]])!r} s at index "
                         f"{bad[0]}): spike times are seconds from the first frame, as in a spike table; align "
                         "the clocks first (add the clock lag) and leave out the spikes before the recording")
    if arr.size > 1 and np.any(np.diff(arr) < 0):
        if warn_unsorted:
            warnings.warn(f"{name} were not in ascending order; sorted them", UserWarning,
                          stacklevel=stacklevel)
        arr = np.sort(arr, kind="stable")
    return arr


def json_value(value):
    """``value`` with numpy scalars/arrays and paths turned into plain JSON types (other values unchanged)."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    return value


_UNSET = object()


def renamed_argument(old_name: str, old_value, new_name: str, new_value, *, stacklevel: int = 3):
    """The value of an argument that was renamed: ``new_value``, or ``old_value`` (with a DeprecationWarning)
    when only the former name was given; both given is a ValueError. ``_UNSET`` marks "not given"."""
    if old_value is _UNSET:
        return new_value
    if new_value is not _UNSET:
        raise ValueError(f"give {new_name}= only ({old_name}= is its former name), not both")
    warnings.warn(f"{old_name}= is the former name of {new_name}=; it will be removed in a later release",
                  DeprecationWarning, stacklevel=stacklevel)
    return old_value
