"""Baseline fluorescence F0 and ΔF/F.

F0 is a running low percentile of a lightly smoothed trace, taken over a
window of tens of seconds: slow bleaching and drift move F0, brief positive
transients do not. ΔF/F = (F − F0) / F0.

The running percentile is computed on a coarse grid (see the Notes of
:func:`delta_f_over_f`), so that ΔF/F of a thousand ROIs costs a small
multiple of the time of one pass over the data. At both ends of the
recording, where no window can be centred, F0 comes from a line fitted to
the outermost window (a local linear quantile regression), so that it
follows bleaching up to the first and the last frame.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .._checks import (
    MissingFrames,
    as_traces,
    check_frame_rate,
    check_nonnegative,
    check_positive,
    require_some_data,
)
from ._missing import row_chunks

__all__ = ["DeltaF", "delta_f_over_f"]

# Knots of the running percentile are laid every window_s / _KNOTS_PER_WINDOW
# (3 s for the default 60 s window): F0 is meant to follow changes slower than
# the window, so twenty knots per window resolve it with room to spare.
_KNOTS_PER_WINDOW = 20
# Passes of the lag correction of the lower envelope used for detrending.
_ENVELOPE_PASSES = 3
# The compiled order statistic keeps the smallest (rank + 1) samples of each window in a sorted buffer;
# beyond this rank (high percentiles) np.partition is used instead.
_BUFFER_RANKS = 32
# Ranks kept beyond the wanted one, so that the next window's pivot rarely falls short.
_PIVOT_MARGIN = 4
# Edges of the recording: fewest smoothed samples in a window for the local line (two on either side of its
# middle), and how exactly its slope is bisected: F0 at the edge to this fraction of the window's range.
_EDGE_MIN_SAMPLES = 4
_EDGE_PRECISION = 1e-6


@dataclass(frozen=True, eq=False)
class DeltaF:
    """Result of :func:`delta_f_over_f`.

    Attributes
    ----------
    dff : ndarray
        ΔF/F = (F − F0) / F0, same shape as the input; NaN at missing frames.
    f0 : ndarray
        The baseline F0 at every frame, same shape as the input (finite and
        positive everywhere, also at missing frames, where it is interpolated
        from the neighbouring windows).
    missing : calcium._checks.MissingFrames
        The input samples that were NaN or inf. They were left out of the
        percentile and are NaN in ``dff``.
    window_s : float
        The percentile window actually used, in seconds: the requested one,
        or the duration of the recording when the request was longer.
    percentile : float
        The percentile (0–100) used for F0.
    """

    dff: np.ndarray
    f0: np.ndarray
    missing: MissingFrames
    window_s: float
    percentile: float


@dataclass(frozen=True, eq=False)
class _Grid:
    """Where the smoothed samples and the percentile knots lie, in frames."""

    n_frames: int
    block: int              # frames per sub-block
    blocks_per_sample: int  # sub-blocks averaged into one smoothed sample (1 or 2)
    n_samples: int          # smoothed samples in the trace
    sample_frames: np.ndarray  # centre of each smoothed sample (fractional frame index)
    window: int             # smoothed samples in one percentile window
    starts: np.ndarray      # first smoothed sample of each knot's window
    knot_frames: np.ndarray  # position of each knot (fractional frame index)


def _plan_grid(n_frames: int, frame_rate: float, window_s: float, smooth_s: float) -> _Grid:
    smooth = max(1, int(round(smooth_s * frame_rate)))
    per_sample = 2 if smooth >= 2 else 1
    block = max(1, int(round(smooth / per_sample)))
    n_blocks = -(-n_frames // block)
    if n_blocks < per_sample:  # the trace is shorter than the smoothing
        per_sample = 1
    n_samples = n_blocks - per_sample + 1

    window_frames = window_s * frame_rate
    window = int(round(window_frames / block)) - (per_sample - 1)
    window = min(max(window, 1), n_samples)
    step = min(window, max(1, int(round(window_frames / _KNOTS_PER_WINDOW / block))))
    starts = np.arange(0, n_samples - window + 1, step)
    if starts[-1] != n_samples - window:
        starts = np.append(starts, n_samples - window)

    first = np.arange(n_samples) * block
    last = np.minimum(first + per_sample * block, n_frames) - 1
    centre = (first + last) / 2.0
    knot_frames = (centre[starts] + centre[starts + window - 1]) / 2.0

    return _Grid(n_frames, block, per_sample, n_samples, centre, window, starts, knot_frames)


def _block_sums(values: np.ndarray, block: int) -> np.ndarray:
    """Sums over consecutive blocks of ``block`` frames along axis 1 (the last block may be short)."""
    n_rows, n = values.shape
    n_full = n // block
    sums = values[:, :n_full * block].reshape(n_rows, n_full, block).sum(axis=-1, dtype=np.float64)
    if n_full * block < n:
        tail = values[:, n_full * block:].sum(axis=-1, keepdims=True, dtype=np.float64)
        sums = np.concatenate([sums, tail], axis=1)
    return sums


def _smoothed_samples(rows: np.ndarray, finite: np.ndarray | None, grid: _Grid) -> np.ndarray:
    """Means over ``blocks_per_sample`` consecutive sub-blocks, skipping missing frames.

    ``finite`` is None when no frame is missing. A sample with no finite
    frame is NaN.
    """
    h = grid.block
    if finite is None:
        sums = _block_sums(rows, h)
        sizes = np.minimum(h, rows.shape[1] - h * np.arange(sums.shape[1])).astype(np.float64)
        counts = np.broadcast_to(sizes, sums.shape)
    else:
        sums = _block_sums(np.where(finite, rows, 0.0), h)
        counts = _block_sums(finite, h)
    if grid.blocks_per_sample == 2:
        sums = sums[:, :-1] + sums[:, 1:]
        counts = counts[:, :-1] + counts[:, 1:]
    samples = np.full(sums.shape, np.nan)
    np.divide(sums, counts, out=samples, where=counts > 0)
    return samples


def _window_percentile(samples: np.ndarray, grid: _Grid, percentile: float) -> np.ndarray:
    """The ``percentile`` of the smoothed samples in each knot's window, skipping NaN."""
    k = grid.window
    q = percentile / 100.0 * (k - 1)
    lo = int(np.floor(q))
    hi = min(lo + 1, k - 1)
    complete = not np.isnan(samples).any()
    if complete and hi < _BUFFER_RANKS:
        # the two order statistics of every window in one compiled pass, without copying the windows
        lower = np.empty((samples.shape[0], grid.starts.size))
        upper = np.empty_like(lower)
        _low_order_pair(samples, grid.starts, k, hi, lower, upper)
        if hi == lo:
            lower = upper
        return lower + (q - lo) * (upper - lower)
    windows = samples[:, grid.starts[:, None] + np.arange(k)]  # (rows, knots, k)
    # One selection at `hi`, then the largest value below it, is about twice as fast as
    # selecting both order statistics. np.partition places NaN after every number.
    part = np.partition(windows, hi, axis=-1)
    upper = part[..., hi]
    lower = part[..., :hi].max(axis=-1) if hi > lo else upper
    knots = lower + (q - lo) * (upper - lower)
    if complete:
        return knots

    holes = np.isnan(windows)
    partial = holes.any(axis=-1)
    if partial.any():
        ordered = np.sort(windows[partial], axis=-1)  # NaN last
        n_ok = k - holes[partial].sum(axis=-1)
        qq = percentile / 100.0 * np.maximum(n_ok - 1, 0)
        lo_i = np.floor(qq).astype(np.intp)
        hi_i = np.minimum(lo_i + 1, np.maximum(n_ok - 1, 0))
        rows = np.arange(ordered.shape[0])
        value = ordered[rows, lo_i] + (qq - lo_i) * (ordered[rows, hi_i] - ordered[rows, lo_i])
        value[n_ok == 0] = np.nan
        knots[partial] = value
        # A window with no finite sample takes its value from the neighbouring knots.
        for i in np.flatnonzero(np.isnan(knots).any(axis=1)):
            ok = ~np.isnan(knots[i])
            knots[i, ~ok] = np.interp(grid.knot_frames[~ok], grid.knot_frames[ok], knots[i, ok])
    return knots


