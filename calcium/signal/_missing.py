"""Helpers for missing samples (NaN/inf) shared by the signal stages.

Nothing here is public: the stages call these helpers and say in their own
docstrings what they do with missing frames.
"""
from __future__ import annotations

import numpy as np
import scipy  # scipy.ndimage loads on first use

__all__ = ["fill_gaps_linear", "grow_mask", "finite_runs", "row_chunks"]


def fill_gaps_linear(x: np.ndarray, missing: np.ndarray) -> np.ndarray:
    """Return a copy of ``x`` with the ``missing`` samples linearly interpolated.

    Interpolation runs along the last axis between the nearest finite
    neighbours; before the first and after the last finite sample the nearest
    finite value is repeated. Only rows that have missing samples are touched.
    The caller must put the missing marks back afterwards: the filled values
    exist only so that a computation that cannot skip samples (a recursive
    filter) can run.
    """
    out = np.array(x, dtype=np.float64, copy=True)
    rows = out.reshape(-1, out.shape[-1])
    mask = missing.reshape(-1, out.shape[-1])
    frames = np.arange(out.shape[-1])
    for i in np.flatnonzero(mask.any(axis=1)):
        good = ~mask[i]
        rows[i, mask[i]] = np.interp(frames[mask[i]], frames[good], rows[i, good])
    return out


def grow_mask(mask: np.ndarray, reach: int) -> np.ndarray:
    """Return ``mask`` widened by ``reach`` samples on each side along the last axis."""
    mask = np.asarray(mask, dtype=bool)
    if reach <= 0 or not mask.any():
        return mask.copy()
    # A running maximum over 2 * reach + 1 samples marks every sample with a True within reach.
    return scipy.ndimage.maximum_filter1d(mask, 2 * reach + 1, axis=-1, mode="constant", cval=False)


def finite_runs(valid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and stop indices (stop exclusive) of the runs of True in a 1-D mask."""
    valid = np.asarray(valid, dtype=bool)
    edges = np.diff(np.concatenate([[False], valid, [False]]).astype(np.int8))
    return np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)


def row_chunks(n_rows: int, n_cols: int, *, elements: int = 1 << 19):
    """Yield slices of rows so that each chunk holds about ``elements`` values.

    The signal stages work on a few ROIs at a time: the temporaries then stay
    in the processor cache instead of being spread over gigabytes of memory.
    """
    step = max(1, elements // max(1, n_cols))
    for start in range(0, n_rows, step):
        yield slice(start, min(start + step, n_rows))
