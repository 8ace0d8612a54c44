r"""From deconvolved activity to whole spikes.

The penalised deconvolution returns a non-negative "activity" :math:`s_t`
in units of calcium (the jump the AR model makes at a frame).  To count
spikes this module

1. finds the size of one spike in those units: from the kernel when its
   single-spike ΔF/F is known (the noise-free response to one spike, run
   through the AR difference filter and averaged over the spike's position
   within the frame), otherwise from the distribution of event sizes (the
   quantal peak: the mode of a kernel density estimate of the sizes [1]_);
2. removes the shrinkage of the L1 penalty: the events are refitted without
   penalty, with non-negative sizes, on the detected support (an exact
   non-negative least-squares fit; the support restricts the AR solver);
3. merges activity split over adjacent frames into events, rounds each
   event to a whole number of spikes, and places the spikes at sub-frame
   times: the quantiles of the event's activity, shifted by the kernel's
   mean lag between a spike and its deconvolved activity.

References
----------
.. [1] Silverman, B. W. (1986). Density Estimation for Statistics and Data
   Analysis. Chapman & Hall. (kernel density estimation, bandwidth rule)
.. [2] Friedrich, J., Zhou, P. & Paninski, L. (2017). Fast online
   deconvolution of calcium imaging data. PLoS Comput. Biol. 13(3),
   e1005423. (spike sizes shrink under the L1 penalty; refit on the support)
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .._checks import check_frame_rate, check_positive
from ._driver import prepare_weights, response_energy, solve
from .ar import check_ar_coefficients

__all__ = ["SpikeUnit", "spike_unit", "quantal_size", "refit_on_support", "events_to_spikes", "activity_events",
           "event_sizes", "merge_gap_frames"]

_N_PHASES = 64
_EVENT_FRAMES = 4  # frames of deconvolved activity that make up one spike's event


@dataclass(frozen=True)
class SpikeUnit:
    """Deconvolved activity of one spike.

    Attributes
    ----------
    size : float
        Total activity (AR spike units, i.e. calcium jump) of one spike,
        averaged over the spike's position within the frame.
    lag_frames : float
        Mean delay from a spike to the centre of mass of its activity, in
        frames.
    spread : float
        Relative spread (s.d./mean) of ``size`` over positions within the
        frame.
    """

    size: float
    lag_frames: float
    spread: float


def spike_unit(kernel, frame_rate, coefficients) -> SpikeUnit:
    """Activity produced by one spike of ``kernel`` under the AR model ``coefficients``.

    The kernel's noise-free response to one spike at time ``(J - d) /
    frame_rate`` (d on a grid of 64 positions in [0, 1)) is sampled at the
    frames and passed through the AR difference filter
    :math:`s_t = c_t - \\sum_i g_i c_{t-i}`; the activity of the first four
    frames from frame J is summed.  For a kernel that the AR model
    represents exactly (a Kernel's own coefficients) this is the whole
    response.

    Parameters
    ----------
    kernel : Kernel
    frame_rate : float
    coefficients : array_like, length 1 or 2

    Returns
    -------
    SpikeUnit
    """
    return spike_unit_of(kernel, check_frame_rate(frame_rate), check_ar_coefficients(coefficients))


def spike_unit_of(kernel, frame_rate: float, g: np.ndarray) -> SpikeUnit:
    """spike_unit on checked arguments."""
    J = 2
    n = J + _EVENT_FRAMES + 2
    frames = np.arange(n)
    # all positions within the frame at once: rows are positions, columns frames
    spike = J - (np.arange(_N_PHASES) + 0.5) / _N_PHASES
    x = kernel.evaluate((frames[None, :] - spike[:, None]) / frame_rate)
    s = x.copy()
    for i, gi in enumerate(g, start=1):
        s[:, i:] -= gi * x[:, :-i]
    part = s[:, J:J + _EVENT_FRAMES]
    sizes = part.sum(axis=1)
    lags = part @ np.arange(J, J + _EVENT_FRAMES) / sizes - spike
    mean = float(sizes.sum() / sizes.size)  # (numpy's mean and std, without their dispatch)
    return SpikeUnit(size=mean, lag_frames=float(lags.sum() / lags.size), spread=_std(sizes) / mean)


def quantal_size(sizes, *, min_size, min_events=3):
    """Size of one spike from event sizes: the peak of their mass density.

    Parameters
    ----------
    sizes : array_like
        Event sizes (any units).
    min_size : float
        Events smaller than this are left out (noise).
    min_events : int, default 3
        Fewer events above ``min_size`` give None.

    Returns
    -------
    float or None
        The highest peak of a Gaussian kernel density estimate of the log
        sizes, each event weighted by its size (so that the many small
        fragments a fit leaves do not outweigh the events that carry the
        activity; Silverman's bandwidth), refined as the median of the sizes
        within 30 % of it.  If half that size is also a clear peak (at least
        30 % as high, with ``min_events`` events), the smaller one is taken:
        the largest peak can be pairs of spikes.  None if too few events.

    References
    ----------
    .. [1] Silverman, B. W. (1986). Density Estimation for Statistics and
       Data Analysis. Chapman & Hall, eq. 3.31.
    """
    sizes = np.asarray(sizes, dtype=np.float64)
    sizes = sizes[np.isfinite(sizes) & (sizes >= min_size) & (sizes > 0)]
    if sizes.size < min_events:
        return None
    logs = np.log(sizes)
    # (the quantiles and medians below are read off sorted copies: the same values as numpy's, without its
    # per-call overhead)
    ordered = np.sort(sizes)
    ordered_logs = np.sort(logs)
    upper, lower = _sorted_quantile(ordered_logs, 0.75), _sorted_quantile(ordered_logs, 0.25)
    spread = min(_std(logs), (upper - lower) / 1.34)
    if not spread > 0:
        return _sorted_median(ordered)
    bandwidth = 0.9 * spread * logs.size ** (-0.2)

    # binned estimate: size-weighted histogram of the log sizes (bins of bandwidth / 8) smoothed by the
    # Gaussian kernel
    step = bandwidth / 8.0
    lo = ordered_logs[0] - 4 * bandwidth
    n_bins = int(np.ceil((ordered_logs[-1] + 4 * bandwidth - lo) / step)) + 1
    hist = np.bincount(np.round((logs - lo) / step).astype(np.int64), weights=sizes, minlength=n_bins)
    offsets = np.arange(-32, 33)
    density = np.convolve(hist, np.exp(-0.5 * (offsets / 8.0) ** 2), mode="same")
    grid = lo + step * np.arange(n_bins)

    def mass(point):
        return float(np.interp(point, grid, density))

    def refine(mode):
        # the sizes in (0.7 mode, 1.3 mode): a slice of the sorted sizes
        near = ordered[np.searchsorted(ordered, 0.7 * mode, side="right"):
                       np.searchsorted(ordered, 1.3 * mode, side="left")]
        return (_sorted_median(near) if near.size else mode), near.size

    q, _ = refine(float(np.exp(grid[np.argmax(density)])))
    for _ in range(3):  # is the peak really pairs (or triples) of spikes?
        half, count = refine(0.5 * q)
        if count < min_events or mass(np.log(half)) < 0.3 * mass(np.log(q)):
            break
        q = half
    return q


def _sorted_quantile(ordered, q: float) -> float:
    """Quantile q of sorted values with linear interpolation: numpy's default method (Hyndman & Fan 1996,
    type 7), with numpy's rounding (the upper neighbour is the base when the weight is >= 1/2)."""
    n = ordered.size
    position = (n - 1) * q
    i = int(math.floor(position))
    weight = position - i
    below = float(ordered[i])
    above = float(ordered[min(i + 1, n - 1)])
    diff = above - below
    return above - diff * (1.0 - weight) if weight >= 0.5 else below + diff * weight


def _std(x) -> float:
    """numpy's std (population) of a 1-D array, the same operations without its dispatch."""
    d = x - x.sum() / x.size
    return math.sqrt(float((d * d).sum()) / x.size)


def _sorted_median(ordered) -> float:
    n = ordered.size
    k = n // 2
    return float(ordered[k]) if n % 2 else float((ordered[k - 1] + ordered[k]) / 2.0)


def refit_on_support(y, coefficients, support, *, baseline="fit", weights=None):
    """Non-negative least-squares fit of the spikes on a support (no penalty).

    Solves :math:`\\min \\tfrac12 \\sum_t w_t (y_t - b - c_t)^2` with
    :math:`s_t \\ge 0` and :math:`s_t = 0` outside ``support``, exactly
    (the AR solver at penalty 0 restricted to the support).

    Returns
    -------
    (calcium, spikes, baseline)
    """
    y = np.asarray(y, dtype=np.float64)
    g = check_ar_coefficients(coefficients)
    y, w, unit, _ = prepare_weights(y, weights)
    support = np.asarray(support, dtype=bool)
    if support.shape != y.shape:
        raise ValueError(f"support must have the trace's shape {y.shape}, got {support.shape}")
    c, s, b, _, _ = solve(y, w, unit, g, 0.0, baseline, 0.0, support=support, allowed=support)
    return c, s, b


def activity_events(activity, *, merge_gap=0):
    """(start, stop) frames of the events of an activity trace.

    An event is a run of frames with activity > 0; runs separated by at
    most ``merge_gap`` frames without activity are one event (the
    deconvolution can split one spike's activity over nearby frames).
    """
    starts, stops, _ = event_table(activity, merge_gap)
    return starts, stops


def event_sizes(activity, *, merge_gap=0) -> np.ndarray:
    """Total activity of each event (see :func:`activity_events`)."""
    return event_table(activity, merge_gap)[2]


def event_table(activity, merge_gap):
    activity = np.ascontiguousarray(activity, dtype=np.float64)
    size = np.count_nonzero(activity) + 1  # at least one frame with activity per event
    starts = np.empty(size, np.int64)
    stops = np.empty(size, np.int64)
    totals = np.empty(size)
    n = _event_bounds(activity, int(merge_gap), starts, stops, totals)
    return starts[:n].copy(), stops[:n].copy(), totals[:n].copy()


def merge_gap_frames(kernel, frame_rate) -> int:
    """Gap (frames) below which runs of activity count as one event: the kernel's time to peak."""
    return max(1, int(math.ceil(kernel.time_to_peak_s * frame_rate)))


def events_to_spikes(activity, frame_rate, *, lag_frames=0.0, threshold=0.5, merge_gap=1):
    """Whole spikes from activity in units of spikes.

    Parameters
    ----------
    activity : array_like, shape (T,)
        Non-negative activity, in spikes per frame (deconvolved spikes
        divided by the size of one spike).
    frame_rate : float
    lag_frames : float, default 0.0
        Mean delay from a spike to its activity (see :func:`spike_unit`).
    threshold : float, default 0.5
        An event whose total is below ``threshold`` has no spike; above it,
        the count is the total rounded to the nearest integer (at least 1).
    merge_gap : int, default 1
        Runs of activity separated by at most this many empty frames form
        one event.

    Returns
    -------
    spike_times : ndarray
        Seconds from the first frame, one entry per spike, sorted.
    spike_counts : ndarray of int, shape (T,)
        Spikes per frame (a spike at time t is in frame ``round(t *
        frame_rate)``).

    Notes
    -----
    An event is a run of adjacent frames with activity; its spikes sit at
    the quantiles ``(i - 1/2) / n`` of its activity, each frame's activity
    spread evenly over the frame's width, minus ``lag_frames``.
    """
    frame_rate = check_frame_rate(frame_rate)
    activity = np.ascontiguousarray(activity, dtype=np.float64)
    T = activity.size
    positions = _place_spikes(activity, int(merge_gap), float(threshold))
    times = np.sort(np.clip(positions - lag_frames, 0.0, (T - 1) + 0.499)) / frame_rate
    counts = np.bincount(np.clip(np.round(times * frame_rate).astype(np.int64), 0, T - 1), minlength=T)
    return times, counts.astype(np.int64, copy=False)


@njit(cache=True)
def _event_bounds(activity, merge_gap, starts, stops, totals):
    """Events of the activity (frames with activity > 0, gaps of at most merge_gap empty frames): their
    [start, stop) frames and totals; returns their number."""
    T = activity.shape[0]
    n = 0
    last = -1  # frame after the last active frame of the current event (-1: none open)
    for t in range(T):
        x = activity[t]
        if not x > 0:
            continue
        if last >= 0 and t - last <= merge_gap:
            totals[n - 1] += x
        else:
            starts[n] = t
            totals[n] = x
            n += 1
        stops[n - 1] = t + 1
        last = t + 1
    return n


@njit(cache=True)
def _place_spikes(activity, merge_gap, threshold):
    """Spike positions (in frames) of every event; see events_to_spikes."""
    size = 1
    for t in range(activity.shape[0]):
        if activity[t] != 0.0:
            size += 1  # at least one frame with activity per event
    starts = np.empty(size, np.int64)
    stops = np.empty(size, np.int64)
    totals = np.empty(size)
    n_events = _event_bounds(activity, merge_gap, starts, stops, totals)
    n_total = 0
    for e in range(n_events):
        if totals[e] >= threshold:
            n_total += max(1, int(math.floor(totals[e] + 0.5)))
    out = np.empty(n_total)
    n_out = 0
    for e in range(n_events):
        total = totals[e]
        if total < threshold:
            continue
        a = starts[e]
        b = stops[e]
        n = max(1, int(math.floor(total + 0.5)))
        # quantile (i + 1/2) / n of the activity, frame k spread evenly over [k - 1/2, k + 1/2]
        i = 0
        acc = 0.0
        for f in range(a, b):
            x = activity[f]
            if not x > 0:
                continue
            while i < n and (i + 0.5) / n * total <= acc + x:
                out[n_out] = f - 0.5 + ((i + 0.5) / n * total - acc) / x
                n_out += 1
                i += 1
            acc += x
        while i < n:  # rounding at the very end of the event
            out[n_out] = b - 0.5
            n_out += 1
            i += 1
    return out


def event_noise_size(coefficients, noise_sd: float, n_frames: int) -> float:
    """Standard deviation of the least-squares size of an isolated one-frame event in white noise."""
    g = check_ar_coefficients(coefficients)
    noise_sd = check_positive(noise_sd, "noise_sd")
    g1, g2 = float(g[0]), float(g[1]) if g.size > 1 else 0.0
    n = int(min(max(n_frames, 2), 1_000_000))
    return noise_sd / math.sqrt(response_energy(g1, g2, n))