def _interpolate_knots(knots: np.ndarray, knots_at: np.ndarray, where: np.ndarray) -> np.ndarray:
    """Piecewise-linear interpolation of knot values (rows, knots), constant beyond the end knots."""
    out = np.empty((knots.shape[0], where.size))
    for row, values in zip(out, knots):
        row[:] = np.interp(where, knots_at, values)
    return out


@njit(cache=True, inline="always")
def _insert_sorted(keep, pos, x):  # pragma: no cover - compiled
    """Put x into the ascending keep[:pos + 1], whose slot ``pos`` is free (its value is dropped)."""
    while pos > 0 and keep[pos - 1] > x:
        keep[pos] = keep[pos - 1]
        pos -= 1
    keep[pos] = x


@njit(cache=True)
def _low_order_pair(samples, starts, k, rank, lower, upper):  # pragma: no cover - compiled
    """Order statistics ``rank - 1`` and ``rank`` (0-based) of the window samples[r, s:s + k] for every
    row r and window start s, into lower[r, j] and upper[r, j] (lower = upper when rank is 0).

    The windows must be free of NaN. Neighbouring windows overlap almost entirely, so the value a few
    ranks above ``rank`` in one window is a pivot for the next: the values at or below it are
    collected in one branch-free pass and sorted (a handful). When fewer than rank + 1 values are
    collected (or far too many), the window is read again keeping its smallest values in a sorted
    buffer. Either way the results are samples of the window, so they equal what a full sort (or
    np.partition) of the window gives.
    """
    m = rank + 1
    m_keep = min(m + _PIVOT_MARGIN, k)  # ranks kept: the largest of them is the next window's pivot
    keep = np.empty(k)
    for r in range(samples.shape[0]):
        row = samples[r]
        pivot = np.inf
        have_pivot = False
        for j in range(starts.shape[0]):
            s0 = starts[j]
            n = 0
            if have_pivot:
                for i in range(s0, s0 + k):
                    x = row[i]
                    keep[n] = x
                    if x <= pivot:
                        n += 1
            if have_pivot and m <= n <= 4 * m_keep:
                for a in range(1, n):  # insertion sort of the few collected values
                    _insert_sorted(keep, a, keep[a])
            else:
                # a falling window (bleaching) is read from its end: then few values enter the buffer
                forward = not row[s0 + k - 1] < row[s0]
                n = 0
                for step in range(k):
                    x = row[s0 + step] if forward else row[s0 + k - 1 - step]
                    if n < m_keep:
                        _insert_sorted(keep, n, x)
                        n += 1
                    elif x < keep[m_keep - 1]:
                        _insert_sorted(keep, m_keep - 1, x)
            upper[r, j] = keep[rank]
            lower[r, j] = keep[rank - 1] if rank > 0 else keep[rank]
            pivot = keep[min(n, m_keep) - 1]
            have_pivot = True


