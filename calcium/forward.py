"""Forward model: spike times -> predicted ΔF/F, and simulated recordings.

:func:`predict_fluorescence` turns continuous spike times into the ΔF/F of
each frame exactly (sub-frame spike times, point samples or exposure
averages, optional saturation).  :func:`simulate_recording` draws spike
trains for many ROIs (:class:`SpikeModel`), passes them through the forward
model and adds the things a real recording has: a baseline with bleaching
and drift (:class:`BaselineModel`), photon shot noise and detector read
noise (:class:`NoiseModel`).

Algorithm
---------
A kernel is a sum of exponentials :math:`\\sum_i w_i e^{-t/\\tau_i}`
(:meth:`calcium.kernel.Kernel.exponential_terms`).  For one exponential the
point sample at frame time :math:`t_k` obeys the first-order recursion

.. math:: v_k = a\\,v_{k-1} + \\sum_{t_{k-1} < s \\le t_k} e^{-(t_k - s)/\\tau},
          \\qquad a = e^{-1/(\\tau f_s)},

so a spike between frames enters the first frame at or after it with its
exact sub-frame weight and then decays by :math:`a` per frame.  All terms
are advanced together in one compiled pass over the frames (numba; the
plain-Python original and a vectorised :func:`numpy.bincount` +
:func:`scipy.signal.lfilter` version are kept as references for the
tests): O(n_spikes + n_frames) work, no O(n_frames x n_spikes) sum, and each
recursion is a well-conditioned first-order filter (the terms are never
merged into one higher-order recursion).  With an exposure of length :math:`E`
the frame value is the exact mean over :math:`[t_k, t_k + E]`:
:math:`\\beta v_k` with :math:`\\beta = (\\tau/E)(1 - e^{-E/\\tau})` for spikes
before the window, plus :math:`(\\tau/E)(1 - e^{-(t_k + E - s)/\\tau})` for a
spike :math:`s` inside it.
"""
from __future__ import annotations

import dataclasses
import json
import math
import numbers
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numba import njit
from scipy.signal import lfilter

from ._checks import (_UNSET, check_choice, check_frame_rate, check_int, check_memory, check_nonnegative,
                      check_positive, json_value, renamed_argument)
from .kernel import Kernel

__all__ = ["predict_fluorescence", "simulate_recording", "SimulatedRecording", "SpikeModel", "BaselineModel",
           "NoiseModel", "SPIKE_MODELS"]

SPIKE_MODELS = ("poisson", "renewal", "bursts")
_RATE_MODULATIONS = (None, "sinusoid", "random")
# Forward-model work array size (ROIs x frames) per chunk in simulate_recording.
_CHUNK_SAMPLES = 4_000_000


# ---------------------------------------------------------------- validation
def _check_spike_times(spike_times_s, name: str = "spike_times_s") -> np.ndarray:
    try:
        times = np.asarray(spike_times_s, dtype=np.float64)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a 1-D array of times in seconds, got {spike_times_s!r}") from None
    if times.ndim > 1:
        raise ValueError(f"{name} must be 1-D (one spike train), got shape {times.shape}")
    times = times.ravel()
    bad = ~np.isfinite(times)
    if np.any(bad):
        raise ValueError(f"{name} must be finite, got {times[bad][0]!r} at index {int(np.flatnonzero(bad)[0])}")
    if np.any(times < 0):
        raise ValueError(f"{name} must be >= 0 s (seconds from the first frame), got {times[times < 0][0]!r}")
    return np.sort(times)


def _check_exposure(exposure_s, frame_rate: float):
    if exposure_s is None:
        return None
    exposure_s = check_positive(exposure_s, "exposure_s")
    if exposure_s > 1.0 / frame_rate * (1 + 1e-12):
        raise ValueError(f"exposure_s must be at most one frame interval (1/frame_rate = {1.0 / frame_rate!r} s), "
                         f"got {exposure_s!r}")
    return min(exposure_s, 1.0 / frame_rate)


def _check_scan_offset(value, frame_rate: float, name: str) -> float:
    """A scan offset: the delay of a ROI's sample within its frame, so in [0, one frame interval)."""
    offset = check_nonnegative(value, name)
    if offset >= 1.0 / frame_rate:
        raise ValueError(f"{name}={offset!r} s is not shorter than one frame interval (1/frame_rate = "
                         f"{1.0 / frame_rate:.6g} s): a scan offset is the delay of a ROI's sample within its frame; "
                         f"for a clock offset between spikes and frames, shift the spike times instead")
    return offset


def _check_kernel(kernel) -> Kernel:
    if not isinstance(kernel, Kernel):
        raise ValueError(f"kernel must be a calcium.kernel.Kernel, got {type(kernel).__name__}")
    return kernel


# ------------------------------------------------------------ forward model
def _frame_index(times, offsets, frame_rate: float, n_frames: int) -> np.ndarray:
    """Index of the first frame whose sample time ``k / frame_rate + offset`` is >= the spike (0..n_frames)."""
    k = np.ceil((times - offsets) * frame_rate).astype(np.int64)
    np.clip(k, 0, n_frames, out=k)
    # Rounding in the product above can miss by one frame; fix it with the exact frame-time formula.
    previous_at_or_after = (k > 0) & ((k - 1) / frame_rate + offsets >= times)
    k[previous_at_or_after] -= 1
    before = (k < n_frames) & (k / frame_rate + offsets < times)
    k[before] += 1
    return k


