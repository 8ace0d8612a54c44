"""Plan an experiment: can single spikes be seen at this frame rate and noise?

:func:`plan_detectability` simulates short recordings with the forward model
(one spike, two spikes at a chosen interval, or none), runs the exact
non-negative deconvolution with the known kernel on each, and reports, for
each frame rate and noise level: the probability of detecting one spike at
a fixed false-positive rate, the timing precision of detected spikes, and
the shortest interval at which two spikes are counted as two. Every number
carries its Monte-Carlo uncertainty.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import norm

from ._checks import check_frame_rate, check_int, check_memory, check_positive
from .infer.ar import deconvolve_ar
from .kernel import Kernel

__all__ = ["DetectabilityPlan", "plan_detectability", "wilson_interval", "DEFAULT_INTERVALS_S"]

DEFAULT_FRAME_RATES = (7.5, 15.0, 30.0, 60.0)
# Per-frame ΔF/F noise s.d. of somatic two-photon recordings ranges from a few per cent to
# about ten per cent at 15-30 Hz (from memory; common practice, no single source).
DEFAULT_NOISE_SD = (0.02, 0.05, 0.1)
DEFAULT_INTERVALS_S = (0.02, 0.035, 0.05, 0.075, 0.1, 0.15, 0.2, 0.3, 0.5, 0.75, 1.0)
# Deconvolution penalty, in units of noise_sd * ||h|| (h: AR impulse response of one unit of
# activity): a spike must explain about one noise s.d. of matched-filter output to be kept.
_PENALTY_SD = 1.0
_MIN_NULL_WINDOWS = 2000
# Peak memory of one condition in units of its largest (trials x frames) float64 array: 8-18 measured with
# tracemalloc (30-500 Hz, 100-2000 trials, false-positive rates 0.001-0.05); rounded up.
_PEAK_ARRAYS = 20


def wilson_interval(successes, trials, *, confidence=0.95):
    """Wilson score interval of a binomial proportion.

    Parameters
    ----------
    successes, trials : int or array_like
        Counts (``trials > 0``).
    confidence : float
        Two-sided level.

    Returns
    -------
    (low, high) : tuple of float or ndarray

    References
    ----------
    Wilson EB (1927) Probable inference, the law of succession, and
    statistical inference. J Am Stat Assoc 22:209-212.

    Examples
    --------
    >>> [round(v, 4) for v in wilson_interval(8, 10)]
    [0.4902, 0.9433]
    """
    k = np.asarray(successes, dtype=float)
    n = np.asarray(trials, dtype=float)
    if np.any(n <= 0) or np.any(k < 0) or np.any(k > n):
        raise ValueError(f"need 0 <= successes <= trials and trials > 0, got {successes!r} of {trials!r}")
    z = norm.ppf(0.5 + confidence / 2)
    p = k / n
    den = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    low, high = centre - half, centre + half
    if low.ndim == 0:
        return float(low), float(high)
    return low, high


@dataclass(frozen=True)
class DetectabilityPlan:
    """Result of :func:`plan_detectability`.

    Arrays are indexed ``[frame_rate, noise]`` (and ``[..., interval]``).

    Attributes
    ----------
    kernel : Kernel
        Single-spike response simulated (and assumed known by the inference).
    frame_rates : tuple of float
        Frame rates in Hz.
    noise_sd : tuple of float
        Per-frame ΔF/F noise s.d. at baseline of each noise level.
    photons_per_frame : tuple of float or None
        The photon budgets, when noise was given that way
        (``noise_sd = 1 / sqrt(photons)``).
    false_positive_rate : float
        Target probability that a spike-free window crosses the threshold.
    window_s : float
        Half-width of the detection window around the spike time.
    n_trials : int
        Simulated trials per condition (and per interval).
    threshold : ndarray
        Detection threshold on the windowed deconvolved activity.
    achieved_false_positive_rate : ndarray
        Fraction of spike-free windows over threshold, measured on a second,
        independent set of spike-free windows.
    detection : ndarray
        Fraction of single-spike trials detected.
    detection_se : ndarray
        Binomial standard error of ``detection``.
    detection_ci : ndarray, shape (..., 2)
        95 % Wilson interval of ``detection``.
    timing_sd_s : ndarray
        S.d. of the timing error of detected spikes (NaN with < 3 detected).
    timing_sd_se_s : ndarray
        Its standard error, ``sd / sqrt(2 (n - 1))`` (normal approximation).
    timing_bias_s : ndarray
        Mean timing error (estimate - truth) of detected spikes.
    intervals_s : tuple of float
        Inter-spike intervals swept for the two-spike test.
    resolved : ndarray, shape (..., n_intervals)
        Fraction of trials in which the two spikes were counted as two.
    resolved_ci : ndarray, shape (..., n_intervals, 2)
        95 % Wilson intervals of ``resolved``.
    resolve_fraction : float
        Fraction of trials that must resolve two spikes (the criterion).
    shortest_resolved_interval_s : ndarray
        Shortest swept interval from which on every longer swept interval
        also meets ``resolve_fraction`` (NaN if even the longest does not).
    seed : int
        Seed used.
    """

    kernel: Kernel
    frame_rates: tuple
    noise_sd: tuple
    photons_per_frame: tuple | None
    false_positive_rate: float
    window_s: float
    n_trials: int
    threshold: np.ndarray = field(repr=False)
    achieved_false_positive_rate: np.ndarray = field(repr=False)
    detection: np.ndarray = field(repr=False)
    detection_se: np.ndarray = field(repr=False)
    detection_ci: np.ndarray = field(repr=False)
    timing_sd_s: np.ndarray = field(repr=False)
    timing_sd_se_s: np.ndarray = field(repr=False)
    timing_bias_s: np.ndarray = field(repr=False)
    intervals_s: tuple = ()
    resolved: np.ndarray = field(default=None, repr=False)
    resolved_ci: np.ndarray = field(default=None, repr=False)
    resolve_fraction: float = 0.5
    shortest_resolved_interval_s: np.ndarray = field(default=None, repr=False)
    seed: int = 0

    def header(self) -> list:
        """Column names of :meth:`rows`."""
        return ["frame_rate_hz", "noise_sd", "photons_per_frame", "detection", "detection_low", "detection_high",
                "false_positive_rate", "timing_sd_s", "timing_bias_s", "shortest_resolved_interval_s"]

    def rows(self) -> list:
        """One row per (frame rate, noise level); columns in :meth:`header`."""
        out = []
        for i, fr in enumerate(self.frame_rates):
            for j, sd in enumerate(self.noise_sd):
                photons = self.photons_per_frame[j] if self.photons_per_frame else float("nan")
                out.append([fr, sd, photons, float(self.detection[i, j]), float(self.detection_ci[i, j, 0]),
                            float(self.detection_ci[i, j, 1]), float(self.achieved_false_positive_rate[i, j]),
                            float(self.timing_sd_s[i, j]), float(self.timing_bias_s[i, j]),
                            float(self.shortest_resolved_interval_s[i, j])])
        return out

    def __str__(self) -> str:
        lines = [f"Detectability of single spikes, {self.kernel}",
                 f"false-positive rate {self.false_positive_rate:g} per ±{self.window_s * 1e3:g} ms window; "
                 f"{self.n_trials} trials per condition (95 % Wilson intervals)",
                 f"{'rate Hz':>8} {'noise sd':>9} {'detected':>22} {'FP rate':>8} {'timing sd':>10} "
                 f"{'two spikes from':>16}"]
        for fr, sd, _, det, lo, hi, fp, tsd, _, isi in self.rows():
            isi_text = "n/a" if math.isnan(isi) else f"{isi * 1e3:.0f} ms"
            tsd_text = "n/a" if math.isnan(tsd) else f"{tsd * 1e3:.1f} ms"
            lines.append(f"{fr:8g} {sd:9.3g} {det:8.3f} [{lo:.3f}, {hi:.3f}] {fp:8.4f} {tsd_text:>10} "
                         f"{isi_text:>16}")
        return "\n".join(lines)


# ---------------------------------------------------------------------------
# argument handling
# ---------------------------------------------------------------------------
def _as_positive_tuple(values, name):
    if isinstance(values, numbers.Real) and not isinstance(values, bool):
        values = (values,)
    try:
        out = tuple(float(v) for v in values)
    except TypeError:
        raise ValueError(f"{name} must be a positive number or a sequence of them, got {values!r}") from None
    if not out:
        raise ValueError(f"{name} must not be empty")
    for v in out:
        check_positive(v, name)
    return out


def _plan_kernel(kernel, indicator):
    if kernel is not None and indicator is not None:
        raise ValueError("give either kernel or indicator, not both")
    if kernel is None:
        kernel = Kernel.from_indicator(indicator if indicator is not None else "GCaMP6s")
    if not isinstance(kernel, Kernel):
        raise ValueError(f"kernel must be a calcium.kernel.Kernel, got {type(kernel).__name__}")
    if kernel.has_slow_component:
        raise ValueError("the planner deconvolves with AR(1)/AR(2) models: give a kernel without a slow decay "
                         "component (slow_decay_s=None)")
    return kernel


# ---------------------------------------------------------------------------
# simulation and inference for one condition
# ---------------------------------------------------------------------------
def _ar_impulse_norm(g, n):
    h = np.zeros(n)
    h[0] = 1.0
    for k in range(1, n):
        h[k] = g[0] * h[k - 1] + (g[1] * h[k - 2] if g.size > 1 and k >= 2 else 0.0)
    return float(np.linalg.norm(h))


class _Condition:
    def __init__(self, kernel, frame_rate, noise_sd, photons, window_s, rng):
        self.kernel = kernel
        self.fr = frame_rate
        self.noise_sd = noise_sd
        self.photons = photons
        self.rng = rng
        self.g = kernel.ar_coefficients(frame_rate)
        self.half = max(1, int(round(window_s * frame_rate)))  # window: first frame after spike ± half
        self.pre_frames = max(int(math.ceil(0.5 * frame_rate)), 4 * self.half, 5)
        tail_s = 4.0 * kernel.decay_s
        self.post_frames = max(int(math.ceil(tail_s * frame_rate)), 2 * self.half + 5)
        self.penalty = _PENALTY_SD * noise_sd * _ar_impulse_norm(self.g, max(self.post_frames, 8))

    def largest_array(self, n_trials, fpr, intervals) -> int:
        """Elements of the largest array :func:`_run_condition` builds for this condition."""
        null = self.pre_frames + _null_windows(fpr) * (2 * self.half + 1)
        longest = self.pre_frames + int(math.ceil(max(intervals) * self.fr)) + 1 + self.post_frames
        return max(null, _single_trials(n_trials, fpr) * longest, n_trials * longest)

    def _noisy(self, clean):
        if self.photons is not None:
            # shot noise: photon counts are Poisson with mean photons * (1 + ΔF/F)
            return self.rng.poisson(self.photons * (1.0 + clean)) / self.photons - 1.0
        return clean + self.noise_sd * self.rng.standard_normal(clean.shape)

    def _deconvolve(self, traces):
        return np.stack([deconvolve_ar(row, self.g, penalty=self.penalty, baseline=0.0).spikes for row in traces])

    def null_statistics(self, n_windows):
        width = 2 * self.half + 1
        n = self.pre_frames + n_windows * width
        trace = self._noisy(np.zeros((1, n)))
        s = self._deconvolve(trace)[0, self.pre_frames:]
        return s.reshape(n_windows, width).sum(axis=1)

    def trials(self, n_trials, interval_s=None, *, extra_s=0.0):
        """Simulate trials with one spike (or two, ``interval_s`` apart); return activity and layout.

        ``extra_s`` lengthens single-spike trials as if a second spike that far on had to fit.
        """
        fr = self.fr
        extra = int(math.ceil((extra_s if interval_s is None else interval_s) * fr)) + 1
        n = self.pre_frames + extra + self.post_frames
        t1 = (self.pre_frames + self.rng.uniform(0.0, 1.0, n_trials)) / fr
        frame_t = np.arange(n) / fr
        linear = self.kernel.evaluate(frame_t[None, :] - t1[:, None])
        if interval_s is not None:
            linear = linear + self.kernel.evaluate(frame_t[None, :] - (t1 + interval_s)[:, None])
        clean = self.kernel.saturate(linear)
        return self._deconvolve(self._noisy(np.asarray(clean))), t1


def _first_frame(t, fr):
    return np.ceil(t * fr - 1e-9).astype(np.int64)


def _null_windows(fpr):
    return max(_MIN_NULL_WINDOWS, int(math.ceil(100.0 / fpr)))


def _single_trials(n_trials, fpr):
    return max(n_trials, int(math.ceil(20.0 / fpr)))


def _run_condition(kernel, fr, sd, photons, *, n_trials, fpr, window_s, intervals, resolve_fraction, rng):
    cond = _Condition(kernel, fr, sd, photons, window_s, rng)
    n_null = _null_windows(fpr)
    null_a = cond.null_statistics(n_null)
    null_b = cond.null_statistics(n_null)
    # smallest threshold whose exceedance fraction in set A is <= fpr
    threshold = float(np.quantile(null_a, 1.0 - fpr, method="higher"))
    achieved = float(np.mean(null_b > threshold))

    activity, t1 = cond.trials(n_trials)
    k0 = _first_frame(t1, fr)
    offsets = np.arange(-cond.half, cond.half + 1)
    idx = k0[:, None] + offsets[None, :]
    window = np.take_along_axis(activity, idx, axis=1)
    stat = window.sum(axis=1)
    detected = stat > threshold
    n_det = int(detected.sum())
    # each frame's activity stands for a spike in the frame interval before it: centre (k - 1/2) / fr
    times = (idx - 0.5) / fr
    with np.errstate(invalid="ignore", divide="ignore"):
        estimate = (window * times).sum(axis=1) / stat
    errors = (estimate - t1)[detected]
    timing_sd = float(errors.std(ddof=1)) if n_det >= 3 else float("nan")
    timing_se = timing_sd / math.sqrt(2 * (n_det - 1)) if n_det >= 3 else float("nan")
    bias = float(errors.mean()) if n_det >= 1 else float("nan")
    single_mass = float(stat.mean())

    resolved = np.zeros(len(intervals))
    floor = max(threshold, 0.5 * single_mass)
    singles, t_single = cond.trials(_single_trials(n_trials, fpr), extra_s=max(intervals))
    for m, interval in enumerate(intervals):
        activity, t1 = cond.trials(n_trials, interval)
        pair_split = _split_mass(activity, t1, interval, fr, cond.half)
        # a single spike must look like two (mass on both sides of the midpoint) at most at the
        # false-positive rate: calibrate the split threshold on single-spike trials of the same layout
        single_split = _split_mass(singles, t_single, interval, fr, cond.half)
        need = max(floor, float(np.quantile(single_split, 1.0 - fpr, method="higher")))
        resolved[m] = np.mean(pair_split >= need)
    return dict(threshold=threshold, achieved=achieved, detection=n_det / n_trials, timing_sd=timing_sd,
                timing_se=timing_se, bias=bias, resolved=resolved)


def _split_mass(activity, t1, interval, fr, half):
    """Smaller of the activity masses before and after the midpoint between t1 and t1 + interval.

    The window runs from ``half`` frames before the first spike's frame to ``half`` frames after the
    second's; each frame's activity stands for a spike in the frame interval before it.
    """
    first = _first_frame(t1, fr) - half
    last = _first_frame(t1 + interval, fr) + half
    width = int((last - first).max()) + 1
    idx = first[:, None] + np.arange(width)[None, :]
    inside = idx <= last[:, None]
    idx = np.minimum(idx, activity.shape[1] - 1)
    window = np.where(inside, np.take_along_axis(activity, idx, axis=1), 0.0)
    before_mid = (idx - 0.5) / fr < (t1 + 0.5 * interval)[:, None]
    first_part = np.where(before_mid, window, 0.0).sum(axis=1)
    second_part = np.where(~before_mid, window, 0.0).sum(axis=1)
    return np.minimum(first_part, second_part)


def _shortest(intervals, resolved, criterion):
    ok = resolved >= criterion
    if not ok[-1]:
        return float("nan")
    m = len(ok) - 1
    while m > 0 and ok[m - 1]:
        m -= 1
    return float(intervals[m])


def plan_detectability(*, kernel=None, indicator=None, frame_rates=DEFAULT_FRAME_RATES, noise_sd=None,
                       photons_per_frame=None, n_trials=200, false_positive_rate=0.01,
                       intervals_s=DEFAULT_INTERVALS_S, window_s=0.1, resolve_fraction=0.5,
                       seed=0) -> DetectabilityPlan:
    """Simulate how well single spikes can be detected, timed and separated.

    Parameters
    ----------
    kernel : Kernel, optional
        Single-spike response. Give at most one of ``kernel`` and
        ``indicator``; with neither, the tabulated GCaMP6s kernel is used.
    indicator : str, optional
        Indicator name (:mod:`calcium.indicators`).
    frame_rates : float or sequence of float
        Frame rates to compare, Hz.
    noise_sd : float or sequence of float, optional
        Per-frame ΔF/F noise s.d. at baseline (Gaussian).
    photons_per_frame : float or sequence of float, optional
        Alternative: detected photons per frame at baseline. The noise is
        then shot noise only: counts are Poisson with mean ``photons (1 +
        ΔF/F)``, so the ΔF/F noise s.d. at baseline is ``1 / sqrt(photons)``.
        Give at most one of ``noise_sd`` and ``photons_per_frame``; with
        neither, ``noise_sd = (0.02, 0.05, 0.1)``.
    n_trials : int
        Trials per condition for the single-spike test, and per interval for
        the two-spike test. Detection probabilities carry a binomial error of
        about ``sqrt(p (1 - p) / n_trials)``.
    false_positive_rate : float
        Target probability, in (0, 0.5), that a spike-free window crosses the
        detection threshold.
    intervals_s : sequence of float
        Inter-spike intervals for the two-spike test (sorted here).
    window_s : float
        Half-width of the detection window around a spike, in seconds (at
        least one frame either side of the first frame after the spike).
    resolve_fraction : float
        Fraction of trials that must count two spikes for an interval to be
        resolved.
    seed : int
        Seed; each (frame rate, noise) condition draws from its own stream,
        so two plans with the same seed and grid use the same noise (common
        random numbers: differences between kernels are not noise).

    Returns
    -------
    DetectabilityPlan

    Raises
    ------
    ValueError
        Bad arguments (frame rates outside 0.1 Hz-20 kHz among them); and a
        request whose largest condition would need more memory than is
        available (estimated before any simulation: 20 times its largest
        trials x frames array, a factor measured with tracemalloc).

    Notes
    -----
    Per trial, the forward model (:meth:`Kernel.evaluate` summed over the
    spikes, then :meth:`Kernel.saturate`, exactly what
    :func:`calcium.forward.predict_fluorescence` computes) gives the clean
    ΔF/F of one spike at a random sub-frame time, preceded by at least
    0.5 s and followed by four decay time constants; noise is added and the
    trace deconvolved by :func:`calcium.infer.ar.deconvolve_ar` with the
    kernel's exact AR coefficients, the known baseline (0) and a penalty of
    one noise s.d. times the norm of the AR impulse response. The inference
    is therefore idealised: the kernel, baseline and noise level are known.

    * *Detection.* The statistic is the deconvolved activity summed over the
      window (first frame after the spike ± ``round(window_s × rate)``
      frames). The threshold is the ``1 - false_positive_rate`` quantile of
      the same statistic over ``max(2000, 100 / false_positive_rate)``
      consecutive windows of a long spike-free simulated trace; the false-positive rate actually achieved is
      measured on a second, independent spike-free trace. A per-window rate
      α corresponds to about ``α / (2 window_s)`` false events per second.
    * *Timing.* The activity-weighted mean time of the window (each frame's
      activity placed half a frame before it) minus the true time, over
      detected trials; its s.d. is the timing precision.
    * *Two spikes.* Two spikes ``Δ`` apart; the window runs from the first
      spike's window start to the second's window end and is split at the
      midpoint between the spikes. The pair counts as two when both halves
      hold at least ``max(threshold, half the mean single-spike activity)``
      and more than a lone spike puts on its far side in all but a fraction
      α of single-spike trials laid out the same way (so noise that splits
      one spike's activity cannot pass for a second spike).
      The shortest resolved interval is the shortest swept ``Δ`` from which
      on every longer swept interval is resolved in at least
      ``resolve_fraction`` of trials. Two spikes less than one frame apart
      fall into different frame intervals by chance (probability
      ``Δ × rate``), so with the default criterion of 50 % an interval
      somewhat shorter than a frame can count as resolved at low rates.

    Monte-Carlo uncertainty: binomial standard errors and 95 % Wilson
    intervals for fractions, ``sd / sqrt(2 (n - 1))`` for the timing s.d.
    Cost grows as ``len(frame_rates) × len(noise) × n_trials ×
    (1 + len(intervals_s))`` deconvolutions of a few hundred frames
    (about 0.1 ms each): the defaults take a few seconds.

    References
    ----------
    Wilson EB (1927) J Am Stat Assoc 22:209-212 (intervals).
    Vogelstein JT et al. (2010) J Neurophysiol 104:3691-3704 (non-negative
    deconvolution).
    Chen T-W et al. (2013) Nature 499:295-300 (single-spike detection with
    GCaMP6 in vivo, the trade-off between sensitivity and speed).

    Examples
    --------
    >>> plan = plan_detectability(indicator="GCaMP6s", frame_rates=(30.0,), noise_sd=(0.05,),
    ...                           n_trials=50, intervals_s=(0.1, 0.5))
    >>> plan.detection.shape
    (1, 1)
    """
    kernel = _plan_kernel(kernel, indicator)
    frame_rates = tuple(check_frame_rate(rate, "frame_rates") for rate in _as_positive_tuple(frame_rates,
                                                                                            "frame_rates"))
    if noise_sd is not None and photons_per_frame is not None:
        raise ValueError("give either noise_sd or photons_per_frame, not both")
    photons = None
    if photons_per_frame is not None:
        photons = _as_positive_tuple(photons_per_frame, "photons_per_frame")
        noise = tuple(1.0 / math.sqrt(p) for p in photons)
    else:
        noise = _as_positive_tuple(DEFAULT_NOISE_SD if noise_sd is None else noise_sd, "noise_sd")
    n_trials = check_int(n_trials, "n_trials", minimum=3)
    fpr = check_positive(false_positive_rate, "false_positive_rate")
    if fpr >= 0.5:
        raise ValueError(f"false_positive_rate must be in (0, 0.5), got {false_positive_rate!r}")
    intervals = tuple(sorted(_as_positive_tuple(intervals_s, "intervals_s")))
    window_s = check_positive(window_s, "window_s")
    resolve_fraction = check_positive(resolve_fraction, "resolve_fraction")
    if resolve_fraction > 1:
        raise ValueError(f"resolve_fraction must be in (0, 1], got {resolve_fraction!r}")
    seed = check_int(seed, "seed", minimum=0)
    largest = max(_Condition(kernel, fr, 1.0, None, window_s, None).largest_array(n_trials, fpr, intervals)
                  for fr in frame_rates)
    check_memory(_PEAK_ARRAYS * 8.0 * largest,
                 f"plan_detectability with frame_rates up to {max(frame_rates):g} Hz, n_trials={n_trials} and "
                 f"false_positive_rate={fpr:g}",
                 remedy="lower the frame rates or n_trials, or raise false_positive_rate")

    shape = (len(frame_rates), len(noise))
    out = {key: np.full(shape, np.nan) for key in
           ("threshold", "achieved", "detection", "timing_sd", "timing_se", "bias", "shortest")}
    resolved = np.full(shape + (len(intervals),), np.nan)
    streams = np.random.SeedSequence(seed).spawn(shape[0] * shape[1])
    for i, fr in enumerate(frame_rates):
        for j, sd in enumerate(noise):
            rng = np.random.default_rng(streams[i * shape[1] + j])
            result = _run_condition(kernel, fr, sd, None if photons is None else photons[j], n_trials=n_trials,
                                    fpr=fpr, window_s=window_s, intervals=intervals,
                                    resolve_fraction=resolve_fraction, rng=rng)
            for key in ("threshold", "achieved", "detection", "timing_sd", "timing_se", "bias"):
                out[key][i, j] = result[key]
            resolved[i, j] = result["resolved"]
            out["shortest"][i, j] = _shortest(intervals, result["resolved"], resolve_fraction)

    det = out["detection"]
    det_low, det_high = wilson_interval(np.rint(det * n_trials), np.full(shape, n_trials))
    res_low, res_high = wilson_interval(np.rint(resolved * n_trials), np.full(resolved.shape, n_trials))
    return DetectabilityPlan(
        kernel=kernel, frame_rates=frame_rates, noise_sd=noise, photons_per_frame=photons,
        false_positive_rate=fpr, window_s=window_s, n_trials=n_trials,
        threshold=out["threshold"], achieved_false_positive_rate=out["achieved"],
        detection=det, detection_se=np.sqrt(det * (1 - det) / n_trials),
        detection_ci=np.stack([det_low, det_high], axis=-1),
        timing_sd_s=out["timing_sd"], timing_sd_se_s=out["timing_se"], timing_bias_s=out["bias"],
        intervals_s=intervals, resolved=resolved, resolved_ci=np.stack([res_low, res_high], axis=-1),
        resolve_fraction=resolve_fraction, shortest_resolved_interval_s=out["shortest"], seed=seed,
    )