@njit(cache=True, inline="always")
def _frames_between(base, values, knots_at, j, slope, start, stop):  # pragma: no cover - compiled
    """F0 at the frames start..stop-1, all inside (knots_at[j], knots_at[j + 1]): np.interp's arithmetic,
    slope (t - x0) + f0, with its fallback from the other end where that is NaN."""
    v = values[j]
    knot = knots_at[j]
    if np.isfinite(slope) and np.isfinite(v):  # (then no value is NaN: no test per frame)
        for t in range(start, stop):
            base[t] = slope * (t - knot) + v
        return
    for t in range(start, stop):
        value = slope * (t - knot) + v
        if value != value:
            value = slope * (t - knots_at[j + 1]) + values[j + 1]
            if value != value and v == values[j + 1]:
                value = v
        base[t] = value


@njit(cache=True, inline="always")
def _interp_frames(values, knots_at, base, slopes):  # pragma: no cover - compiled
    """np.interp(arange(len(base)), knots_at, values) into ``base``, bit for bit (numpy's arithmetic: slope
    (f1 - f0) / (x1 - x0), then slope (x - x0) + f0; constant beyond the end knots; a knot hit exactly takes
    its value), but knot interval by knot interval: no search and no tests per frame (frame t lies in the
    interval [knots_at[j], knots_at[j + 1]) for t < ceil(knots_at[j + 1])). ``knots_at`` strictly
    increasing; ``slopes`` is scratch space of len(knots_at) - 1 or more."""
    n = base.shape[0]
    n_knots = knots_at.shape[0]
    first = values[0]
    last = values[n_knots - 1]
    if n_knots == 1:
        base[:] = first
        return
    for j in range(n_knots - 1):
        slopes[j] = (values[j + 1] - values[j]) / (knots_at[j + 1] - knots_at[j])
    i = min(n, max(0, int(math.ceil(knots_at[0]))))  # frames before the first knot take its value
    base[:i] = first
    for j in range(n_knots - 1):
        stop = min(n, max(i, int(math.ceil(knots_at[j + 1]))))
        if stop <= i:
            continue
        if i == knots_at[j]:  # a knot hit exactly takes its value
            base[i] = values[j]
            i += 1
        _frames_between(base, values, knots_at, j, slopes[j], i, stop)
        i = stop
    base[i:] = last  # at and beyond the last knot