def _spike_entries(times, rows, n_frames, kernel: Kernel, frame_rate, offsets, exposure_s):
    """Where each spike enters the recursions and with what weights.

    Returns ``(enter_at, entry, inside_at, partial)``: flat indices ``row *
    n_frames + frame`` of the first frame sampled at or after each spike
    (sorted), the entry weights ``exp(-(t_k - s) / tau)`` per term (n_terms,
    n_entries), and for exposures the flat indices and summed weights of
    the spikes that fall inside a frame's window (empty without exposure).
    """
    terms = kernel.exponential_terms()
    k = _frame_index(times, offsets, frame_rate, n_frames)
    enter = k < n_frames
    enter_at = rows[enter] * n_frames + k[enter]
    enter_lag = k[enter] / frame_rate + offsets[enter] - times[enter]  # >= 0
    order = np.argsort(enter_at, kind="stable")
    enter_at, enter_lag = enter_at[order], enter_lag[order]
    entry = np.exp(-enter_lag[None, :] / np.array([tau for _, tau in terms])[:, None])
    if exposure_s is None:
        return enter_at, entry, np.empty(0, dtype=np.int64), np.empty(0)
    frame = k - 1  # the only frame whose window can contain the spike (exposure <= frame interval)
    inside = frame >= 0
    remaining = np.where(inside, frame / frame_rate + offsets + exposure_s - times, 0.0)
    inside &= remaining > 0
    remaining = remaining[inside]
    # contributions of spikes inside a window, summed over the terms: they enter only that frame
    partial = np.zeros(remaining.size)
    for weight, tau in terms:
        partial += weight * tau / exposure_s * -np.expm1(-remaining / tau)
    return enter_at, entry, rows[inside] * n_frames + frame[inside], partial


def _term_constants(kernel: Kernel, frame_rate, exposure_s):
    """Per exponential term: decay per frame, and the output gain (weight, times the window mean)."""
    decays, gains = [], []
    for weight, tau in kernel.exponential_terms():
        decays.append(math.exp(-1.0 / (tau * frame_rate)))
        gains.append(weight if exposure_s is None else weight * tau / exposure_s * -math.expm1(-exposure_s / tau))
    return np.array(decays), np.array(gains)


@njit(cache=True)
def _run_recursions(enter_at, entry, decays, gains, n_rows, n_frames):  # pragma: no cover - compiled
    """First-order recursions, one per term, over every row; output sum of gain x state per frame."""
    n_terms = decays.size
    out = np.empty(n_rows * n_frames)
    state = np.zeros(n_terms)
    p = 0
    n_entries = enter_at.size
    for row in range(n_rows):
        for j in range(n_terms):
            state[j] = 0.0
        base = row * n_frames
        for frame in range(n_frames):
            i = base + frame
            for j in range(n_terms):
                state[j] *= decays[j]
            while p < n_entries and enter_at[p] == i:
                for j in range(n_terms):
                    state[j] += entry[j, p]
                p += 1
            total = 0.0
            for j in range(n_terms):
                total += gains[j] * state[j]
            out[i] = total
    return out


def _linear_rows(times, rows, n_rows, kernel: Kernel, frame_rate, n_frames, offsets, exposure_s, *,
                 recursions=None) -> np.ndarray:
    """Summed linear response (n_rows, n_frames) of spikes ``times`` belonging to ``rows``.

    ``offsets`` holds the scan offset of each spike's row; spikes at or after
    the end of the recording must already be removed.  ``recursions`` swaps
    the compiled loop for another implementation with its signature (the
    tests pass its plain-Python original, ``_run_recursions.py_func``).
    """
    run = _run_recursions if recursions is None else recursions
    if times.size == 0:
        return np.zeros((n_rows, n_frames))
    enter_at, entry, inside_at, partial = _spike_entries(times, rows, n_frames, kernel, frame_rate, offsets,
                                                         exposure_s)
    decays, gains = _term_constants(kernel, frame_rate, exposure_s)
    out = run(enter_at, entry, decays, gains, n_rows, n_frames)
    np.add.at(out, inside_at, partial)
    return out.reshape(n_rows, n_frames)


def _linear_rows_lfilter(times, rows, n_rows, kernel: Kernel, frame_rate, n_frames, offsets,
                         exposure_s) -> np.ndarray:
    """Vectorised reference of :func:`_linear_rows`: per-frame entry sums by bincount, recursions by lfilter."""
    size = n_rows * n_frames
    out = np.zeros(size)
    if times.size == 0:
        return out.reshape(n_rows, n_frames)
    enter_at, entry, inside_at, partial = _spike_entries(times, rows, n_frames, kernel, frame_rate, offsets,
                                                         exposure_s)
    decays, gains = _term_constants(kernel, frame_rate, exposure_s)
    for j in range(decays.size):
        summed = np.bincount(enter_at, weights=entry[j], minlength=size).reshape(n_rows, n_frames)
        out += lfilter([gains[j]], [1.0, -decays[j]], summed, axis=-1).ravel()
    out += np.bincount(inside_at, weights=partial, minlength=size)
    return out.reshape(n_rows, n_frames)


def summed_response(spike_times_s, kernel: Kernel, frame_rate: float, n_frames: int) -> np.ndarray:
    """Summed linear response at the frame times ``k / frame_rate`` to spikes at any times.

    The door for callers inside the package that have validated their arguments (the kernel fit, whose
    lag-shifted spikes can fall before the first frame): spikes before frame 0 shape the first frames with
    their exact sub-frame weight, spikes at or after the end are dropped, and no argument is checked. No
    saturation and no exposure: the linear part of :func:`predict_fluorescence` with a zero scan offset.

    Parameters
    ----------
    spike_times_s : ndarray of float64, 1-D
        Spike times in seconds from the first frame, finite, any sign, any order.
    kernel : Kernel
    frame_rate : float
    n_frames : int

    Returns
    -------
    ndarray of float64, shape (n_frames,)
    """
    times = np.sort(spike_times_s)
    times = times[times < n_frames / frame_rate]
    return _linear_rows(times, np.zeros(times.size, dtype=np.int64), 1, kernel, frame_rate, n_frames,
                        np.zeros(times.size), None)[0]


def _recording_end(n_frames: int, frame_rate: float, offset) -> float:
    return n_frames / frame_rate + offset


