"""Ground-truth imaging sessions for the calibration benchmark, written apart from `calcium`.

This module deliberately imports nothing from the ``calcium`` package and shares none of its code: it is
an independent account of how raw fluorescence arises from spikes, so that a benchmark scored against it
checks the package's model of the measurement instead of agreeing with it by construction.  numpy and
scipy only.

What a session is made of, for each ROI (all times in seconds, frame k at ``k / frame_rate``):

1. **Spikes.**  Events come from an inhomogeneous Poisson process (drawn by time rescaling: unit-rate
   arrivals mapped through the inverse of the integrated rate).  The log event rate is a smooth Gaussian
   process (white noise under a Gaussian window of s.d. ``RATE_TIMESCALE_S``) with s.d.
   ``LOG_RATE_SD``, shifted by ``-LOG_RATE_SD**2 / 2`` so that the rate's expectation is its nominal
   value.  A share ``burst_share`` of the events are bursts of 2, 3 or 4 spikes (equally likely) spread
   over 10-40 ms; the others are single spikes.  The event rate is ``mean_rate_hz / (1 + 2 burst_share)``
   (a burst has 3 spikes on average), so the expected spike rate is ``mean_rate_hz``.  After every spike
   the cell is refractory for 2 ms: an event falling inside that dead time is dropped.
2. **Calcium.**  A two-state linear model integrated on a fine grid (at least 1 kHz, an integer number of
   steps per frame): a spike adds to a fast state ``b`` (calcium entering and being bound), which flows
   with time constant ``rise`` into a slow state ``c`` (bound calcium / indicator) that is cleared with
   time constant ``decay``::

       db/dt = -b / rise,      dc/dt = b / rise - c / decay.

   Each step is the exact solution of this system over the step (its two-by-two transition matrix), and a
   spike's jump enters at its own sub-step time (its exact contribution at the end of its step), so the
   grid introduces no timing error.  The size of the jump makes the peak of ``c`` after one spike 1.
3. **Fluorescence.**  Linear indicator: ΔF/F = ``spike_size * c``.  Saturating indicator: the calcium
   concentration relative to rest is ``1 + a c`` and the fluorescence follows a Hill binding curve of it,
   ``F = Fmin + (Fmax - Fmin) ca^n / (ca^n + K^n)`` with ``n = HILL_N``, ``Fmax / Fmin = DYNAMIC_RANGE``
   and ``K`` set so that the resting occupancy ``1 / (1 + K^n)`` is U(0.35, 0.45) per ROI; the resting
   cell sits above the curve's inflection, so summed calcium gives less than proportional ΔF/F.  ``a`` is
   solved in closed form so that the peak ΔF/F of an isolated spike is the ROI's ``spike_size``.
4. **Exposure.**  The fine-grid ΔF/F is averaged over each frame's exposure, the whole frame period centred
   on the frame's time (camera-like; no point sampling).
5. **Expression and kinetics per ROI.**  ``spike_size = base * U(0.7, 1.4)`` with ``base = U(0.1, 0.3)``
   drawn once per session; rise and decay are the nominal ones times U(0.9, 1.1) each.
6. **Baseline.**  ``F0(t) = photons * exp(-t / tau_bleach) * (1 + drift(t))``: exponential bleaching that
   loses U(0.1, 0.3) of the baseline over 300 s (the default session; per-ROI time constant, the same
   whatever the session's length), and a smooth multiplicative drift of s.d. ``DRIFT_SD`` on a time scale
   of ``DRIFT_TIMESCALE_S``.
7. **Noise.**  Photon counts are Poisson with mean ``F0 (1 + ΔF/F)``, plus Gaussian read noise of variance
   ``READ_NOISE_SHARE * photons``.  ``photons`` is solved so that the ΔF/F noise s.d. at rest, averaged
   (as a variance) over the frames of the session, is ``base / snr``: bleaching makes the noise grow over
   the session (shot noise), and ``noise_sd`` is its RMS value.

References (closed forms used above): the two-state scheme and its difference-of-exponentials response is
the usual first-order kinetic model of indicator binding (common practice; e.g. Yasuda et al. 2004, Sci.
STKE pl5); Hill (1910), J. Physiol. 40: iv-vii (binding curve); time rescaling of a Poisson process:
Brown et al. (2002), Neural Comput. 14:325-346.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.signal import lfilter

__all__ = ["TruthSession", "make_session"]

FINE_RATE_HZ = 1000.0          # the calcium grid has at least this many steps per second
SLOW_GRID_S = 0.25             # grid of the smooth random processes (log rate, drift), linear in between
RATE_TIMESCALE_S = 20.0        # s.d. of the Gaussian window that smooths the log rate
LOG_RATE_SD = 0.5              # s.d. of the log event rate
REFRACTORY_S = 0.002
BURST_SIZES = (2, 3, 4)        # spikes per burst, equally likely
BURST_SPAN_S = (0.010, 0.040)  # first to last spike of a burst, uniform
SIZE_SPREAD = (0.7, 1.4)       # per-ROI factor on the base single-spike size
BASE_SIZE = (0.1, 0.3)         # base single-spike peak ΔF/F, drawn once per session
KINETICS_SPREAD = 0.1          # per-ROI rise and decay: nominal * U(1 - 0.1, 1 + 0.1)
BLEACH_LOSS = (0.1, 0.3)       # fraction of the baseline lost over BLEACH_REFERENCE_S
BLEACH_REFERENCE_S = 300.0     # (a rate of the imaging, not of the session: a shorter session bleaches less)
DRIFT_SD = 0.02                # multiplicative drift of F0, s.d.
DRIFT_TIMESCALE_S = 30.0       # s.d. of the Gaussian window that smooths the drift
READ_NOISE_SHARE = 0.1         # read-noise variance / photon variance at the starting baseline
HILL_N = 2.5
DYNAMIC_RANGE = 20.0           # Fmax / Fmin of the saturating indicator
REST_OCCUPANCY = (0.35, 0.45)  # bound fraction of the indicator at resting calcium


@dataclass(frozen=True, eq=False)
class TruthSession:
    """A simulated session and everything true about it.

    Attributes
    ----------
    raw : ndarray, shape (rois, frames)
        Raw fluorescence (photon counts plus read noise).
    frame_rate : float
        Hz; frame k is at ``k / frame_rate`` seconds.
    spike_times : list of ndarray
        True spike times of each ROI, seconds from the first frame, sorted.
    spike_size : ndarray, shape (rois,)
        Peak ΔF/F of an isolated single spike (continuous time, before the exposure average).
    noise_sd : ndarray, shape (rois,)
        ΔF/F noise s.d. at rest (RMS over the session's frames).
    f0 : ndarray, shape (rois, frames)
        True baseline fluorescence (bleaching and drift), in the units of ``raw``.
    rise_s, decay_s : ndarray, shape (rois,)
        True rise and decay time constants of each ROI.
    description : str
        How the session was made, in words.
    clean_dff : ndarray, shape (rois, frames)
        Noise-free ΔF/F of each frame (exposure-averaged, saturation applied): ``E[raw] / f0 - 1``.
    rate_hz : ndarray, shape (rois, frames)
        Expected spike rate at each frame (events times mean spikes per event; refractoriness not counted).
    photons : ndarray, shape (rois,)
        Photon count per frame of the baseline at the start of the session.
    read_noise_sd : ndarray, shape (rois,)
        S.d. of the Gaussian read noise, units of ``raw``.
    saturating : bool
        Whether the Hill nonlinearity was applied.
    """

    raw: np.ndarray
    frame_rate: float
    spike_times: list
    spike_size: np.ndarray
    noise_sd: np.ndarray
    f0: np.ndarray
    rise_s: np.ndarray
    decay_s: np.ndarray
    description: str
    clean_dff: np.ndarray
    rate_hz: np.ndarray
    photons: np.ndarray
    read_noise_sd: np.ndarray
    saturating: bool

    @property
    def n_rois(self) -> int:
        return self.raw.shape[0]

    @property
    def duration_s(self) -> float:
        return self.raw.shape[1] / self.frame_rate

    def electrical_spikes(self, rois, *, clock_offset_s: float = 0.0) -> dict:
        """True spike times of ``rois`` as an electrode on a clock ``clock_offset_s`` ahead would stamp them.

        Returns ``{roi: spike_times + clock_offset_s}``.
        """
        return {int(i): self.spike_times[int(i)] + clock_offset_s for i in rois}


# ------------------------------------------------------------------------------------------- spikes
def _smooth_unit_process(rng, n: int, sigma_samples: float) -> np.ndarray:
    """Stationary Gaussian process of unit variance: white noise under a Gaussian window."""
    pad = int(math.ceil(4 * sigma_samples)) + 1
    white = rng.standard_normal(n + 2 * pad)
    smooth = gaussian_filter1d(white, sigma_samples, mode="constant")[pad:pad + n]
    impulse = np.zeros(2 * pad + 1)
    impulse[pad] = 1.0
    weights = gaussian_filter1d(impulse, sigma_samples, mode="constant")
    return smooth / math.sqrt(float(np.sum(weights ** 2)))  # variance of a filtered white noise: sum of w^2


def _slow_grid(end_s: float) -> np.ndarray:
    return np.arange(0.0, end_s + 2 * SLOW_GRID_S, SLOW_GRID_S)


def _event_rate(rng, end_s: float, event_rate_hz: float):
    """(grid, rate) of the modulated event rate, piecewise linear on SLOW_GRID_S."""
    grid = _slow_grid(end_s)
    log_mod = LOG_RATE_SD * _smooth_unit_process(rng, grid.size, RATE_TIMESCALE_S / SLOW_GRID_S)
    return grid, event_rate_hz * np.exp(log_mod - 0.5 * LOG_RATE_SD ** 2)  # E[exp(N(0,s^2) - s^2/2)] = 1


def _draw_spikes(rng, grid, rate, end_s: float, burst_share: float) -> np.ndarray:
    # time rescaling: arrivals of a unit-rate process mapped through the inverse integrated rate
    cumulative = np.concatenate([[0.0], np.cumsum(0.5 * (rate[1:] + rate[:-1]) * np.diff(grid))])
    total = float(np.interp(end_s, grid, cumulative))
    arrivals = np.cumsum(rng.exponential(1.0, int(total + 10 * math.sqrt(total + 1) + 20)))
    while arrivals[-1] < total:  # (practically never)
        arrivals = np.concatenate([arrivals, arrivals[-1] + np.cumsum(rng.exponential(1.0, 100))])
    events = np.interp(arrivals[arrivals < total], cumulative, grid)
    spikes = []
    free_from = -math.inf
    for t in events:
        if t < free_from:
            continue  # refractory: the event is lost
        if rng.random() < burst_share:
            k = int(rng.choice(BURST_SIZES))
            span = rng.uniform(*BURST_SPAN_S)
            gaps = REFRACTORY_S + (span - REFRACTORY_S * (k - 1)) * rng.dirichlet(np.ones(k - 1))
            burst = t + np.concatenate([[0.0], np.cumsum(gaps)])
        else:
            burst = np.array([t])
        spikes.extend(burst[burst < end_s])
        free_from = burst[-1] + REFRACTORY_S
    return np.asarray(spikes, dtype=np.float64)


# ------------------------------------------------------------------------------------------ calcium
def _calcium(spikes: np.ndarray, rise: float, decay: float, t_first: float, dt: float, n: int) -> np.ndarray:
    """Slow state c at the fine nodes ``t_first + j dt``, peak 1 after one spike."""
    ratio = decay / (decay - rise)
    t_peak = rise * decay / (decay - rise) * math.log(decay / rise)
    jump = 1.0 / (ratio * (math.exp(-t_peak / decay) - math.exp(-t_peak / rise)))  # b jump giving peak c = 1
    a_rise, a_decay = math.exp(-dt / rise), math.exp(-dt / decay)
    gain = ratio * (a_decay - a_rise)  # c after one step from b = 1, c = 0
    into_b = np.zeros(n)
    into_c = np.zeros(n)
    # a spike at s in (t_j, t_j+1] arrives in node j+1 with its exact state after t_j+1 - s
    step = np.floor((spikes - t_first) / dt).astype(np.int64)  # spikes end before the last node: step <= n - 2
    lag = t_first + (step + 1) * dt - spikes
    np.add.at(into_b, step, jump * np.exp(-lag / rise))
    np.add.at(into_c, step, jump * ratio * (np.exp(-lag / decay) - np.exp(-lag / rise)))
    # b[j] = a_rise b[j-1] + into_b[j-1];  c[j] = a_decay c[j-1] + gain b[j-1] + into_c[j-1]
    b = lfilter([0.0, 1.0], [1.0, -a_rise], into_b)
    return lfilter([0.0, 1.0], [1.0, -a_decay], gain * b + into_c)


class _Hill:
    """ΔF/F of an indicator on a Hill curve of calcium (relative to rest), with its per-spike calcium step."""

    def __init__(self, rest_occupancy: float, spike_size: float):
        self.kn = 1.0 / rest_occupancy - 1.0  # K^n from the resting occupancy 1 / (1 + K^n)
        self.floor = 1.0 / DYNAMIC_RANGE      # Fmin / Fmax
        self.rest_occupancy = rest_occupancy
        # F / Fmax = floor + (1 - floor) occupancy;  ΔF/F = (F - F_rest) / F_rest
        self.rest_f = self.floor + (1.0 - self.floor) * rest_occupancy
        self.max_dff = (1.0 - self.rest_f) / self.rest_f
        if not 0.0 < spike_size < self.max_dff:
            raise ValueError(f"spike_size={spike_size!r} is beyond the indicator's range "
                             f"(max ΔF/F {self.max_dff:.3g})")
        occupancy = rest_occupancy + spike_size * self.rest_f / (1.0 - self.floor)
        ca_n = self.kn * occupancy / (1.0 - occupancy)
        self.step = ca_n ** (1.0 / HILL_N) - 1.0  # calcium rise of one spike, relative to rest

    def dff(self, c: np.ndarray) -> np.ndarray:
        ca_n = (1.0 + self.step * c) ** HILL_N
        occupancy = ca_n / (ca_n + self.kn)
        return (self.floor + (1.0 - self.floor) * occupancy) / self.rest_f - 1.0


# ------------------------------------------------------------------------------------------ session
def make_session(*, n_rois: int = 12, frame_rate: float, duration_s: float = 300.0, rise_s: float,
                 decay_s: float, snr: float, mean_rate_hz: float = 0.5, burst_share: float = 0.25,
                 saturating: bool = False, seed: int = 0) -> TruthSession:
    """Simulate ``n_rois`` cells imaged at ``frame_rate`` for ``duration_s`` (see the module docstring).

    Parameters
    ----------
    n_rois : int
    frame_rate : float
        Hz.
    duration_s : float
        Length of the recording; ``round(duration_s * frame_rate)`` frames.
    rise_s, decay_s : float
        Nominal rise and decay time constants (0 < rise_s < decay_s); each ROI's are within ±10 %.
    snr : float
        Base single-spike peak ΔF/F over the ΔF/F noise s.d. at rest (each ROI's own is 0.7-1.4 times it).
    mean_rate_hz : float
        Expected spike rate (spikes, not events).
    burst_share : float
        Share of events that are bursts of 2-4 spikes, in [0, 1].
    saturating : bool
        Hill-curve indicator (sublinear for bursts) instead of a linear one.
    seed : int
        Seed of everything random in the session.

    Returns
    -------
    TruthSession
    """
    frame_rate = float(frame_rate)
    if not (n_rois >= 1 and frame_rate > 0 and duration_s > 0 and snr > 0 and mean_rate_hz >= 0):
        raise ValueError(f"need n_rois >= 1 and frame_rate, duration_s, snr > 0, mean_rate_hz >= 0; got "
                         f"n_rois={n_rois!r}, frame_rate={frame_rate!r}, duration_s={duration_s!r}, snr={snr!r}, "
                         f"mean_rate_hz={mean_rate_hz!r}")
    if not 0 < rise_s < decay_s / (1 + KINETICS_SPREAD) * (1 - KINETICS_SPREAD):
        raise ValueError(f"need 0 < rise_s well below decay_s (by the ±{KINETICS_SPREAD:.0%} per-ROI spread), got "
                         f"rise_s={rise_s!r}, decay_s={decay_s!r}")
    if not 0.0 <= burst_share <= 1.0:
        raise ValueError(f"burst_share must be in [0, 1], got {burst_share!r}")
    # two streams: the cells (spikes, sizes, kinetics, baseline) and the photon/read noise, whose draws
    # depend on the signal; the same seed thus gives the same cells whatever snr or saturation
    rng, noise_rng = (np.random.default_rng(child) for child in np.random.SeedSequence(seed).spawn(2))
    n_frames = int(round(duration_s * frame_rate))
    steps = max(2, int(math.ceil(FINE_RATE_HZ / frame_rate)))  # fine steps per frame
    dt = 1.0 / (frame_rate * steps)
    t_first = -0.5 / frame_rate + 0.5 * dt  # fine nodes are the midpoints of the exposure's sub-intervals
    n_fine = n_frames * steps
    end_s = t_first + (n_fine - 1) * dt  # last fine node, half a step before the last exposure ends
    frame_times = np.arange(n_frames) / frame_rate
    mean_burst = float(np.mean(BURST_SIZES))
    event_rate_hz = mean_rate_hz / (1.0 + (mean_burst - 1.0) * burst_share)

    base = rng.uniform(*BASE_SIZE)
    noise_sd = base / snr
    sizes = base * rng.uniform(*SIZE_SPREAD, n_rois)
    rises = rise_s * rng.uniform(1 - KINETICS_SPREAD, 1 + KINETICS_SPREAD, n_rois)
    decays = decay_s * rng.uniform(1 - KINETICS_SPREAD, 1 + KINETICS_SPREAD, n_rois)
    occupancies = rng.uniform(*REST_OCCUPANCY, n_rois)  # drawn either way: same seed, same spikes and sizes
    raw = np.empty((n_rois, n_frames))
    f0 = np.empty((n_rois, n_frames))
    clean = np.empty((n_rois, n_frames))
    rate_frames = np.empty((n_rois, n_frames))
    photons = np.empty(n_rois)
    read_sd = np.empty(n_rois)
    all_spikes = []
    for i in range(n_rois):
        grid, rate = _event_rate(rng, end_s, event_rate_hz)
        spikes = _draw_spikes(rng, grid, rate, end_s, burst_share) if event_rate_hz > 0 else np.zeros(0)
        all_spikes.append(spikes)
        rate_frames[i] = np.interp(frame_times, grid, rate) * (1.0 + (mean_burst - 1.0) * burst_share)
        c = _calcium(spikes, rises[i], decays[i], t_first, dt, n_fine)
        if saturating:
            fine_dff = _Hill(occupancies[i], sizes[i]).dff(c)
        else:
            fine_dff = sizes[i] * c
        clean[i] = fine_dff.reshape(n_frames, steps).mean(axis=1)  # exposure average
        loss = rng.uniform(*BLEACH_LOSS)
        tau_bleach = BLEACH_REFERENCE_S / -math.log(1.0 - loss)
        slow = _slow_grid(end_s)
        drift = DRIFT_SD * np.interp(frame_times, slow,
                                     _smooth_unit_process(rng, slow.size, DRIFT_TIMESCALE_S / SLOW_GRID_S))
        shape = np.exp(-frame_times / tau_bleach) * (1.0 + drift)
        # ΔF/F noise variance at rest, frame k: (photons shape_k + read var) / (photons shape_k)^2
        #   = (1/shape_k + READ_NOISE_SHARE / shape_k^2) / photons; its mean over the frames is noise_sd^2
        photons[i] = float(np.mean(1.0 / shape + READ_NOISE_SHARE / shape ** 2)) / noise_sd ** 2
        read_sd[i] = math.sqrt(READ_NOISE_SHARE * photons[i])
        f0[i] = photons[i] * shape
        raw[i] = noise_rng.poisson(f0[i] * (1.0 + clean[i])) + noise_rng.normal(0.0, read_sd[i], n_frames)
    kind = (f"saturating (Hill n={HILL_N:g}, Fmax/Fmin={DYNAMIC_RANGE:g}, resting occupancy "
            f"U{REST_OCCUPANCY})" if saturating else "linear")
    description = (
        f"{n_rois} ROIs x {n_frames} frames at {frame_rate:g} Hz ({duration_s:g} s), seed {seed}; indicator {kind}; "
        f"rise {rise_s * 1e3:g} ms, decay {decay_s * 1e3:g} ms (±{KINETICS_SPREAD:.0%} per ROI), two-state calcium "
        f"exact on a {1e3 * dt:.3g} ms grid, averaged over a whole-frame exposure centred on each frame time; "
        f"spikes {mean_rate_hz:g} Hz (log-rate s.d. {LOG_RATE_SD:g}, {RATE_TIMESCALE_S:g} s smoothing), "
        f"{burst_share:.0%} of events bursts of {BURST_SIZES[0]}-{BURST_SIZES[-1]} spikes in "
        f"{BURST_SPAN_S[0] * 1e3:g}-{BURST_SPAN_S[1] * 1e3:g} ms, {REFRACTORY_S * 1e3:g} ms refractory; "
        f"base single-spike ΔF/F {base:.3f} (x U{SIZE_SPREAD} per ROI), SNR {snr:g} -> noise s.d. {noise_sd:.4f}; "
        f"bleaching {BLEACH_LOSS[0]:.0%}-{BLEACH_LOSS[1]:.0%} per {BLEACH_REFERENCE_S:g} s, "
        f"drift s.d. {DRIFT_SD:.0%} ({DRIFT_TIMESCALE_S:g} s); "
        f"Poisson photons ({photons.min():.0f}-{photons.max():.0f}/frame at the start) + read noise "
        f"({READ_NOISE_SHARE:.0%} of the photon variance)")
    return TruthSession(raw=raw, frame_rate=frame_rate, spike_times=all_spikes, spike_size=sizes,
                        noise_sd=np.full(n_rois, noise_sd), f0=f0, rise_s=rises, decay_s=decays,
                        description=description, clean_dff=clean, rate_hz=rate_frames, photons=photons,
                        read_noise_sd=read_sd, saturating=bool(saturating))