@njit(cache=True)
def _baseline_and_dff(rows, knots, knots_at, f0, dff, lowest, floor, at_floor):  # pragma: no cover - compiled
    """F0 of every row (np.interp of the knots at the frames, see :func:`_interp_frames`) and
    ΔF/F = (F - F0) / F0, NaN where F is missing (NaN or inf).

    F0 goes into the rows of ``f0``, or, when ``f0`` has no rows, only into a scratch row (not kept).
    ``lowest`` gets each row's smallest F0 (NaN if any F0 is NaN, as ndarray.min), ``at_floor`` the
    number of its frames with F0 <= ``floor``.
    """
    n_rows, n = rows.shape
    keep = f0.shape[0] > 0
    scratch = np.empty(0 if keep else n)
    slopes = np.empty(max(knots_at.shape[0] - 1, 0))
    for r in range(n_rows):
        base = f0[r] if keep else scratch
        _interp_frames(knots[r], knots_at, base, slopes)
        raw = rows[r]
        rel = dff[r]
        for t in range(n):
            x = raw[t]
            rel[t] = (x - base[t]) / base[t] if np.isfinite(x) else np.nan
        low = np.inf
        nan = False
        count = 0
        for t in range(n):
            b = base[t]
            if b < low:
                low = b
            elif b != b:
                nan = True
            count += b <= floor
        lowest[r] = np.nan if nan else low
        at_floor[r] = count


def _percentile_knots(rows: np.ndarray, finite: np.ndarray | None, grid: _Grid,
                      percentile: float) -> tuple[np.ndarray, np.ndarray]:
    """Running-percentile baseline of ``rows`` (2-D): (knot positions in frames, values (rows, knots)).

    The knots of ``grid`` (window centres), and, when the edges of the recording lie outside the outermost
    knots, one knot at the first and one at the last frame, from a local line (:func:`_edge_values`).
    """
    samples = _smoothed_samples(rows, finite, grid)
    knots = _window_percentile(samples, grid, percentile)
    edges = _edge_values(samples, knots, grid, percentile)
    if edges is None:
        return grid.knot_frames, knots
    first, last = edges
    return (np.concatenate([[0.0], grid.knot_frames, [grid.n_frames - 1.0]]),
            np.concatenate([first[:, None], knots, last[:, None]], axis=1))


def _edge_values(samples: np.ndarray, knots: np.ndarray, grid: _Grid, percentile: float):
    """F0 at the first and at the last frame: (values at frame 0, values at the last frame), each (rows,).

    The outermost window at each end is the one of the outermost knot; in it a line is fitted to the
    smoothed samples with the ``percentile`` as its level (:func:`_quantile_line_at`), and its value at
    the edge frame is F0 there. None when there is nothing to do: a single window (the whole recording: F0
    is one constant), windows of fewer than :data:`_EDGE_MIN_SAMPLES` samples, the 0th or 100th
    percentile (an extreme sample, no level to balance), or edge frames that already are knots.
    """
    k = grid.window
    if (grid.starts.size < 2 or k < _EDGE_MIN_SAMPLES or not 0.0 < percentile < 100.0
            or not 0.0 < grid.knot_frames[0] < grid.knot_frames[-1] < grid.n_frames - 1):
        return None
    out = []
    for window, anchor, fallback in ((slice(0, k), 0.0, knots[:, 0]),
                                     (slice(grid.n_samples - k, grid.n_samples), grid.n_frames - 1.0, knots[:, -1])):
        values = samples[:, window]
        offsets = grid.sample_frames[window] - anchor  # frames from the edge
        edge = np.array(fallback, dtype=np.float64)
        holes = np.isnan(values).any(axis=1)
        whole = np.flatnonzero(~holes)
        if whole.size:
            edge[whole] = _quantile_line_at(values[whole], offsets, percentile)
        for i in np.flatnonzero(holes):  # (a missing stretch: the line through the samples that are there)
            ok = ~np.isnan(values[i])
            if np.count_nonzero(ok) >= _EDGE_MIN_SAMPLES:
                edge[i] = _quantile_line_at(values[i, ok][None], offsets[ok], percentile)[0]
        out.append(edge)
    return out