def predict_fluorescence(spike_times_s, kernel, frame_rate, n_frames, *, scan_offset_s=0.0,
                         exposure_s=None) -> np.ndarray:
    """ΔF/F of each frame predicted from spike times.

    Parameters
    ----------
    spike_times_s : array_like, 1-D
        Spike times in seconds from the first frame (any order; equal times
        add up). Must be finite and >= 0.
    kernel : Kernel
        Single-spike response (linear part plus optional saturation).
    frame_rate : float
        Frames per second.
    n_frames : int
        Number of frames (>= 1).
    scan_offset_s : float, default 0.0
        Time of frame ``k`` is ``k / frame_rate + scan_offset_s``: the
        line-scan delay of a ROI within the frame, so ``0 <= scan_offset_s <
        1 / frame_rate`` (a larger clock offset is a shift of the spike times).
    exposure_s : float or None, default None
        None: each frame is a point sample at its frame time.  A number
        (0 < exposure_s <= 1/frame_rate): each frame is the exact mean of the
        response over ``[t_k, t_k + exposure_s]``.

    Returns
    -------
    ndarray of float64, shape (n_frames,)
        Predicted ΔF/F: the summed linear responses, then
        :meth:`Kernel.saturate` (identity for a linear kernel).

    Warns
    -----
    UserWarning
        When spikes fall at or after the end of the recording,
        ``n_frames / frame_rate + scan_offset_s``; they cannot affect any
        frame and are ignored (the warning gives their number).

    Notes
    -----
    Exact for sub-frame spike times: first-order recursions, one per
    exponential term of the kernel, fed with the exact sub-frame weight of
    each spike (see the module docstring); O(n_spikes + n_frames).

    Examples
    --------
    >>> from calcium.kernel import Kernel
    >>> k = Kernel(0.0, 1.0, 0.5)
    >>> predict_fluorescence([0.25], k, 2.0, 4).round(4)
    array([0.    , 0.3894, 0.2362, 0.1433])
    """
    times = _check_spike_times(spike_times_s)
    kernel = _check_kernel(kernel)
    frame_rate = check_frame_rate(frame_rate)
    n_frames = check_int(n_frames, "n_frames", minimum=1)
    offset = _check_scan_offset(scan_offset_s, frame_rate, "scan_offset_s")
    exposure_s = _check_exposure(exposure_s, frame_rate)
    check_memory(8.0 * n_frames * 3, f"n_frames={n_frames}", remedy="predict fewer frames")
    end = _recording_end(n_frames, frame_rate, offset)
    late = times >= end
    if np.any(late):
        warnings.warn(f"{int(late.sum())} spike time(s) at or after the end of the recording ({end:.6g} s = "
                      f"n_frames / frame_rate + scan_offset_s) were ignored", UserWarning, stacklevel=2)
        times = times[~late]
    linear = _linear_rows(times, np.zeros(times.size, dtype=np.int64), 1, kernel, frame_rate, n_frames,
                          np.full(times.size, offset), exposure_s)[0]
    return kernel.saturate(linear)


def _predict_direct(spike_times_s, kernel: Kernel, frame_rate, n_frames, *, scan_offset_s=0.0) -> np.ndarray:
    """Plain reference: sum the closed-form kernel of every spike at every frame (O(n_frames x n_spikes)).

    Point samples only; kept for the tests of :func:`predict_fluorescence`.
    """
    frame_times = np.arange(n_frames) / frame_rate + scan_offset_s
    linear = np.zeros(n_frames)
    for s in np.asarray(spike_times_s, dtype=np.float64):
        linear += kernel.evaluate(frame_times - s)
    return kernel.saturate(linear)


# ------------------------------------------------------------ slow drift and spike trains
def _per_roi(value, name: str, n_rois: int, check) -> np.ndarray:
    """A scalar or one value per ROI, validated by ``check(value, name)``."""
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        return np.full(n_rois, check(value, name))
    arr = np.asarray(value, dtype=np.float64)
    if arr.shape != (n_rois,):
        raise ValueError(f"{name} must be a number or one number per ROI (shape ({n_rois},)), got shape {arr.shape}")
    return np.array([check(float(v), f"{name}[{i}]") for i, v in enumerate(arr)])


def _slow_drift(rng, n_steps: int, decay_per_step: float) -> np.ndarray:
    """A unit-variance Ornstein-Uhlenbeck process sampled at ``n_steps`` equal steps, started at equilibrium.

    Sampled exactly, the process is the AR(1) recursion ``z[k] = a z[k-1] + sqrt(1 - a**2) e[k]`` with ``a =
    decay_per_step = exp(-step / tau)`` and ``e`` standard normal (Uhlenbeck & Ornstein 1930); the first value is
    drawn from the stationary distribution (unit variance). The slow rate modulation and the baseline drift of
    :func:`simulate_recording` both use it, each computing ``a`` for its own step.
    """
    scale = math.sqrt(1.0 - decay_per_step * decay_per_step)
    shocks = rng.standard_normal(n_steps)
    shocks[0] /= scale  # start in the stationary distribution
    return lfilter([scale], [1.0, -decay_per_step], shocks)


def _rate_profile(rng, rate, duration_s, frame_rate, modulation, depth, period_s):
    """Piecewise-constant rate: (bin edges in s, cumulative expected count at the edges)."""
    if modulation is None:
        return None
    dt = min(1.0 / frame_rate, period_s / 32.0)
    n_bins = max(1, int(math.ceil(duration_s / dt)))
    edges = np.minimum(np.arange(n_bins + 1) * dt, duration_s)
    centres = 0.5 * (edges[:-1] + edges[1:])
    if modulation == "sinusoid":
        phase = rng.uniform(0.0, 2 * math.pi)
        lam = rate * (1.0 + depth * np.sin(2 * math.pi * centres / period_s + phase))
    else:  # "random": log-normal rate driven by a unit-variance Ornstein-Uhlenbeck process
        z = _slow_drift(rng, n_bins, math.exp(-dt / period_s))
        lam = rate * np.exp(depth * z - 0.5 * depth * depth)
    cumulative = np.concatenate(([0.0], np.cumsum(lam * np.diff(edges))))
    return edges, cumulative


