"""Argument validation shared by every stage.

Every public function validates its arguments here, once, at the top, and
raises :class:`ValueError` (or a subclass defined below) whose message names
the argument, the value received and what is allowed.
"""
from __future__ import annotations

import numbers
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


def check_frame_rate(frame_rate) -> float:
    """Validate a frame rate in Hz (a positive finite number)."""
    return check_positive(frame_rate, "frame_rate")


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