def _quantile_line_at(values: np.ndarray, offsets: np.ndarray, percentile: float, *, compiled: bool = True
                      ) -> np.ndarray:
    """Value at offset 0 of the ``percentile`` line through the points (offsets, values[r]) of each row r.

    ``offsets`` are frames from the edge, whole or half (the centres of the smoothed samples), increasing.
    The slope b balances the samples at or below the line: the m lowest residuals ``values - b * offsets``
    (m: the rank below the percentile, as np.percentile counts) lie, on average, at the mean offset of all
    samples. This is the first-order condition of the linear quantile regression of Koenker and Bassett
    (1978), found by bisection: raising b moves the lowest residuals to later offsets, so the balance rises
    with b. Samples tied with the m-th lowest residual count in proportion, and the balance is compared in
    whole numbers (offsets are multiples of half a frame), so it does not depend on the order of a sum:
    the compiled pass (:func:`_edge_slopes`) and its numpy reference (:func:`_edge_slopes_reference`) give
    the same slopes. The value at offset 0 is then the ``percentile`` of the residuals, kept within the
    range of the row's values (F0 never leaves the range of the data it came from).
    """
    n = values.shape[1]
    m = int(np.floor(percentile / 100.0 * (n - 1))) + 1
    doubled = np.rint(2.0 * offsets).astype(np.int64)
    low_value, high_value = values.min(axis=1), values.max(axis=1)
    # no slope steeper than the whole range over the closest two samples can balance anything
    steepest = (high_value - low_value) / np.min(np.diff(offsets))
    # A slope off by d moves the line's value at the edge by d times the farthest offset, and the bracket's
    # width 2 * steepest times that offset is about 2 n times the range: halve it until that is
    # _EDGE_PRECISION of the range.
    iterations = int(np.ceil(np.log2(2.0 * n / _EDGE_PRECISION)))
    if compiled:
        slopes = np.empty(values.shape[0])
        _edge_slopes(np.ascontiguousarray(values), doubled, m, iterations, steepest, slopes)
    else:
        slopes = _edge_slopes_reference(values, doubled, m, iterations, steepest)
    level = np.percentile(values - slopes[:, None] * (0.5 * doubled), percentile, axis=1)
    return np.clip(level, low_value, high_value)


def _edge_slopes_reference(values, doubled, m, iterations, steepest) -> np.ndarray:
    """numpy reference of :func:`_edge_slopes` (same arithmetic, whole rows at a time)."""
    n = values.shape[1]
    offsets = 0.5 * doubled
    total = int(doubled.sum())
    lo, hi = -steepest, steepest.copy()
    for _ in range(iterations):
        slope = 0.5 * (lo + hi)
        residual = values - slope[:, None] * offsets
        level = np.partition(residual, m - 1, axis=1)[:, m - 1:m]
        below, tied = residual < level, residual == level
        n_below, n_tied = below.sum(axis=1), tied.sum(axis=1)
        later = n * (n_tied * (below @ doubled) + (m - n_below) * (tied @ doubled)) > m * n_tied * total
        hi = np.where(later, slope, hi)
        lo = np.where(later, lo, slope)
    return 0.5 * (lo + hi)