def _to_real_time(operational, rate, profile):
    """Map times of the unit-rate (operational) clock back to seconds (time-rescaling)."""
    if profile is None:
        return operational / rate
    edges, cumulative = profile
    return np.interp(operational, cumulative, edges)


def _operational_span(rate, duration_s, profile) -> float:
    return rate * duration_s if profile is None else float(profile[1][-1])


def _renewal_events(rng, span, refractory, shape):
    """Events of a stationary renewal process with unit mean interval on [0, span)."""
    burn_in = 20.0  # mean intervals run before 0 so that the train starts near equilibrium
    total = span + burn_in
    events = []
    start = -burn_in
    while True:
        n_draw = int(total + 6 * math.sqrt(total) + 16)
        intervals = refractory + rng.gamma(shape, (1.0 - refractory) / shape, size=n_draw)
        times = start + np.cumsum(intervals)
        events.append(times)
        if times[-1] >= span:
            break
        start, total = times[-1], span - times[-1]
    times = np.concatenate(events)
    return times[(times >= 0) & (times < span)]


def _spike_train(rng, spikes: "SpikeModel", rate: float, duration_s: float, frame_rate: float) -> np.ndarray:
    """One ROI's spike times in [0, duration_s) under ``spikes``, at mean rate ``rate``."""
    if rate == 0:
        return np.empty(0)
    profile = _rate_profile(rng, rate, duration_s, frame_rate, spikes.rate_modulation, spikes.rate_modulation_depth,
                            spikes.rate_modulation_period_s)
    span = _operational_span(rate, duration_s, profile)
    if spikes.spike_model == "poisson":
        operational = np.sort(rng.uniform(0.0, span, size=rng.poisson(span)))
        times = _to_real_time(operational, rate, profile)
    elif spikes.spike_model == "renewal":
        operational = _renewal_events(rng, span, spikes.refractory_s * rate, spikes.isi_shape)
        times = _to_real_time(operational, rate, profile)
    else:  # bursts: burst onsets are Poisson at rate / burst_size_mean; spikes every burst_isi_s within a burst
        operational = np.sort(rng.uniform(0.0, span, size=rng.poisson(span / spikes.burst_size_mean)))
        onsets = _to_real_time(operational, rate, profile)
        sizes = 1 + rng.poisson(spikes.burst_size_mean - 1.0, size=onsets.size)
        which = np.repeat(np.arange(onsets.size), sizes)
        position = np.arange(which.size) - np.repeat(np.cumsum(sizes) - sizes, sizes)
        times = np.sort(onsets[which] + position * spikes.burst_isi_s)
    return times[times < duration_s]


# ------------------------------------------------------------ parameter objects
def _short_repr(value, limit: int = 60) -> str:
    """``repr(value)``, cut to ``limit`` characters (a per-ROI array in a message)."""
    text = repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _checked(check, value, owner: str, name: str, remedy: str):
    """``check(value, "owner.name")``, its ValueError completed with a remedy."""
    try:
        return check(value, f"{owner}.{name}")
    except ValueError as error:
        raise ValueError(f"{error}; {remedy}") from None


def _one_or_per_roi(value, owner: str, name: str, check, remedy: str):
    """A number (returned as float) or one number per ROI (returned as a tuple of floats), each checked."""
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        return _checked(check, value, owner, name, remedy)
    try:
        values = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        values = None
    if values is None or values.ndim != 1 or values.size == 0:
        shape = "" if values is None else f" of shape {values.shape}"
        raise ValueError(f"{owner}.{name} must be a number or a 1-D sequence with one number per ROI, got "
                         f"{_short_repr(value)}{shape}; {remedy}")
    return tuple(_checked(check, float(v), owner, f"{name}[{i}]", remedy) for i, v in enumerate(values))


def _check_fields(instance, rules: dict) -> None:
    """Check and normalise, in place, the fields of a frozen parameter object named in ``rules``.

    ``rules`` maps a field name to ``(check, remedy, kind)``: ``check(value, name)`` from :mod:`calcium._checks`,
    the remedy its error message ends with, and ``kind`` ``"number"``, ``"optional"`` (None or a number) or
    ``"per_roi"`` (a number or one per ROI, see :func:`_one_or_per_roi`).
    """
    owner = type(instance).__name__
    for name, (check, remedy, kind) in rules.items():
        value = getattr(instance, name)
        if kind == "per_roi":
            value = _one_or_per_roi(value, owner, name, check, remedy)
        elif value is not None or kind != "optional":
            value = _checked(check, value, owner, name, remedy)
        object.__setattr__(instance, name, value)


def _for_each_roi(value, name: str, n_rois: int) -> np.ndarray:
    """A validated number or per-ROI tuple of a parameter object as one float64 value per ROI."""
    if isinstance(value, float):
        return np.full(n_rois, value)
    if len(value) != n_rois:
        raise ValueError(f"{name} has {len(value)} values but n_rois={n_rois}: give one number for every ROI or "
                         f"exactly {n_rois} numbers, one per ROI")
    return np.array(value)


_SPIKE_FIELDS = {
    "rate_hz": (check_nonnegative, "give a mean firing rate in spikes per second (0 for a silent ROI)", "per_roi"),
    "refractory_s": (check_nonnegative, "give the renewal model's dead time in seconds, e.g. 0.002", "number"),
    "isi_shape": (check_positive, "give the gamma shape of the intervals (1: dead-time Poisson; larger: more "
                                  "regular)", "number"),
    "burst_size_mean": (check_positive, "give the mean number of spikes per burst, >= 1", "number"),
    "burst_isi_s": (check_positive, "give the interval between spikes of a burst in seconds, e.g. 0.01", "number"),
    "rate_modulation_depth": (check_nonnegative, "give the relative depth of the modulation (0: none)", "number"),
    "rate_modulation_period_s": (check_positive, "give the period (sinusoid) or time constant (random) of the "
                                                 "modulation in seconds", "number"),
}


