"""Forward model: spike times -> predicted ΔF/F, and simulated recordings.

:func:`predict_fluorescence` turns continuous spike times into the ΔF/F of
each frame exactly (sub-frame spike times, point samples or exposure
averages, optional saturation).  :func:`simulate_recording` draws spike
trains for many ROIs, passes them through the forward model and adds the
things a real recording has: a baseline with bleaching and drift, photon
shot noise and detector read noise.

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

import json
import math
import numbers
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numba import njit
from scipy.signal import lfilter

from ._checks import (check_choice, check_frame_rate, check_int, check_memory, check_nonnegative, check_positive,
                      json_value)
from .kernel import Kernel

__all__ = ["predict_fluorescence", "simulate_recording", "SimulatedRecording", "SPIKE_MODELS"]

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


# ------------------------------------------------------------ spike trains
def _per_roi(value, name: str, n_rois: int, check) -> np.ndarray:
    """A scalar or one value per ROI, validated by ``check(value, name)``."""
    if isinstance(value, numbers.Real) and not isinstance(value, bool):
        return np.full(n_rois, check(value, name))
    arr = np.asarray(value, dtype=np.float64)
    if arr.shape != (n_rois,):
        raise ValueError(f"{name} must be a number or one number per ROI (shape ({n_rois},)), got shape {arr.shape}")
    return np.array([check(float(v), f"{name}[{i}]") for i, v in enumerate(arr)])


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
        a = math.exp(-dt / period_s)
        noise = rng.standard_normal(n_bins)
        noise[0] /= math.sqrt(1.0 - a * a)  # start in the stationary distribution
        z = lfilter([math.sqrt(1.0 - a * a)], [1.0, -a], noise)
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


def _spike_train(rng, *, rate, duration_s, frame_rate, model, refractory_s, isi_shape, burst_size_mean,
                 burst_isi_s, modulation, depth, period_s) -> np.ndarray:
    if rate == 0:
        return np.empty(0)
    profile = _rate_profile(rng, rate, duration_s, frame_rate, modulation, depth, period_s)
    span = _operational_span(rate, duration_s, profile)
    if model == "poisson":
        operational = np.sort(rng.uniform(0.0, span, size=rng.poisson(span)))
        times = _to_real_time(operational, rate, profile)
    elif model == "renewal":
        operational = _renewal_events(rng, span, refractory_s * rate, isi_shape)
        times = _to_real_time(operational, rate, profile)
    else:  # bursts: burst onsets are Poisson at rate / burst_size_mean; spikes every burst_isi_s within a burst
        operational = np.sort(rng.uniform(0.0, span, size=rng.poisson(span / burst_size_mean)))
        onsets = _to_real_time(operational, rate, profile)
        sizes = 1 + rng.poisson(burst_size_mean - 1.0, size=onsets.size)
        which = np.repeat(np.arange(onsets.size), sizes)
        position = np.arange(which.size) - np.repeat(np.cumsum(sizes) - sizes, sizes)
        times = np.sort(onsets[which] + position * burst_isi_s)
    return times[times < duration_s]


# ------------------------------------------------------------ simulation
# Bookkeeping per simulated ROI besides its rows: two seed streams (about 1.2 kB at their peak, measured with
# tracemalloc over 20,000 ROIs) and the spike-time array object, rounded up.
_BYTES_PER_ROI = 2048


def _check_simulation_memory(n_rois: int, n_frames: int, duration_s: float, rate_hz) -> None:
    """Refuse, before anything is allocated, a simulation whose arrays exceed the available memory."""
    try:
        mean_rate = float(np.mean(rate_hz)) if np.size(rate_hz) else 0.0
    except (TypeError, ValueError):
        mean_rate = 0.0  # (a bad rate_hz is named by its own check later)
    if not math.isfinite(mean_rate) or mean_rate < 0:
        mean_rate = 0.0
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
        Every parameter of :func:`simulate_recording` (JSON-serialisable).
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


def simulate_recording(n_rois, duration_s, frame_rate, *, kernel=None, indicator=None, rate_hz=1.0,
                       spike_model="poisson", refractory_s=0.002, isi_shape=1.0, burst_size_mean=3.0,
                       burst_isi_s=0.01, rate_modulation=None, rate_modulation_depth=0.5,
                       rate_modulation_period_s=10.0, f0=100.0, bleach_fraction=0.0, bleach_tau_s=600.0,
                       drift_sd=0.0, drift_tau_s=60.0, photons_per_frame=None, read_noise_sd=0.0, noise_sd=None,
                       scan_offsets=0.0, exposure_s=None, seed=0) -> SimulatedRecording:
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
    rate_hz : float or array_like (n_rois,), default 1.0
        Mean firing rate of each ROI (>= 0).
    spike_model : {"poisson", "renewal", "bursts"}, default "poisson"
        ``"poisson"``: Poisson process.  ``"renewal"``: intervals are a dead
        time ``refractory_s`` plus a gamma variable of shape ``isi_shape``
        (``isi_shape=1``: dead-time Poisson), mean interval ``1/rate_hz``.
        ``"bursts"``: burst onsets form a Poisson process of rate ``rate_hz
        / burst_size_mean``; a burst has ``1 + Poisson(burst_size_mean - 1)``
        spikes ``burst_isi_s`` apart.
    refractory_s : float, default 0.002
        Dead time of the renewal model (``refractory_s * rate_hz < 1``).
    isi_shape : float, default 1.0
        Gamma shape of the renewal model (> 0); the interval CV is
        ``(1 - refractory_s rate_hz) / sqrt(isi_shape)``.
    burst_size_mean : float, default 3.0
        Mean spikes per burst (>= 1).
    burst_isi_s : float, default 0.01
        Interval between spikes within a burst (> 0).
    rate_modulation : {None, "sinusoid", "random"}, default None
        Slow modulation of the rate: ``"sinusoid"``: ``rate (1 + depth sin(2
        pi t / period + phase))`` with a random phase per ROI (depth in
        [0, 1]); ``"random"``: ``rate exp(depth z(t) - depth**2 / 2)``, z a
        unit-variance Ornstein-Uhlenbeck process with time constant
        ``period`` (depth = s.d. of the log rate).  Applied by
        time-rescaling (Brown et al. 2002): the renewal dead time and the
        burst onsets follow the local rate.
    rate_modulation_depth : float, default 0.5
    rate_modulation_period_s : float, default 10.0
    f0 : float or array_like (n_rois,), default 100.0
        Baseline fluorescence at the start (raw units, > 0).
    bleach_fraction : float, default 0.0
        Fraction of the baseline lost to bleaching in the long run, in
        [0, 1): baseline factor ``1 - b + b exp(-t / bleach_tau_s)``.
    bleach_tau_s : float, default 600.0
    drift_sd : float, default 0.0
        S.d. of slow multiplicative baseline drift: factor ``exp(drift_sd
        z(t))``, z a unit-variance Ornstein-Uhlenbeck process with time
        constant ``drift_tau_s``.
    drift_tau_s : float, default 60.0
    photons_per_frame : float, optional
        Detected photons per frame at the starting baseline.  Photon counts
        are Poisson with mean ``photons_per_frame F / f0`` (F the noise-free
        fluorescence) and are scaled by ``f0 / photons_per_frame`` into raw
        units.  Excludes ``noise_sd``.
    read_noise_sd : float, default 0.0
        S.d. of additive Gaussian detector noise, in raw units.
    noise_sd : float, optional
        Alternative to a photon budget: Gaussian noise with this s.d. in
        ΔF/F units (``f0 noise_sd`` in raw units).
    scan_offsets : float or array_like (n_rois,), default 0.0
        Sample time of frame k for each ROI is ``k / frame_rate + offset``,
        with ``0 <= offset < 1 / frame_rate`` (a delay within the frame).
    exposure_s : float, optional
        Exposure of each frame (see :func:`predict_fluorescence`).
    seed : int, default 0
        Seed of :class:`numpy.random.SeedSequence`; each ROI gets its own
        child streams (one for spikes, one for noise), so ROI i does not
        depend on ``n_rois`` and the spikes do not depend on the noise
        settings.

    Returns
    -------
    SimulatedRecording

    Raises
    ------
    ValueError
        Bad arguments, naming them; and a request whose arrays would not fit
        in the memory available (estimated before anything is allocated:
        four float64 arrays of ``n_rois x n_frames``, the expected spike
        times and about 2 kB per ROI of bookkeeping, measured).

    References
    ----------
    .. [1] Brown, E. N., Barbieri, R., Ventura, V., Kass, R. E. & Frank, L. M.
       (2002). The time-rescaling theorem and its application to neural
       spike train data analysis. Neural Comput. 14, 325-346.
    .. [2] Uhlenbeck, G. E. & Ornstein, L. S. (1930). On the theory of the
       Brownian motion. Phys. Rev. 36, 823-841.

    Examples
    --------
    >>> rec = simulate_recording(2, 10.0, 30.0, indicator="GCaMP6f", rate_hz=2.0, noise_sd=0.05, seed=1)
    >>> rec.raw.shape
    (2, 300)
    """
    arguments = dict(locals())  # every parameter, before any is normalised
    params = {key: json_value(value) for key, value in arguments.items() if key != "kernel"}
    n_rois = check_int(n_rois, "n_rois", minimum=1)
    duration_s = check_positive(duration_s, "duration_s")
    frame_rate = check_frame_rate(frame_rate)
    n_frames = int(round(duration_s * frame_rate))
    if n_frames < 1:
        raise ValueError(f"duration_s * frame_rate must give at least one frame, got {duration_s * frame_rate!r}")
    _check_simulation_memory(n_rois, n_frames, duration_s, rate_hz)
    if kernel is not None and indicator is not None:
        raise ValueError("give either kernel or indicator, not both")
    if kernel is None:
        kernel = Kernel.from_indicator(indicator if indicator is not None else "GCaMP6s")
    kernel = _check_kernel(kernel)
    rates = _per_roi(rate_hz, "rate_hz", n_rois, check_nonnegative)
    check_choice(spike_model, "spike_model", SPIKE_MODELS)
    refractory_s = check_nonnegative(refractory_s, "refractory_s")
    isi_shape = check_positive(isi_shape, "isi_shape")
    burst_size_mean = check_positive(burst_size_mean, "burst_size_mean")
    burst_isi_s = check_positive(burst_isi_s, "burst_isi_s")
    if spike_model == "renewal" and np.any(refractory_s * rates >= 1.0):
        raise ValueError(f"refractory_s * rate_hz must be < 1 for the renewal model, got refractory_s="
                         f"{refractory_s!r} with rate_hz up to {rates.max()!r}")
    if spike_model == "bursts" and burst_size_mean < 1.0:
        raise ValueError(f"burst_size_mean must be >= 1, got {burst_size_mean!r}")
    check_choice(rate_modulation, "rate_modulation", _RATE_MODULATIONS)
    depth = check_nonnegative(rate_modulation_depth, "rate_modulation_depth")
    if rate_modulation == "sinusoid" and depth > 1.0:
        raise ValueError(f"rate_modulation_depth must be in [0, 1] for a sinusoid, got {depth!r}")
    period_s = check_positive(rate_modulation_period_s, "rate_modulation_period_s")
    f0_start = _per_roi(f0, "f0", n_rois, check_positive)
    bleach_fraction = check_nonnegative(bleach_fraction, "bleach_fraction")
    if bleach_fraction >= 1.0:
        raise ValueError(f"bleach_fraction must be in [0, 1), got {bleach_fraction!r}")
    bleach_tau_s = check_positive(bleach_tau_s, "bleach_tau_s")
    drift_sd = check_nonnegative(drift_sd, "drift_sd")
    drift_tau_s = check_positive(drift_tau_s, "drift_tau_s")
    if photons_per_frame is not None and noise_sd is not None:
        raise ValueError("give either photons_per_frame (shot noise) or noise_sd (Gaussian ΔF/F noise), not both")
    photons = None if photons_per_frame is None else check_positive(photons_per_frame, "photons_per_frame")
    noise_sd = None if noise_sd is None else check_nonnegative(noise_sd, "noise_sd")
    read_noise_sd = check_nonnegative(read_noise_sd, "read_noise_sd")
    offsets = _per_roi(scan_offsets, "scan_offsets", n_rois,
                       lambda value, name: _check_scan_offset(value, frame_rate, name))
    exposure_s = _check_exposure(exposure_s, frame_rate)
    seed = check_int(seed, "seed", minimum=0)
    params.update(n_frames=n_frames, kernel=kernel.to_dict(), kernel_description=str(kernel))

    streams = [child.spawn(2) for child in np.random.SeedSequence(seed).spawn(n_rois)]
    recording_s = n_frames / frame_rate
    spike_times = []
    for roi in range(n_rois):
        rng = np.random.default_rng(streams[roi][0])
        spike_times.append(_spike_train(
            rng, rate=float(rates[roi]), duration_s=recording_s, frame_rate=frame_rate, model=spike_model,
            refractory_s=refractory_s, isi_shape=isi_shape, burst_size_mean=burst_size_mean,
            burst_isi_s=burst_isi_s, modulation=rate_modulation, depth=depth, period_s=period_s))

    raw = np.empty((n_rois, n_frames))
    dff = np.empty((n_rois, n_frames))
    dff_clean = np.empty((n_rois, n_frames))
    f0_true = np.empty((n_rois, n_frames))
    frame_times = np.arange(n_frames) / frame_rate
    bleach = 1.0 - bleach_fraction + bleach_fraction * np.exp(-frame_times / bleach_tau_s)
    drift_a = math.exp(-1.0 / (drift_tau_s * frame_rate))
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
    for roi in range(n_rois):
        rng = np.random.default_rng(streams[roi][1])
        baseline = f0_start[roi] * bleach
        if drift_sd > 0:
            shocks = rng.standard_normal(n_frames)
            shocks[0] /= math.sqrt(1.0 - drift_a * drift_a)  # stationary start
            z = lfilter([math.sqrt(1.0 - drift_a * drift_a)], [1.0, -drift_a], shocks)
            baseline = baseline * np.exp(drift_sd * z)
        f0_true[roi] = baseline
        clean = baseline * (1.0 + dff_clean[roi])
        if photons is not None:
            counts = rng.poisson(photons / f0_start[roi] * clean)
            row = counts * (f0_start[roi] / photons)
        elif noise_sd is not None:
            row = clean + (noise_sd * baseline) * rng.standard_normal(n_frames)
        else:
            row = clean
        if read_noise_sd > 0:
            row = row + read_noise_sd * rng.standard_normal(n_frames)
        raw[roi] = row
        np.divide(row, baseline, out=dff[roi])
        dff[roi] -= 1.0
    return SimulatedRecording(raw=raw, dff=dff, dff_clean=dff_clean, f0=f0_true, spike_times=spike_times,
                              frame_rate=frame_rate, kernel=kernel, params=params)