@njit(cache=True)
def _kth_smallest(a, kth):  # pragma: no cover - compiled
    """The ``kth`` smallest value (0-based) of ``a``, reordering ``a`` (quickselect, middle pivot)."""
    left = 0
    right = a.shape[0] - 1
    while left < right:
        pivot = a[(left + right) // 2]
        i = left
        j = right
        while i <= j:
            while a[i] < pivot:
                i += 1
            while a[j] > pivot:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if kth <= j:
            right = j
        elif kth >= i:
            left = i
        else:
            return a[kth]
    return a[kth]


@njit(cache=True)
def _edge_slopes(values, doubled, m, iterations, steepest, slopes):  # pragma: no cover - compiled
    """Slopes of the edge lines of :func:`_quantile_line_at`, row by row, into ``slopes``: bisection of the
    balance of the ``m`` lowest residuals in [-steepest, steepest] (``doubled``: offsets in half frames)."""
    n_rows, n = values.shape
    residual = np.empty(n)
    scratch = np.empty(n)
    total = 0
    for i in range(n):
        total += doubled[i]
    for r in range(n_rows):
        lo = -steepest[r]
        hi = steepest[r]
        for _ in range(iterations):
            slope = 0.5 * (lo + hi)
            for i in range(n):
                residual[i] = values[r, i] - slope * (0.5 * doubled[i])
                scratch[i] = residual[i]
            level = _kth_smallest(scratch, m - 1)
            n_below = 0
            n_tied = 0
            sum_below = 0
            sum_tied = 0
            for i in range(n):
                if residual[i] < level:
                    n_below += 1
                    sum_below += doubled[i]
                elif residual[i] == level:
                    n_tied += 1
                    sum_tied += doubled[i]
            if n * (n_tied * sum_below + (m - n_below) * sum_tied) > m * n_tied * total:
                hi = slope
            else:
                lo = slope
        slopes[r] = 0.5 * (lo + hi)


def _check_baseline_args(window_s, percentile, smooth_s) -> tuple[float, float, float]:
    """Validate the settings of the running baseline (shared with detrend)."""
    window_s = check_positive(window_s, "window_s")
    percentile = check_nonnegative(percentile, "percentile")
    if percentile > 100:
        raise ValueError(f"percentile must be between 0 and 100, got {percentile!r}")
    return window_s, percentile, check_nonnegative(smooth_s, "smooth_s")


def _lower_envelope(traces: np.ndarray, frame_rate: float, *, window_s: float, percentile: float,
                    smooth_s: float):
    """Running low percentile of 2-D ``traces``, corrected for its lag on slopes.

    Internal helper of :func:`calcium.signal.detrend`; missing samples must
    be NaN/inf and every row must have a finite sample. On a falling trace
    the running percentile of a centred window reports the level reached
    later in the window (a lag of up to half a window). Each further pass
    takes the running percentile of what the envelope so far leaves
    (smoothed trace minus envelope), which is nearly flat, and adds it
    back, so the lag shrinks with every pass.

    Returns
    -------
    knot_s, knots : ndarray (knots,), ndarray (rois, knots)
        Times (s) and values of the lower envelope.
    """
    grid = _plan_grid(traces.shape[-1], frame_rate, window_s, smooth_s)
    finite = np.isfinite(traces)
    samples = _smoothed_samples(traces, None if finite.all() else finite, grid)
    knots = _window_percentile(samples, grid, percentile)
    for _ in range(_ENVELOPE_PASSES - 1):
        rest = samples - _interpolate_knots(knots, grid.knot_frames, grid.sample_frames)
        knots += _window_percentile(rest, grid, percentile)
    return grid.knot_frames / frame_rate, knots


def delta_f_over_f(raw, frame_rate, *, window_s=60.0, percentile=8.0, smooth_s=1.0, floor=None) -> DeltaF:
    """ΔF/F with a running low-percentile baseline.

    Parameters
    ----------
    raw : array_like, shape (frames,) or (rois, frames)
        Fluorescence (for example neuropil-corrected ROI traces); time is the
        last axis. NaN or inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    window_s : float, optional
        Length of the running window for the percentile, in seconds. Should
        be several times longer than the longest transient. A window longer
        than the recording is allowed: the whole recording is then one
        window and F0 is constant. The default (60 s with the 8th
        percentile) is a measurement of ours on the independent generator
        (``scripts/bench_baseline_defaults.py``: F0 within 0.7 % of the true
        baseline for sparse cells and 4.8 % for cells firing at 3 Hz, spike
        counts 1.00 and 0.97 of the truth; see docs/benchmarks.md).
    percentile : float, optional
        Which percentile (0–100) of the smoothed trace in each window is F0
        (default 8, measured with ``window_s``).
    smooth_s : float, optional
        Width of the moving average applied before the percentile, in
        seconds (0 means no smoothing). Smoothing lowers the noise that would
        otherwise pull a low percentile below the true baseline.
    floor : float, optional
        If given (> 0), F0 is clipped from below at ``floor`` instead of
        raising an error where it is <= 0.

    Returns
    -------
    DeltaF
        ``dff``, ``f0`` (both shaped like ``raw``), ``missing``, ``window_s``
        (as used) and ``percentile``.

    Raises
    ------
    ValueError
        For a bad argument, or where F0 <= 0 and no ``floor`` is given (the
        message names the ROIs and the likely fixes).
    calcium._checks.MissingDataError
        If a ROI has no finite frame at all.

    Notes
    -----
    The baseline is computed on a coarse grid rather than frame by frame;
    this is what makes it fast, and it is an approximation:

    1. The trace is cut into sub-blocks of ``smooth_s / 2`` and each pair of
       neighbouring sub-blocks is averaged: this is the moving average of
       width ``smooth_s`` sampled every ``smooth_s / 2`` (missing frames are
       skipped in the averages).
    2. The ``percentile`` is taken over the smoothed samples that fall in a
       window of ``window_s`` (within one sub-block) centred on a knot;
       knots lie every ``window_s / 20`` (3 s by default). Near the ends of
       the recording the window stays inside it, so the outermost knots lie
       half a window from the ends.
    3. At the first and the last frame, one more knot each: in the outermost
       window a line is fitted whose level is the ``percentile`` (the
       linear quantile regression of Koenker and Bassett, 1978, on that
       window: a local linear fit, whose value at the boundary does not
       carry the bias of a local constant one; Yu and Jones, 1998), and its
       value at the edge frame is F0 there. Holding the outermost knot's
       value instead left F0 a whole half window behind a bleaching
       baseline (a quarter of the light lost to bleaching: F0 at t = 0 8 to
       13 % low, and a spurious "transient" at the start of most ROIs). The edge value stays within
       the range of the window's smoothed samples. Not done when the
       recording is one window (F0 is then one constant), when a window
       holds fewer than four smoothed samples, or for the 0th and 100th
       percentile.
    4. F0 at every frame is the piecewise-linear interpolation between knots
       (between the outermost window centres it does not depend on step 3).

    Compared with an exact running percentile of a moving average at every
    frame, the percentile sees the moving average sampled every
    ``smooth_s / 2`` instead of at every frame (neighbouring values of a
    moving average are strongly correlated, so little is lost), and F0
    cannot follow changes faster than the knot spacing, which is far shorter
    than the window anyway. On simulated recordings the two agree within
    0.5 % (see tests/test_baseline.py).

    Missing frames are left out of the averages and of the percentile. A
    window without any finite frame takes F0 from its neighbouring windows.
    ``dff`` is NaN at every missing frame.

    A low percentile of a noisy trace lies below its mean baseline by
    roughly 1.4 standard deviations of the smoothed noise (for the 8th
    percentile of Gaussian noise), and during steep bleaching by a fraction
    of the drop within one window: choose ``smooth_s`` and ``window_s`` with
    that in mind.

    References
    ----------
    The running percentile of a smoothed trace as F0 is common practice. A
    closely related procedure (running minimum of a smoothed trace) is
    described in Jia H, Rochefort NL, Chen X, Konnerth A (2011), "In vivo
    two-photon imaging of sensory-evoked dendritic calcium signals in
    cortical neurons", Nature Protocols 6(1):28–35.

    The edge lines: Koenker R, Bassett G (1978), "Regression quantiles",
    Econometrica 46(1):33–50; Yu K, Jones MC (1998), "Local linear quantile
    regression", Journal of the American Statistical Association
    93(441):228–237.

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal import delta_f_over_f
    >>> raw = np.full((2, 3000), 100.0)
    >>> raw[:, 1000:1010] += 50.0            # a brief transient
    >>> result = delta_f_over_f(raw, 30.0)
    >>> float(result.f0[0, 1005]), float(result.dff[0, 1005])
    (100.0, 0.5)
    """
    x, missing, frame_rate, window_s, percentile, smooth_s, floor = _checked(raw, frame_rate, window_s, percentile,
                                                                             smooth_s, floor)
    dff, f0, _, _ = _delta_f(x, missing, frame_rate, window_s, percentile, smooth_s, floor, keep_f0=True)
    return DeltaF(dff=dff.reshape(x.shape), f0=f0.reshape(x.shape), missing=missing,
                  window_s=min(window_s, x.shape[-1] / frame_rate), percentile=percentile)


@dataclass(frozen=True, eq=False)
class RowsDeltaF:
    """Result of :func:`delta_f_over_f_rows`.

    Attributes
    ----------
    dff : ndarray, shape (rows, frames)
        ΔF/F, as :attr:`DeltaF.dff` (a single trace is one row).
    f0 : ndarray, shape (rows, frames), or None
        F0 at every frame when asked for (``keep_f0``), else None.
    f0_min : ndarray, shape (rows,)
        The smallest F0 of each row (over its frames).
    at_floor : ndarray of int, shape (rows,)
        Frames of each row whose F0 is at or below ``floor`` (all zero
        without a floor).
    """

    dff: np.ndarray
    f0: np.ndarray | None
    f0_min: np.ndarray
    at_floor: np.ndarray


def delta_f_over_f_rows(raw, frame_rate, *, keep_f0=False, window_s=60.0, percentile=8.0, smooth_s=1.0,
                        floor=None) -> RowsDeltaF:
    """:func:`delta_f_over_f` of traces as rows (one trace is one row), keeping F0 only when asked.

    The session pipeline's variant: F0 at every frame is usually not kept,
    only its lowest value and the frames clipped at the floor, so it is
    computed row by row into a scratch row instead of a second (rows,
    frames) array. ``dff`` and, with ``keep_f0``, ``f0`` are identical to
    those of :func:`delta_f_over_f` (the same computation), and ``f0_min``
    to ``f0.min(axis=1)``.

    Raises
    ------
    ValueError
        As :func:`delta_f_over_f`.
    """
    x, missing, frame_rate, window_s, percentile, smooth_s, floor = _checked(raw, frame_rate, window_s, percentile,
                                                                             smooth_s, floor)
    dff, f0, lowest, at_floor = _delta_f(x, missing, frame_rate, window_s, percentile, smooth_s, floor,
                                         keep_f0=bool(keep_f0))
    return RowsDeltaF(dff=dff, f0=f0, f0_min=lowest, at_floor=at_floor)


def _checked(raw, frame_rate, window_s, percentile, smooth_s, floor):
    """The arguments of delta_f_over_f validated: (traces, their missing frames, frame_rate, window_s,
    percentile, smooth_s, floor)."""
    frame_rate = check_frame_rate(frame_rate)
    window_s, percentile, smooth_s = _check_baseline_args(window_s, percentile, smooth_s)
    if floor is not None:
        floor = check_positive(floor, "floor")
    x = as_traces(raw, "raw")
    missing = require_some_data(x, "raw")
    return x, missing, frame_rate, window_s, percentile, smooth_s, floor


def _delta_f(x, missing, frame_rate, window_s, percentile, smooth_s, floor, *, keep_f0):
    """ΔF/F of validated traces as rows: (dff, f0 or None, lowest F0 of each row, frames at the floor)."""
    n = x.shape[-1]
    rows = x.reshape(-1, n)
    miss_rows = missing.mask.reshape(-1, n)
    grid = _plan_grid(n, frame_rate, window_s, smooth_s)
    f0 = np.empty_like(rows) if keep_f0 else np.empty((0, n))
    dff = np.empty_like(rows)
    lowest_knot = np.empty(rows.shape[0])
    lowest = np.empty(rows.shape[0])
    at_floor = np.zeros(rows.shape[0], dtype=np.int64)
    # Each knot's window is copied before the percentile: size the chunks of
    # ROIs by the larger of the trace and that copy.
    per_row = max(n, grid.starts.size * grid.window)
    # The knots of every row first (a few per window): F0 is checked before any division by it.
    parts = []
    for part in row_chunks(rows.shape[0], per_row):
        hole = miss_rows[part]
        finite = ~hole if missing.per_roi[part].any() else None
        knots_at, knots = _percentile_knots(rows[part], finite, grid, percentile)
        if floor is not None:
            np.maximum(knots, floor, out=knots)
        lowest_knot[part] = knots.min(axis=1)
        parts.append((part, knots_at, knots))
    if floor is None and not (lowest_knot > 0).all():
        raise ValueError(_non_positive_f0_message(x, lowest_knot, percentile))
    for part, knots_at, knots in parts:
        _baseline_and_dff(rows[part], knots, knots_at, f0[part] if keep_f0 else f0, dff[part], lowest[part],
                          -np.inf if floor is None else floor, at_floor[part])
    return dff, (f0 if keep_f0 else None), lowest, at_floor


def _non_positive_f0_message(x: np.ndarray, lowest_knot: np.ndarray, percentile: float) -> str:
    """Why ΔF/F is undefined: the ROIs whose F0 is <= 0 (or exactly 0, as in a dark or empty ROI) and the fixes."""
    bad = np.flatnonzero(~(lowest_knot > 0))
    where = "the trace" if x.ndim == 1 else "ROI(s) " + ", ".join(str(int(i)) for i in bad[:10])
    if bad.size > 10:
        where += f" and {bad.size - 10} more"
    rows = x.reshape(-1, x.shape[-1])
    if np.all(lowest_knot[bad] == 0):
        empty = any(not np.any(rows[i][np.isfinite(rows[i])]) for i in bad)
        what = "every frame is 0: " if empty else ""
        return (f"F0 (running percentile {percentile:g} of the smoothed trace) is exactly 0 in {where} ({what}a "
                f"ROI without signal, or too few photons), so ΔF/F is undefined there. Likely fixes: check the "
                f"ROI masks; or add a constant offset to the traces; or pass floor=<positive value> to clip F0 "
                f"from below.")
    return (f"F0 (running percentile {percentile:g} of the smoothed trace) is <= 0 in {where} (lowest F0 "
            f"{float(np.nanmin(lowest_knot[bad])):.4g}), so ΔF/F is undefined there. Likely fixes: the neuropil "
            f"factor is too large (too much neuropil was subtracted: lower it); or add a constant offset "
            f"to the traces; or pass floor=<positive value> to clip F0 from below.")