@dataclass(frozen=True)
class SpikeModel:
    """How :func:`simulate_recording` draws each ROI's spike train.

    Validated when made: a bad field raises ValueError naming it, its value and what to give instead.

    Attributes
    ----------
    rate_hz : float or tuple of float, default 1.0
        Mean firing rate in spikes per second (>= 0): one number for every
        ROI, or one per ROI (any 1-D sequence; stored as a tuple).
    spike_model : {"poisson", "renewal", "bursts"}, default "poisson"
        ``"poisson"``: Poisson process.  ``"renewal"``: intervals are a dead
        time ``refractory_s`` plus a gamma variable of shape ``isi_shape``
        (``isi_shape=1``: dead-time Poisson), mean interval ``1/rate_hz``.
        ``"bursts"``: burst onsets form a Poisson process of rate ``rate_hz
        / burst_size_mean``; a burst has ``1 + Poisson(burst_size_mean - 1)``
        spikes ``burst_isi_s`` apart.
    refractory_s : float, default 0.002
        Dead time of the renewal model (>= 0, ``refractory_s * rate_hz < 1``).
    isi_shape : float, default 1.0
        Gamma shape of the renewal model (> 0); the interval CV is
        ``(1 - refractory_s rate_hz) / sqrt(isi_shape)``.
    burst_size_mean : float, default 3.0
        Mean spikes per burst (>= 1 for ``"bursts"``, > 0 otherwise).
    burst_isi_s : float, default 0.01
        Interval between spikes within a burst (> 0).
    rate_modulation : {None, "sinusoid", "random"}, default None
        Slow modulation of the rate: ``"sinusoid"``: ``rate (1 + depth sin(2
        pi t / period + phase))`` with a random phase per ROI (depth in
        [0, 1]); ``"random"``: ``rate exp(depth z(t) - depth**2 / 2)``, z a
        unit-variance Ornstein-Uhlenbeck process [2]_ with time constant
        ``period`` (depth = s.d. of the log rate).  Applied by
        time-rescaling [1]_: the renewal dead time and the burst onsets
        follow the local rate.
    rate_modulation_depth : float, default 0.5
        ``depth`` above (>= 0; <= 1 for ``"sinusoid"``).
    rate_modulation_period_s : float, default 10.0
        ``period`` above, in seconds (> 0).

    References
    ----------
    .. [1] Brown, E. N., Barbieri, R., Ventura, V., Kass, R. E. & Frank, L. M.
       (2002). The time-rescaling theorem and its application to neural
       spike train data analysis. Neural Comput. 14, 325-346.
    .. [2] Uhlenbeck, G. E. & Ornstein, L. S. (1930). On the theory of the
       Brownian motion. Phys. Rev. 36, 823-841.

    Examples
    --------
    >>> SpikeModel(rate_hz=[0.5, 2.0], spike_model="bursts").rate_hz
    (0.5, 2.0)
    """

    rate_hz: float | tuple[float, ...] = 1.0
    spike_model: str = "poisson"
    refractory_s: float = 0.002
    isi_shape: float = 1.0
    burst_size_mean: float = 3.0
    burst_isi_s: float = 0.01
    rate_modulation: str | None = None
    rate_modulation_depth: float = 0.5
    rate_modulation_period_s: float = 10.0

    def __post_init__(self):
        owner = type(self).__name__
        check_choice(self.spike_model, f"{owner}.spike_model", SPIKE_MODELS)
        check_choice(self.rate_modulation, f"{owner}.rate_modulation", _RATE_MODULATIONS)
        _check_fields(self, _SPIKE_FIELDS)
        top_rate = max(self.rate_hz) if isinstance(self.rate_hz, tuple) else self.rate_hz
        if self.spike_model == "renewal" and self.refractory_s * top_rate >= 1.0:
            raise ValueError(f"{owner}: refractory_s * rate_hz must be < 1 for the renewal model, got refractory_s="
                             f"{self.refractory_s!r} with rate_hz up to {top_rate!r}; give a shorter refractory_s "
                             f"or a lower rate_hz (the dead time alone would fill every interval)")
        if self.spike_model == "bursts" and self.burst_size_mean < 1.0:
            raise ValueError(f"{owner}.burst_size_mean must be >= 1 for the bursts model (a burst has at least one "
                             f"spike), got {self.burst_size_mean!r}")
        if self.rate_modulation == "sinusoid" and self.rate_modulation_depth > 1.0:
            raise ValueError(f"{owner}.rate_modulation_depth must be in [0, 1] for a sinusoid (the rate would go "
                             f"below 0), got {self.rate_modulation_depth!r}; use rate_modulation='random' for "
                             f"deeper, log-normal changes")


_BASELINE_FIELDS = {
    "f0": (check_positive, "give the resting fluorescence in raw units (> 0), e.g. 100", "per_roi"),
    "bleach_fraction": (check_nonnegative, "give the fraction of the baseline lost in the long run, in [0, 1)",
                        "number"),
    "bleach_tau_s": (check_positive, "give the bleaching time constant in seconds, e.g. 600", "number"),
    "drift_sd": (check_nonnegative, "give the s.d. of the multiplicative drift (0: none)", "number"),
    "drift_tau_s": (check_positive, "give the drift's time constant in seconds, e.g. 60", "number"),
}


@dataclass(frozen=True)
class BaselineModel:
    """The baseline fluorescence F0 of each simulated ROI: a start, bleaching and a slow drift.

    ``F0(t) = f0 (1 - b + b exp(-t / bleach_tau_s)) exp(drift_sd z(t))``, b = ``bleach_fraction``, z a
    unit-variance Ornstein-Uhlenbeck process [1]_ with time constant ``drift_tau_s``. Validated when made.

    Attributes
    ----------
    f0 : float or tuple of float, default 100.0
        Baseline fluorescence at the start (raw units, > 0): one number, or
        one per ROI (any 1-D sequence; stored as a tuple).
    bleach_fraction : float, default 0.0
        Fraction of the baseline lost to bleaching in the long run, in
        [0, 1).
    bleach_tau_s : float, default 600.0
        Time constant of the bleaching in seconds (> 0).
    drift_sd : float, default 0.0
        S.d. of the slow multiplicative drift (>= 0; 0: none).
    drift_tau_s : float, default 60.0
        Time constant of the drift in seconds (> 0).

    References
    ----------
    .. [1] Uhlenbeck, G. E. & Ornstein, L. S. (1930). On the theory of the
       Brownian motion. Phys. Rev. 36, 823-841.
    """

    f0: float | tuple[float, ...] = 100.0
    bleach_fraction: float = 0.0
    bleach_tau_s: float = 600.0
    drift_sd: float = 0.0
    drift_tau_s: float = 60.0

    def __post_init__(self):
        _check_fields(self, _BASELINE_FIELDS)
        if self.bleach_fraction >= 1.0:
            raise ValueError(f"{type(self).__name__}.bleach_fraction must be in [0, 1), got {self.bleach_fraction!r};"
                             f" a fraction of 1 would bleach the baseline to zero (ΔF/F undefined): give less, "
                             f"e.g. 0.5")


_NOISE_FIELDS = {
    "photons_per_frame": (check_positive, "give the photons detected per frame at the starting baseline, or None "
                                          "for no shot noise", "optional"),
    "read_noise_sd": (check_nonnegative, "give the detector noise s.d. in raw units (0: none)", "number"),
    "noise_sd": (check_nonnegative, "give the Gaussian noise s.d. in ΔF/F units, or None", "optional"),
}


@dataclass(frozen=True)
class NoiseModel:
    """The measurement noise added to the noise-free fluorescence: shot noise or Gaussian ΔF/F noise, read noise.

    Validated when made. With every field at its default the recording has no noise.

    Attributes
    ----------
    photons_per_frame : float or None, default None
        Detected photons per frame at the starting baseline (> 0).  Photon
        counts are Poisson with mean ``photons_per_frame F / f0`` (F the
        noise-free fluorescence) and are scaled by ``f0 /
        photons_per_frame`` into raw units.  Excludes ``noise_sd``.
    read_noise_sd : float, default 0.0
        S.d. of additive Gaussian detector noise, in raw units (>= 0).
    noise_sd : float or None, default None
        Alternative to a photon budget: Gaussian noise with this s.d. in
        ΔF/F units (``F0 noise_sd`` in raw units; >= 0).
    """

    photons_per_frame: float | None = None
    read_noise_sd: float = 0.0
    noise_sd: float | None = None

    def __post_init__(self):
        owner = type(self).__name__
        if self.photons_per_frame is not None and self.noise_sd is not None:
            raise ValueError(f"{owner}: give either photons_per_frame={self.photons_per_frame!r} (shot noise) or "
                             f"noise_sd={self.noise_sd!r} (Gaussian ΔF/F noise), not both; leave the other as None")
        _check_fields(self, _NOISE_FIELDS)


# The keywords simulate_recording took before the parameter objects, kept for one release: each is now the
# field of the same name of one object.
_MODEL_OF_ARGUMENT = {"spikes": SpikeModel, "baseline": BaselineModel, "noise": NoiseModel}
_FORMER_KEYWORDS = {field.name: argument for argument, model in _MODEL_OF_ARGUMENT.items()
                    for field in dataclasses.fields(model)}


def _models_from_former_keywords(former: dict, given: dict) -> dict:
    """The parameter objects, those missing from ``given`` built from the former keywords (with a warning)."""
    unknown = [name for name in former if name not in _FORMER_KEYWORDS]
    if unknown:
        raise TypeError(f"simulate_recording() got an unexpected keyword argument {unknown[0]!r}")
    models = dict(given)
    for argument, model in _MODEL_OF_ARGUMENT.items():
        names = [name for name in former if _FORMER_KEYWORDS[name] == argument]
        if not names:
            continue
        fields = ", ".join(f"{name}={_short_repr(former[name])}" for name in names)
        if models[argument] is not None:
            raise ValueError(f"simulate_recording got {argument}={_short_repr(models[argument])} and also {fields}: "
                             f"give these inside {argument}={model.__name__}(...) only")
        which = f"the keyword {names[0]} of simulate_recording is" if len(names) == 1 else \
            f"the keywords {', '.join(names)} of simulate_recording are"
        warnings.warn(f"{which} deprecated and will be removed in the next release; pass {argument}={model.__name__}({fields}) instead "
                      f"(calcium.forward.{model.__name__})", DeprecationWarning, stacklevel=3)
        models[argument] = model(**{name: former[name] for name in names})
    return {argument: (model() if models[argument] is None else models[argument])
            for argument, model in _MODEL_OF_ARGUMENT.items()}


def _check_model(value, argument: str, model):
    if not isinstance(value, model):
        raise ValueError(f"{argument} must be a calcium.forward.{model.__name__}, got {type(value).__name__}: "
                         f"pass {argument}={model.__name__}(...)")
    return value


# ------------------------------------------------------------ simulation
# Bookkeeping per simulated ROI besides its rows: two seed streams (about 1.2 kB at their peak, measured with
# tracemalloc over 20,000 ROIs) and the spike-time array object, rounded up.
_BYTES_PER_ROI = 2048


def _check_simulation_memory(n_rois: int, n_frames: int, duration_s: float, rate_hz) -> None:
    """Refuse, before anything is allocated, a simulation whose arrays exceed the available memory."""
    mean_rate = float(np.mean(rate_hz))  # (validated by SpikeModel: finite, >= 0)
    n_bytes = (4 * 8.0 * n_rois * n_frames + _BYTES_PER_ROI * n_rois + 8.0 * mean_rate * duration_s * n_rois
               + 8.0 * _CHUNK_SAMPLES)
    check_memory(n_bytes, f"simulate_recording with n_rois={n_rois} x {n_frames} frames",
                 remedy="simulate fewer ROIs or a shorter recording, or in parts (each ROI depends only on "
                        "the seed, not on n_rois)")


@dataclass(frozen=True)
class SimulatedRecording:
    """A simulated recording with its ground truth.

    Attributes
    ----------
    raw : ndarray of float64, shape (rois, frames)
        Raw fluorescence with noise, in the units of ``f0`` (photon counts
        times ``f0 / photons_per_frame`` when a photon budget is given).
    dff : ndarray of float64, shape (rois, frames)
        Noisy ΔF/F relative to the true baseline: ``raw / f0 - 1``.
    dff_clean : ndarray of float64, shape (rois, frames)
        Noise-free ΔF/F: the forward model of ``spike_times``.
    f0 : ndarray of float64, shape (rois, frames)
        True baseline fluorescence, including bleaching and drift.
    spike_times : list of ndarray
        True spike times in seconds, one sorted array per ROI.
    frame_rate : float
        Frames per second.
    kernel : Kernel
        Single-spike response used.
    params : dict
        Every parameter of :func:`simulate_recording`, the fields of its
        ``spikes``, ``baseline`` and ``noise`` objects under their own names
        (JSON-serialisable; tuples as lists), and ``n_frames``, ``kernel``
        (:meth:`Kernel.to_dict`) and ``kernel_description``.
    """

    raw: np.ndarray
    dff: np.ndarray
    dff_clean: np.ndarray
    f0: np.ndarray
    spike_times: list
    frame_rate: float
    kernel: Kernel
    params: dict

    @property
    def n_rois(self) -> int:
        return self.raw.shape[0]

    @property
    def n_frames(self) -> int:
        return self.raw.shape[1]

    @property
    def duration_s(self) -> float:
        return self.n_frames / self.frame_rate

    def save(self, folder) -> dict:
        """Write the recording to ``folder`` (created if needed).

        Files: ``raw.h5``, ``dff.h5``, ``dff_clean.h5`` and ``f0.h5`` (HDF5,
        dataset ``traces``, attribute ``frame_rate``; readable with
        :func:`calcium.io.read_traces`), ``spikes.csv`` (``roi,time_s,count``,
        :func:`calcium.io.write_spike_table`) and ``parameters.json`` (the
        ``params`` dict).  Each file is written atomically.

        Returns
        -------
        dict of str -> pathlib.Path
            The files written: keys ``raw``, ``dff``, ``dff_clean``, ``f0``,
            ``spikes`` and ``parameters``.
        """
        from .io import atomic_output, write_spike_table, write_traces

        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        written = {}
        for name in ("raw", "dff", "dff_clean", "f0"):
            written[name] = write_traces(folder / f"{name}.h5", getattr(self, name), frame_rate=self.frame_rate)
        written["spikes"] = write_spike_table(folder / "spikes.csv", dict(enumerate(self.spike_times)))
        written["parameters"] = folder / "parameters.json"
        with atomic_output(written["parameters"]) as tmp:
            tmp.write_text(json.dumps(self.params, indent=2, sort_keys=True) + "\n", encoding="utf-8")
        return written


def simulate_recording(n_rois, duration_s, frame_rate, *, kernel=None, indicator=None, spikes=None, baseline=None,
                       noise=None, scan_offset_s=_UNSET, exposure_s=None, seed=0, scan_offsets=_UNSET,
                       **former_keywords) -> SimulatedRecording:
    """Simulate fluorescence traces of many ROIs with known spike times.

    Parameters
    ----------
    n_rois : int
        Number of ROIs (>= 1).
    duration_s : float
        Length of the recording in seconds; ``n_frames = round(duration_s *
        frame_rate)`` (>= 1).
    frame_rate : float
        Frames per second.
    kernel : Kernel, optional
        Single-spike response.  Give at most one of ``kernel`` and
        ``indicator``; with neither, the tabulated GCaMP6s kernel is used.
    indicator : str, optional
        Indicator name for :meth:`Kernel.from_indicator`.
    spikes : SpikeModel, optional
        How each ROI's spikes are drawn (rate, point process, bursts, slow
        rate modulation); default ``SpikeModel()``: Poisson at 1 Hz.
    baseline : BaselineModel, optional
        Baseline fluorescence, bleaching and slow drift; default
        ``BaselineModel()``: a constant F0 of 100.
    noise : NoiseModel, optional
        Shot noise or Gaussian ΔF/F noise, and read noise; default
        ``NoiseModel()``: none.
    scan_offset_s : float or array_like (n_rois,), default 0.0
        Sample time of frame k for each ROI is ``k / frame_rate + offset``,
        with ``0 <= offset < 1 / frame_rate`` (a delay within the frame),
        as :func:`predict_fluorescence` names it. ``scan_offsets`` is its
        former name, accepted for one release (with a DeprecationWarning).
    exposure_s : float, optional
        Exposure of each frame (see :func:`predict_fluorescence`).
    seed : int, default 0
        Seed of :class:`numpy.random.SeedSequence`; each ROI gets its own
        child streams (one for spikes, one for baseline drift and noise), so
        ROI i does not depend on ``n_rois`` and the spikes do not depend on
        the baseline or noise settings.
    **former_keywords
        Deprecated, kept for one release: the fields of :class:`SpikeModel`,
        :class:`BaselineModel` and :class:`NoiseModel` given as keywords,
        as before (``rate_hz=``, ``spike_model=``, ``f0=``, ``noise_sd=``,
        ...).  They build the object they belong to, with a
        DeprecationWarning naming it, and give the same recording; they
        cannot be combined with that object.

    Returns
    -------
    SimulatedRecording

    Raises
    ------
    ValueError
        Bad arguments, naming them; a per-ROI field of ``spikes`` or
        ``baseline`` whose length is not ``n_rois``; and a request whose
        arrays would not fit in the memory available (estimated before
        anything is allocated: four float64 arrays of ``n_rois x n_frames``,
        the expected spike times and about 2 kB per ROI of bookkeeping,
        measured).

    Notes
    -----
    The noise-free fluorescence of a ROI is ``F0(t) (1 + dff_clean(t))``,
    ``dff_clean`` the forward model of its spikes
    (:func:`predict_fluorescence`, with saturation), F0 from ``baseline``;
    ``noise`` is then added to it.  The slow rate modulation and the
    baseline drift are the same unit-variance Ornstein-Uhlenbeck process
    [1]_, sampled exactly (each with its own time constant and step).

    References
    ----------
    .. [1] Uhlenbeck, G. E. & Ornstein, L. S. (1930). On the theory of the
       Brownian motion. Phys. Rev. 36, 823-841.

    Examples
    --------
    >>> rec = simulate_recording(2, 10.0, 30.0, indicator="GCaMP6f", spikes=SpikeModel(rate_hz=2.0),
    ...                          noise=NoiseModel(noise_sd=0.05), seed=1)
    >>> rec.raw.shape
    (2, 300)
    """
    models = _models_from_former_keywords(former_keywords, {"spikes": spikes, "baseline": baseline, "noise": noise})
    spikes = _check_model(models["spikes"], "spikes", SpikeModel)
    baseline = _check_model(models["baseline"], "baseline", BaselineModel)
    noise = _check_model(models["noise"], "noise", NoiseModel)
    scan_offset_s = renamed_argument("scan_offsets", scan_offsets, "scan_offset_s", scan_offset_s)
    scan_offset_s = 0.0 if scan_offset_s is _UNSET else scan_offset_s
    params = {"n_rois": n_rois, "duration_s": duration_s, "frame_rate": frame_rate, "indicator": indicator}
    for model in (spikes, baseline, noise):
        params.update({field.name: getattr(model, field.name) for field in dataclasses.fields(model)})
    params.update(former_keywords)  # (a deprecated keyword is recorded as given, as it was before the objects)
    params.update(scan_offset_s=scan_offset_s, exposure_s=exposure_s, seed=seed)
    params = {key: json_value(list(value) if isinstance(value, tuple) else value) for key, value in params.items()}

    n_rois = check_int(n_rois, "n_rois", minimum=1)
    duration_s = check_positive(duration_s, "duration_s")
    frame_rate = check_frame_rate(frame_rate)
    n_frames = int(round(duration_s * frame_rate))
    if n_frames < 1:
        raise ValueError(f"duration_s * frame_rate must give at least one frame, got {duration_s * frame_rate!r}")
    _check_simulation_memory(n_rois, n_frames, duration_s, spikes.rate_hz)
    if kernel is not None and indicator is not None:
        raise ValueError("give either kernel or indicator, not both")
    if kernel is None:
        kernel = Kernel.from_indicator(indicator if indicator is not None else "GCaMP6s")
    kernel = _check_kernel(kernel)
    rates = _for_each_roi(spikes.rate_hz, "spikes.rate_hz", n_rois)
    f0_start = _for_each_roi(baseline.f0, "baseline.f0", n_rois)
    offsets = _per_roi(scan_offset_s, "scan_offset_s", n_rois,
                       lambda value, name: _check_scan_offset(value, frame_rate, name))
    exposure_s = _check_exposure(exposure_s, frame_rate)
    seed = check_int(seed, "seed", minimum=0)
    params.update(n_frames=n_frames, kernel=kernel.to_dict(), kernel_description=str(kernel))

    streams = [child.spawn(2) for child in np.random.SeedSequence(seed).spawn(n_rois)]
    recording_s = n_frames / frame_rate
    spike_times = []
    for roi in range(n_rois):
        rng = np.random.default_rng(streams[roi][0])
        spike_times.append(_spike_train(rng, spikes, float(rates[roi]), recording_s, frame_rate))

    raw = np.empty((n_rois, n_frames))
    dff = np.empty((n_rois, n_frames))
    dff_clean = np.empty((n_rois, n_frames))
    f0_true = np.empty((n_rois, n_frames))
    chunk = max(1, _CHUNK_SAMPLES // n_frames)
    for start in range(0, n_rois, chunk):
        stop = min(n_rois, start + chunk)
        trains = spike_times[start:stop]
        times = np.concatenate(trains) if trains else np.empty(0)
        rows = np.repeat(np.arange(stop - start), [t.size for t in trains])
        linear = _linear_rows(times, rows, stop - start, kernel, frame_rate, n_frames,
                              offsets[start:stop][rows], exposure_s)
        dff_clean[start:stop] = kernel.saturate(linear)
    del linear
    frame_times = np.arange(n_frames) / frame_rate
    bleach = (1.0 - baseline.bleach_fraction
              + baseline.bleach_fraction * np.exp(-frame_times / baseline.bleach_tau_s))
    drift_a = math.exp(-1.0 / (baseline.drift_tau_s * frame_rate))
    photons, noise_sd = noise.photons_per_frame, noise.noise_sd
    for roi in range(n_rois):
        rng = np.random.default_rng(streams[roi][1])
        f0_row = f0_start[roi] * bleach
        if baseline.drift_sd > 0:
            f0_row = f0_row * np.exp(baseline.drift_sd * _slow_drift(rng, n_frames, drift_a))
        f0_true[roi] = f0_row
        clean = f0_row * (1.0 + dff_clean[roi])
        if photons is not None:
            counts = rng.poisson(photons / f0_start[roi] * clean)
            row = counts * (f0_start[roi] / photons)
        elif noise_sd is not None:
            row = clean + (noise_sd * f0_row) * rng.standard_normal(n_frames)
        else:
            row = clean
        if noise.read_noise_sd > 0:
            row = row + noise.read_noise_sd * rng.standard_normal(n_frames)
        raw[roi] = row
        np.divide(row, f0_row, out=dff[roi])
        dff[roi] -= 1.0
    return SimulatedRecording(raw=raw, dff=dff, dff_clean=dff_clean, f0=f0_true, spike_times=spike_times,
                              frame_rate=frame_rate, kernel=kernel, params=params)
