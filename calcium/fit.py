"""Fit an indicator kernel to a ΔF/F trace with electrically recorded spikes.

:func:`fit_kernel` estimates the single-spike response (rise, decay,
amplitude), the baseline and the clock offset between the electrical spike
times and the imaging frames, with bootstrap confidence intervals, the
amplitude of each isolated spike and, on request, a free-form impulse
response. :func:`check_kinetics` compares a fitted kernel with the published
kinetics of the indicator and says in plain words what a large mismatch
usually means.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy.optimize import least_squares
from scipy.stats import norm, t as student_t
from scipy.ndimage import maximum_filter1d
from scipy.signal import correlate, correlation_lags

from ._checks import (_UNSET, as_spike_times, as_traces, check_choice, check_frame_rate, check_int, check_positive,
                      renamed_argument, require_some_data)
from .forward import summed_response
from .indicators import IndicatorKinetics, get_indicator
from .kernel import DECAY_RANGE_S, Kernel
from .signal.noise import estimate_noise

__all__ = [
    "KernelFit",
    "KernelIntervals",
    "KineticsCheck",
    "KineticsRow",
    "fit_kernel",
    "check_kinetics",
    "FIT_MODELS",
    "MIN_SPIKES",
    "RESPONSE_ALPHA",
]

FIT_MODELS = ("double-exponential", "free")

# Fallback start when neither an initial kernel nor an indicator is given: a generic
# green protein indicator (common practice); the coarse grid search widens it.
_DEFAULT_START = dict(rise_s=0.05, decay_s=0.5)
# Bounds of the fit (documented in fit_kernel): rise/decay ratio and decay time.
_RATIO_BOUNDS = (1e-4, 0.95)
_DECAY_BOUNDS_S = DECAY_RANGE_S
_INTERVAL_NAMES = ("rise_s", "decay_s", "amplitude", "lag_s", "half_rise_s", "half_decay_s")
# Verdict (see fit_kernel, Notes 7). Significance level of the shifted-spikes test (common practice).
RESPONSE_ALPHA = 0.01
# Share of the signal above the noise that the spikes must explain for a usable fit, and below which the verdict
# says so. Measured on 108 simulated cells (GCaMP6f/6s/6m/jGCaMP7f-like, 15-60 Hz, single-spike SNR 2-5,
# 0.3-3 Hz, 25 % bleaching and drift, ΔF/F from delta_f_over_f): a cell's own spikes explained 0.51-1.06, except
# one fit that failed (decay 0.12 x the truth: 0.005); a train of which half the spikes were another cell's
# 0-0.56; another cell's spikes 0-0.07. Unusable below 0.3; a note below 0.6.
SIGNAL_EXPLAINED_LOW = 0.3
SIGNAL_EXPLAINED_NOTE = 0.6
# Fewest spikes in all that let a busy cell (too few isolated spikes) be fitted. Measured on 20 simulated cells
# firing at 3 Hz (gamma intervals of shape 4, none isolated; rise 50 ms, decay 0.4 s, single-spike SNR 4, 30 Hz):
# with 10 spikes the fitted decay was within 12 % and the amplitude within 7 % of the truth in 90 % of the cells;
# with 5 spikes the rise was off by up to 100 %.
MIN_SPIKES = 10
# Fewest shifted spike trains that make the test meaningful (with fewer, p cannot reach 1 / 20 = 0.05).
_MIN_NULL_SHIFTS = 19
# Frames beyond a response kept out of the null shifts: this many decay time constants (5: e**-5 < 1 %).
_RESPONSE_DECAYS = 5.0
# Shapes searched at every alignment by the test: decays on a geometric grid, three rise/decay ratios.
_TEST_DECAYS = 10
_TEST_RATIOS = (0.05, 0.3, 0.9)


# ---------------------------------------------------------------------------
# results
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class KernelIntervals:
    """Bootstrap percentile intervals of the fitted kernel.

    Attributes
    ----------
    level : float
        Confidence level (e.g. 0.9).
    n_bootstrap : int
        Bootstrap refits that succeeded (those that failed are left out).
    n_segments : int
        Number of spike-containing stretches of trace that were resampled.
    rise_s, decay_s, amplitude, lag_s, half_rise_s, half_decay_s : tuple of float
        ``(low, high)`` percentile interval of each quantity.
    samples : ndarray, shape (n_bootstrap, 6)
        Bootstrap values, columns in the order of the fields above.
    """

    level: float
    n_bootstrap: int
    n_segments: int
    rise_s: tuple
    decay_s: tuple
    amplitude: tuple
    lag_s: tuple
    half_rise_s: tuple
    half_decay_s: tuple
    samples: np.ndarray = field(repr=False)

    def covers(self, name: str, value: float) -> bool:
        """True if ``value`` lies inside the interval of quantity ``name``."""
        check_choice(name, "name", _INTERVAL_NAMES)
        low, high = getattr(self, name)
        return bool(low <= value <= high)


@dataclass(frozen=True)
class KernelFit:
    """Result of :func:`fit_kernel`.

    Attributes
    ----------
    kernel : Kernel
        Fitted double-exponential kernel (``amplitude`` = peak ΔF/F of one spike).
    lag_s : float
        Clock offset: what must be *added* to the given spike times to align
        them with the trace (frame k at ``k / frame_rate``).
    lag_initial_s : float
        The cross-correlation estimate of the lag that started the fit.
    confidence : KernelIntervals or None
        Bootstrap intervals (None when ``n_bootstrap == 0``).
    baseline : float
        Fitted ΔF/F baseline (offset of the trace).
    residual_sd : float
        S.d. of the residuals (``sqrt(RSS / (n - 5))``, finite frames only).
    r_squared : float
        Fraction of the variance of the finite frames explained by the fit.
    per_spike_amplitude : ndarray
        Peak ΔF/F of each isolated spike (kernel shape fixed, amplitude free,
        the other spikes' fitted responses subtracted): shows the spread of
        single-spike responses.
    isolated_spike_times_s : ndarray
        The isolated spikes (given times, before adding the lag).
    n_spikes : int
        Spikes used in the fit (inside the trace).
    n_isolated : int
        Spikes with no other spike within ``isolation_s`` before or after.
    n_ignored_spikes : int
        Spikes outside the trace, left out.
    n_missing_frames : int
        Missing (NaN/inf) frames, left out of the fit.
    isolation_s : float
        Isolation window used for ``n_isolated``.
    model : str
        ``"double-exponential"`` or ``"free"``.
    frame_rate : float
        Frame rate in Hz.
    converged : bool
        Whether the least-squares fit of the point estimate converged.
    impulse_response : ndarray or None
        ``model="free"``: the regularised free-form response to one spike
        (ΔF/F per frame, after the lag); None otherwise.
    impulse_time_s : ndarray or None
        Time of each ``impulse_response`` sample after the spike (mean over
        the spikes of the delay from spike to sample).
    free_r_squared : float
        R² of the free-form model (NaN when not fitted).
    burst_linearity : tuple of (n_spikes, n_events, ratio)
        For isolated groups of 1, 2, 3, ... spikes (consecutive spikes
        closer than ``burst_window_s``): how many such groups there were and
        the mean response per spike, relative to the median isolated single
        spike (the group's response is fitted with the kernel shape summed
        over its spikes). A linear indicator gives ratios near 1; ratios
        falling as the group grows are the signature of saturation.
    usable : bool
        Whether the fit may be used (for inference, a session calibration):
        the trace responds to these spikes beyond chance, they explain at
        least 30 % of its signal above the noise, the clock lag is inside
        the search range and the decay inside its bounds (see
        :func:`fit_kernel`, Notes 7). Callers that need a kernel should
        refuse an unusable fit (:meth:`require_usable`).
    verdict : str
        The reasons, in plain words, with what to do about them.
    response_p_value : float
        P-value of the spike-locked response against the same spike train
        shifted in time (NaN when the trace is too short for the test).
    signal_explained : float
        R² of the fit as a fraction of the largest R² the noise allows,
        ``1 - noise_sd**2 / var(dff)`` (noise from
        :func:`calcium.signal.estimate_noise`); near 1 when the spikes explain
        all of the trace but its white noise, low when much of the trace
        moves without them (another cell's spikes, missed spikes). NaN when
        the trace holds no variance above its noise.
    lag_at_edge : bool
        The fitted clock lag lies within half a frame of ``±max_lag_s``: the
        true offset may lie outside the search range.
    """

    kernel: Kernel
    lag_s: float
    lag_initial_s: float
    confidence: KernelIntervals | None
    baseline: float
    residual_sd: float
    r_squared: float
    per_spike_amplitude: np.ndarray = field(repr=False)
    isolated_spike_times_s: np.ndarray = field(repr=False)
    n_spikes: int = 0
    n_isolated: int = 0
    n_ignored_spikes: int = 0
    n_missing_frames: int = 0
    isolation_s: float = float("nan")
    model: str = "double-exponential"
    frame_rate: float = float("nan")
    converged: bool = True
    impulse_response: np.ndarray | None = field(default=None, repr=False)
    impulse_time_s: np.ndarray | None = field(default=None, repr=False)
    free_r_squared: float = float("nan")
    burst_linearity: tuple = ()
    usable: bool = True
    verdict: str = ""
    response_p_value: float = float("nan")
    signal_explained: float = float("nan")
    lag_at_edge: bool = False

    def require_usable(self) -> "KernelFit":
        """Return the fit, or raise ValueError with the verdict when it is not usable."""
        if not self.usable:
            raise ValueError(f"the kernel fit is not usable: {self.verdict}")
        return self

    def __str__(self) -> str:
        k = self.kernel
        lines = [f"Kernel fit ({self.model}) from {self.n_spikes} spikes ({self.n_isolated} isolated) "
                 f"at {self.frame_rate:g} Hz",
                 f"  {'usable' if self.usable else 'NOT USABLE'}: {self.verdict}",
                 f"  {k}",
                 f"  clock lag {self.lag_s * 1e3:+.1f} ms (add to the spike times"
                 f"{'; AT THE EDGE of the search range' if self.lag_at_edge else ''}); baseline {self.baseline:.4g}; "
                 f"residual s.d. {self.residual_sd:.4g}; R² {self.r_squared:.3f}"]
        if self.per_spike_amplitude.size:
            a = self.per_spike_amplitude
            lines.append(f"  isolated-spike peak ΔF/F: median {np.median(a):.4g}, "
                         f"5-95 % {np.percentile(a, 5):.4g}-{np.percentile(a, 95):.4g}")
        c = self.confidence
        if c is not None:
            lines.append(f"  {c.level:.0%} intervals ({c.n_bootstrap} bootstrap refits over {c.n_segments} segments):")
            for name, scale, unit in (("rise_s", 1e3, "ms"), ("decay_s", 1e3, "ms"), ("amplitude", 1, ""),
                                      ("lag_s", 1e3, "ms"), ("half_rise_s", 1e3, "ms"),
                                      ("half_decay_s", 1e3, "ms")):
                low, high = getattr(c, name)
                lines.append(f"    {name:13s} {low * scale:10.4g} - {high * scale:.4g} {unit}")
        if self.model == "free" and self.impulse_response is not None:
            peak = int(np.argmax(self.impulse_response))
            lines.append(f"  free-form response: peak {self.impulse_response[peak]:.4g} at "
                         f"{self.impulse_time_s[peak] * 1e3:.0f} ms; R² {self.free_r_squared:.3f}")
        return "\n".join(lines)


# ---------------------------------------------------------------------------
# model evaluation
# ---------------------------------------------------------------------------
class _Problem:
    """Trace, weights and spikes of one fit; evaluates the unit-amplitude model."""

    def __init__(self, y, finite, spikes, frame_rate):
        self.y = np.where(finite, y, 0.0)
        self.finite = finite
        self.spikes = spikes
        self.frame_rate = frame_rate
        self.n_frames = y.size
        self.end_s = self.n_frames / frame_rate

    def unit_response(self, rise_s, decay_s, lag_s, spikes=None, first=0, stop=None) -> np.ndarray:
        """Forward model of the (lag-shifted) spikes with a unit-amplitude kernel, frames first..stop-1."""
        stop = self.n_frames if stop is None else stop
        offset_s = first / self.frame_rate
        times = (self.spikes if spikes is None else spikes) + (lag_s - offset_s)
        # (spikes before the first frame still shape the first frames: summed_response keeps them)
        return summed_response(times, Kernel(rise_s, decay_s, 1.0), self.frame_rate, stop - first)

    def window(self, spikes, lag_s, decay_s):
        """Frames (first, stop) covering the response of ``spikes`` (8 decay time constants)."""
        fr = self.frame_rate
        first = int(math.floor((spikes[0] + lag_s) * fr)) - 1
        stop = int(math.ceil((spikes[-1] + lag_s + 8.0 * decay_s) * fr)) + 2
        return min(max(first, 0), self.n_frames - 1), min(max(stop, 1), self.n_frames)


def _linear_solve(u, y, w):
    """Weighted least squares of y ≈ a u + b; returns (a, b)."""
    sw = w.sum()
    mu = (w * u).sum() / sw
    my = (w * y).sum() / sw
    du = u - mu
    suu = (w * du * du).sum()
    a = (w * du * (y - my)).sum() / suu if suu > 0 else 0.0
    return a, my - a * mu


def _unpack(x):
    log_decay, log_ratio, lag = x
    decay = math.exp(log_decay)
    return decay * math.exp(log_ratio), decay, lag


def _residuals(x, problem, sqrt_w, w):
    rise, decay, lag = _unpack(x)
    u = problem.unit_response(rise, decay, lag)
    a, b = _linear_solve(u, problem.y, w)
    return sqrt_w * (problem.y - a * u - b)


def _fit_once(problem, x0, w, lag_bounds, max_nfev, tol=1e-8):
    """Variable-projection fit: (log decay, log rise/decay, lag) non-linear, (amplitude, baseline) linear."""
    sqrt_w = np.sqrt(w)
    lower = [math.log(_DECAY_BOUNDS_S[0]), math.log(_RATIO_BOUNDS[0]), lag_bounds[0]]
    upper = [math.log(_DECAY_BOUNDS_S[1]), math.log(_RATIO_BOUNDS[1]), lag_bounds[1]]
    x0 = np.clip(np.asarray(x0, float), np.array(lower) + 1e-9, np.array(upper) - 1e-9)
    res = least_squares(_residuals, x0, bounds=(lower, upper), args=(problem, sqrt_w, w),
                        x_scale=[0.3, 0.5, 0.5 / problem.frame_rate], max_nfev=max_nfev, method="trf",
                        ftol=tol, xtol=tol, gtol=tol)
    rise, decay, lag = _unpack(res.x)
    u = problem.unit_response(rise, decay, lag)
    a, b = _linear_solve(u, problem.y, w)
    return res, rise, decay, lag, a, b, u


# ---------------------------------------------------------------------------
# lag from the cross-correlation
# ---------------------------------------------------------------------------
def _rising_part(y, finite):
    d = np.diff(y)
    ok = finite[1:] & finite[:-1]
    return np.where(ok & (d > 0), d, 0.0)


def _initial_lag(problem, start: Kernel, max_lag_s):
    """Lag (s) maximising the correlation of the binned spikes with the trace's positive derivative.

    The derivative of a response peaks some time after its spike (during the
    rise); that delay is measured on the noise-free prediction of the
    starting kernel at zero lag and removed, so what remains is the clock
    offset.
    """
    fr, n = problem.frame_rate, problem.n_frames
    inside = problem.spikes[(problem.spikes >= 0) & (problem.spikes < problem.end_s)]
    counts = np.bincount(np.floor(inside * fr).astype(np.int64), minlength=n)[:n].astype(float)
    data = _rising_part(problem.y, problem.finite)
    ref = _rising_part(problem.unit_response(start.rise_s, start.decay_s, 0.0), problem.finite)
    c_data = correlate(data, counts[:-1], mode="full", method="auto")
    c_ref = correlate(ref, counts[:-1], mode="full", method="auto")
    lags = correlation_lags(data.size, counts.size - 1, mode="full")
    ref_peak = int(lags[np.argmax(c_ref)])
    max_lag_frames = max_lag_s * fr
    allowed = np.abs(lags - ref_peak) <= max_lag_frames
    best = int(lags[allowed][np.argmax(c_data[allowed])])
    return (best - ref_peak) / fr


# ---------------------------------------------------------------------------
# spikes: isolation, segments
# ---------------------------------------------------------------------------
def _isolated(spikes, isolation_s):
    gaps = np.diff(spikes)
    before = np.concatenate([[np.inf], gaps])
    after = np.concatenate([gaps, [np.inf]])
    return (before > isolation_s) & (after > isolation_s)


def _groups(spikes, gap_s):
    """Indices (start, stop) of runs of spikes with consecutive gaps <= gap_s."""
    if spikes.size == 0:
        return []
    cuts = np.flatnonzero(np.diff(spikes) > gap_s) + 1
    starts = np.concatenate([[0], cuts])
    stops = np.concatenate([cuts, [spikes.size]])
    return list(zip(starts.tolist(), stops.tolist()))


def _segment_labels(spikes_aligned, n_frames, frame_rate, gap_s):
    """Label every frame with the spike group it belongs to (cut halfway between groups)."""
    groups = _groups(spikes_aligned, gap_s)
    labels = np.zeros(n_frames, dtype=np.int64)
    for g in range(1, len(groups)):
        prev_end = spikes_aligned[groups[g - 1][1] - 1]
        next_start = spikes_aligned[groups[g][0]]
        cut = int(math.ceil(0.5 * (prev_end + next_start) * frame_rate))
        labels[min(max(cut, 0), n_frames):] = g
    # groups lying wholly outside the trace own no frame: renumber the segments that do
    _, labels = np.unique(labels, return_inverse=True)
    return labels, int(labels.max()) + 1


# ---------------------------------------------------------------------------
# free-form kernel
# ---------------------------------------------------------------------------
def _free_kernel(problem, lag_s, w, length_frames):
    """Ridge + second-difference-smoothness least squares on the spike design matrix.

    The smoothness weight is chosen by generalised cross-validation (Golub,
    Heath & Wahba 1979).
    """
    fr, n = problem.frame_rate, problem.n_frames
    times = problem.spikes + lag_s
    first = np.ceil(times * fr - 1e-9).astype(np.int64)  # first frame at or after each spike
    keep = first < n
    delay = (first[keep] / fr - times[keep])
    # sparse design: column j holds the spike count of frame m - j (spikes before frame 0 count too)
    rows = first[keep][:, None] + np.arange(length_frames)[None, :]
    cols = np.broadcast_to(np.arange(length_frames), rows.shape)
    inside = (rows >= 0) & (rows < n)
    X = sparse.csr_matrix((np.ones(int(inside.sum())), (rows[inside], cols[inside])), shape=(n, length_frames))
    X = sparse.hstack([X, np.ones((n, 1))], format="csr")  # baseline column, unpenalised
    sel = w > 0
    Xw = sparse.diags(np.sqrt(w[sel])) @ X[sel]
    yw = problem.y[sel] * np.sqrt(w[sel])
    gram = (Xw.T @ Xw).toarray()
    rhs = Xw.T @ yw
    d2 = np.diff(np.eye(length_frames), n=2, axis=0)
    smooth = np.zeros((length_frames + 1, length_frames + 1))
    smooth[:length_frames, :length_frames] = d2.T @ d2
    ridge = np.zeros_like(smooth)
    scale = np.trace(gram[:length_frames, :length_frames]) / length_frames
    ridge[:length_frames, :length_frames] = 1e-6 * scale * np.eye(length_frames)
    n_obs = yw.size
    best = None
    for lam in scale * np.logspace(-4, 3, 22):
        A = gram + lam * smooth + ridge
        try:
            coef = np.linalg.solve(A, rhs)
            dof = np.trace(np.linalg.solve(A, gram))
        except np.linalg.LinAlgError:
            continue
        rss = float(np.sum((yw - Xw @ coef) ** 2))
        gcv = n_obs * rss / max(n_obs - dof, 1.0) ** 2
        if best is None or gcv < best[0]:
            best = (gcv, coef, rss)
    _, coef, rss = best
    yf = problem.y[sel]
    wf = w[sel]
    tss = float(np.sum(wf * (yf - np.average(yf, weights=wf)) ** 2))
    mean_delay = float(delay.mean()) if delay.size else 0.0
    time_s = np.arange(length_frames) / fr + mean_delay
    return coef[:length_frames], time_s, (1.0 - rss / tss) if tss > 0 else float("nan")


# ---------------------------------------------------------------------------
# public: fit_kernel
# ---------------------------------------------------------------------------
def _start_kernel(initial):
    if initial is None:
        return Kernel(amplitude=1.0, **_DEFAULT_START), True
    if isinstance(initial, Kernel):
        return initial, False
    if isinstance(initial, str):
        return Kernel.from_indicator(initial), False
    raise ValueError(f"kernel must be None, a Kernel or an indicator name, got {type(initial).__name__}")


def _check_spikes(spike_times_s, n_frames, frame_rate, max_lag_s):
    spikes = as_spike_times(spike_times_s, "spike_times_s", stacklevel=4)
    duration = n_frames / frame_rate
    late = spikes > duration + max_lag_s
    early = spikes < -max_lag_s
    if spikes.size and late.any():
        n_late = int(late.sum())
        if n_late > 0.1 * spikes.size or spikes[-1] > 1.5 * duration + max_lag_s:
            raise ValueError(
                f"spike_times_s run to {spikes[-1]:.6g} s ({n_late} of {spikes.size} spikes after the end) but the "
                f"trace lasts only {duration:.6g} s ({n_frames} frames at frame_rate={frame_rate:g} Hz): are the "
                "trace and the spikes from the same recording, are the times in seconds, and is frame_rate right?")
    n_out = int(late.sum() + early.sum())
    if n_out:
        warnings.warn(f"{n_out} spike time(s) lie outside the trace (before {-max_lag_s:g} s or after "
                      f"{duration + max_lag_s:.6g} s, allowing max_lag_s); they are ignored", UserWarning,
                      stacklevel=3)
        spikes = spikes[~(late | early)]
    return spikes, n_out


def _grid_start(problem, start, lag0, w, lag_bounds, broad):
    """Best (x0) over a coarse grid of decay, rise/decay ratio and lag, amplitude/baseline solved exactly."""
    fr = problem.frame_rate
    if broad:
        decays = [0.1, 0.2, 0.4, 0.8, 1.6, 3.2]
        ratios = [0.03, 0.1, 0.3]
    else:
        decays = [start.decay_s * f for f in (0.5, 1.0, 2.0)]
        r0 = min(max(start.rise_s / start.decay_s, 0.01), 0.8)
        ratios = [r0 * f for f in (0.33, 1.0, 3.0) if r0 * f < _RATIO_BOUNDS[1]]
    half_width = max(3.0 / fr, 0.1)
    lags = np.arange(lag0 - half_width, lag0 + half_width + 0.25 / fr, 0.5 / fr)
    lags = lags[(lags >= lag_bounds[0]) & (lags <= lag_bounds[1])]
    if lags.size == 0:
        lags = np.array([min(max(lag0, lag_bounds[0]), lag_bounds[1])])
    best = None
    for decay in decays:
        for ratio in ratios:
            for lag in lags:
                u = problem.unit_response(decay * ratio, decay, lag)
                a, b = _linear_solve(u, problem.y, w)
                if a <= 0:
                    continue
                r = problem.y - a * u - b
                cost = float(np.sum(w * r * r))
                if best is None or cost < best[0]:
                    best = (cost, [math.log(decay), math.log(ratio), float(lag)])
    if best is None:
        raise ValueError(f"the trace does not rise after the spikes at any lag within max_lag_s="
                         f"{lag_bounds[1]:g} s: no positive single-spike response could be fitted (check that trace "
                         f"and spikes belong together; if the clocks may differ by more, widen max_lag_s)")
    return best[1]


def _group_gain(problem, kernel, lag, baseline, full_model, spikes):
    """Least-squares peak ΔF/F per spike of one group, the other spikes' fitted responses subtracted."""
    first, stop = problem.window(spikes, lag, kernel.decay_s)
    if stop <= first:
        return float("nan")
    u = problem.unit_response(kernel.rise_s, kernel.decay_s, lag, spikes=spikes, first=first, stop=stop)
    resid = problem.y[first:stop] - baseline - (full_model[first:stop] - kernel.amplitude * u)
    sel = problem.finite[first:stop] & (u > 1e-3 * max(float(u.max()), 1e-12))
    den = float(np.sum(u[sel] ** 2))
    return float(np.sum(u[sel] * resid[sel]) / den) if den > 0 else float("nan")


def _per_spike_amplitudes(problem, kernel, lag, baseline, full_model, isolated_idx):
    return np.array([_group_gain(problem, kernel, lag, baseline, full_model, problem.spikes[i:i + 1])
                     for i in isolated_idx])


def _burst_linearity(problem, kernel, lag, baseline, full_model, isolation_s, burst_window_s, single_amplitude):
    """Response per spike of isolated groups of 1, 2, 3... spikes, relative to isolated single spikes."""
    by_size = {}
    for a, b in _groups(problem.spikes, burst_window_s):
        before = problem.spikes[a] - problem.spikes[a - 1] if a > 0 else np.inf
        after = problem.spikes[b] - problem.spikes[b - 1] if b < problem.spikes.size else np.inf
        if before <= isolation_s or after <= isolation_s:
            continue
        gain = _group_gain(problem, kernel, lag, baseline, full_model, problem.spikes[a:b])
        if np.isfinite(gain):
            by_size.setdefault(b - a, []).append(gain / single_amplitude)
    return tuple((n, len(v), float(np.mean(v))) for n, v in sorted(by_size.items()))


def fit_kernel(dff, spike_times_s, frame_rate, *, model="double-exponential", kernel=_UNSET, max_lag_s=1.0,
               n_bootstrap=200, confidence=0.9, seed=0, isolation_s=None, min_isolated_spikes=3,
               min_spikes=MIN_SPIKES, free_length_s=None, burst_window_s=0.05, initial=_UNSET) -> KernelFit:
    """Fit the single-spike ΔF/F response and the clock lag from known spike times.

    Parameters
    ----------
    dff : array_like, shape (frames,) or (1, frames)
        ΔF/F of one ROI; NaN/inf frames are missing and left out of the fit.
    spike_times_s : array_like
        Electrically recorded spike times in seconds on the recording's own
        clock (sorted here, with a warning, if they were not).
    frame_rate : float
        Frames per second (frame k at ``k / frame_rate``).
    model : {"double-exponential", "free"}
        ``"free"`` additionally estimates a free-form impulse response; the
        double exponential is fitted beside it either way.
    kernel : None, Kernel or str
        Starting kernel, or an indicator name (``calcium.indicators``). With
        None a broad grid of rise and decay times is searched first.
    max_lag_s : float
        Largest clock offset considered, either sign (seconds).
    n_bootstrap : int
        Bootstrap refits for the intervals (0: no intervals).
    confidence : float
        Level of the percentile intervals, in (0, 1).
    seed : int
        Seed of the bootstrap resampling.
    isolation_s : float, optional
        A spike is isolated when no other spike lies within this time before
        or after it. Default: twice the half-decay time of the starting
        kernel (at least 0.2 s).
    min_isolated_spikes : int
        Isolated spikes that suffice for a fit.
    min_spikes : int
        Spikes in all that suffice for a fit when fewer than
        ``min_isolated_spikes`` are isolated (a busy cell): the fit sums
        overlapping responses and needs no isolated spike. ValueError when
        both are too few. Default :data:`MIN_SPIKES` (see its note).
    free_length_s : float, optional
        Length of the free-form response (``model="free"``); default four
        fitted decay time constants.
    burst_window_s : float
        Spikes closer than this form one group in ``burst_linearity``.
    initial : None, Kernel or str
        Former name of ``kernel``, accepted for one release (with a
        DeprecationWarning).

    Returns
    -------
    KernelFit

    Raises
    ------
    ValueError
        No spikes, too few isolated spikes and too few spikes in all (the
        message gives the numbers),
        spikes running far beyond the trace (different recordings or a wrong
        frame rate), a trace that never rises after the spikes, or bad
        arguments.

    Notes
    -----
    1. *Lag, first guess.* Spikes are binned per frame and cross-correlated
       (:func:`scipy.signal.correlate`) with the positive part of the trace's
       frame-to-frame difference, within ``±max_lag_s``; the delay from a
       spike to the steepest rise of the starting kernel is subtracted.
    2. *Coarse grid.* Rise, decay and lag on a small grid around the start,
       with amplitude and baseline solved exactly by linear least squares.
    3. *Non-linear least squares* (:func:`scipy.optimize.least_squares`,
       trust-region reflective, bounded) of decay (log), rise/decay ratio
       (log, in [1e-4, 0.95], so ``0 < rise < decay``) and lag (within
       ``±max_lag_s``), with amplitude and baseline projected out exactly at
       every step (variable projection, Golub & Pereyra 1973): all five
       parameters are fitted, three of them by the non-linear solver. The
       model is :func:`calcium.forward.predict_fluorescence` of the exact
       sub-frame spike times plus the lag. Missing frames get weight 0.
    4. *Intervals.* The trace is cut halfway between groups of spikes
       (spikes closer than ``isolation_s / 2`` form one group) into segments; a
       bootstrap sample draws segments with replacement (a frame's weight is
       the number of times its segment was drawn) and the fit is repeated
       from the point estimate. Intervals are percentile intervals (Efron &
       Tibshirani 1993), expanded for the number of segments ``n`` as in
       Hesterberg (2015): the tails are taken at
       ``Φ(-sqrt(n/(n-1)) t_{n-1,(1+confidence)/2})`` instead of
       ``(1-confidence)/2``, and read off the bootstrap sample with
       unbiased plotting positions (Hyndman & Fan 1996, definition 6), so
       that few refits do not narrow them. Even so, fewer than about 40
       segments give intervals that cover somewhat less often than stated
       (about 85 % for a nominal 90 % with 20-25 segments in our
       simulations); 60 or more segments are close to nominal.
    5. *Isolated spikes.* With the fitted shape, each isolated spike's
       amplitude is refitted alone after subtracting the fitted response of
       all other spikes. The fit itself never needs isolated spikes: a busy
       cell (fewer than ``min_isolated_spikes`` isolated, at least
       ``min_spikes`` in all) is fitted through the summed responses, and
       ``per_spike_amplitude`` holds whatever isolated spikes there are.
    6. *Free form.* Spikes (after the lag) are counted in the first frame
       at or after them; the response is the ridge + second-difference
       regularised least-squares solution on that design matrix, smoothness
       chosen by generalised cross-validation.
    7. *Verdict* (``usable``, ``verdict``). A permutation test (Efron &
       Tibshirani 1993, ch. 15) whose permutations are circular shifts of
       the spike train relative to the trace, which keep both the train's
       intervals and the trace's own slow fluctuations: the statistic is
       the correlation of the trace with the fitted unit response, best
       over the lags the search allowed; each shift at least a response
       (5 decay time constants) away from the fitted alignment gives one
       null value (best over the same range of lags), and ``p = (1 +
       #{null >= observed}) / (1 + #shifts)`` (missing frames count as the
       mean; the normalisation ignores how shifts move the response across
       them). The fit is usable when ``p <= RESPONSE_ALPHA`` (0.01, common
       practice), the lag is not within half a frame of ``±max_lag_s``
       (then the true offset may lie beyond: widen ``max_lag_s``) and the
       decay did not run into its bounds. With fewer than 19 shifts the
       test cannot be made and the fit is not usable. Neighbouring shifts
       give nearly equal values, so beyond the range of the null values
       the p-value is read off the extreme-value law (Gumbel 1958) fitted
       to their mean and s.d.; the larger of the two p-values is kept (on
       200 fits to independent spike trains, none had p <= 0.01, 3 had
       p <= 0.05). The spikes must also explain at least
       ``SIGNAL_EXPLAINED_LOW`` (30 %) of the trace's signal above its
       noise (``signal_explained``), and the verdict says so below
       ``SIGNAL_EXPLAINED_NOTE`` (60 %): a train that is partly another
       cell's, or misses many of this cell's spikes, explains less (see
       the measurement beside the constants).

    References
    ----------
    Golub GH, Pereyra V (1973) The differentiation of pseudo-inverses and
    nonlinear least squares problems whose variables separate. SIAM J Numer
    Anal 10:413-432.
    Efron B, Tibshirani RJ (1993) An Introduction to the Bootstrap. Chapman &
    Hall (ch. 13, percentile intervals; block resampling of dependent data;
    ch. 15, permutation tests).
    Hesterberg TC (2015) What teachers should know about the bootstrap:
    resampling in the undergraduate statistics curriculum. The American
    Statistician 69:371-386 (expanded percentile interval).
    Hyndman RJ, Fan Y (1996) Sample quantiles in statistical packages. The
    American Statistician 50:361-365.
    Golub GH, Heath M, Wahba G (1979) Generalized cross-validation as a
    method for choosing a good ridge parameter. Technometrics 21:215-223.
    Gumbel EJ (1958) Statistics of Extremes. Columbia University Press.

    Examples
    --------
    >>> from calcium.forward import NoiseModel, SpikeModel, simulate_recording
    >>> rec = simulate_recording(1, 60.0, 30.0, indicator="GCaMP6f", spikes=SpikeModel(rate_hz=0.5),
    ...                          noise=NoiseModel(noise_sd=0.02), seed=3)
    >>> fit = fit_kernel(rec.dff[0], rec.spike_times[0], 30.0, n_bootstrap=0)
    >>> abs(fit.kernel.half_decay_s / rec.kernel.half_decay_s - 1) < 0.1
    True
    """
    frame_rate = check_frame_rate(frame_rate)
    check_choice(model, "model", FIT_MODELS)
    max_lag_s = check_positive(max_lag_s, "max_lag_s")
    n_bootstrap = check_int(n_bootstrap, "n_bootstrap", minimum=0)
    confidence = check_positive(confidence, "confidence")
    if confidence >= 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence!r}")
    seed = check_int(seed, "seed", minimum=0)
    min_isolated_spikes = check_int(min_isolated_spikes, "min_isolated_spikes", minimum=1)
    min_spikes = check_int(min_spikes, "min_spikes", minimum=1)
    burst_window_s = check_positive(burst_window_s, "burst_window_s")
    if free_length_s is not None:
        free_length_s = check_positive(free_length_s, "free_length_s")
    y = as_traces(dff, "dff", min_frames=8)
    if y.ndim == 2:
        if y.shape[0] != 1:
            raise ValueError(f"dff must be one ROI, shape (frames,) or (1, frames); got shape {y.shape} "
                             "(fit each ROI separately)")
        y = y[0]
    missing = require_some_data(y, "dff")
    finite = ~missing.mask
    kernel = renamed_argument("initial", initial, "kernel", kernel, stacklevel=3)
    start, broad = _start_kernel(None if kernel is _UNSET else kernel)
    if isolation_s is None:
        isolation_s = max(2.0 * start.half_decay_s, 0.2)
    isolation_s = check_positive(isolation_s, "isolation_s")

    spikes, n_ignored = _check_spikes(spike_times_s, y.size, frame_rate, max_lag_s)
    if spikes.size == 0:
        raise ValueError(f"spike_times_s holds no spikes inside the trace; fitting a kernel needs at least "
                         f"{min_isolated_spikes} isolated spike(s) (no other spike within {isolation_s:g} s) or "
                         f"{min_spikes} spikes in all")
    isolated = _isolated(spikes, isolation_s)
    n_isolated = int(isolated.sum())
    if n_isolated < min_isolated_spikes and spikes.size < min_spikes:
        raise ValueError(f"found {n_isolated} isolated spike(s) (no other spike within isolation_s="
                         f"{isolation_s:g} s) among {spikes.size} spikes; fitting needs at least "
                         f"{min_isolated_spikes} isolated spikes, or at least min_spikes={min_spikes} spikes in all "
                         f"(overlapping responses are fitted as a sum); record longer, or lower min_spikes, "
                         f"isolation_s or min_isolated_spikes")
    w = finite.astype(float)
    if int(w.sum()) < 8:
        raise ValueError(f"dff has only {int(w.sum())} finite frames; at least 8 are needed")

    problem = _Problem(y, finite, spikes, frame_rate)
    lag_bounds = (-max_lag_s, max_lag_s)
    lag0 = _initial_lag(problem, start, max_lag_s)
    x0 = _grid_start(problem, start, lag0, w, lag_bounds, broad)
    res, rise, decay, lag, amplitude, baseline, u = _fit_once(problem, x0, w, lag_bounds, max_nfev=200)
    if amplitude <= 0:
        raise ValueError("the fitted single-spike amplitude is not positive: the trace does not rise after the "
                         "spikes (check that trace and spikes belong together, and the sign of dff)")
    kernel = Kernel(rise, decay, amplitude)
    fitted = baseline + amplitude * u
    resid = (y - fitted)[finite]
    n_obs = resid.size
    tss = float(np.sum((y[finite] - y[finite].mean()) ** 2))
    rss = float(np.sum(resid ** 2))
    residual_sd = math.sqrt(rss / max(n_obs - 5, 1))
    r_squared = 1.0 - rss / tss if tss > 0 else float("nan")

    isolated_idx = np.flatnonzero(isolated)
    amps = _per_spike_amplitudes(problem, kernel, lag, baseline, amplitude * u, isolated_idx)
    single = float(np.nanmedian(amps)) if np.any(np.isfinite(amps)) else float("nan")
    bursts = (_burst_linearity(problem, kernel, lag, baseline, amplitude * u, isolation_s, burst_window_s, single)
              if single > 0 else ())

    shapes = _test_shapes(frame_rate, y.size / frame_rate)
    p_value = _response_test(problem, shapes, lag, max_lag_s, decay)
    explained = _signal_explained(y, finite, frame_rate, r_squared)
    lag_at_edge = abs(lag) >= max_lag_s - 0.5 / frame_rate
    usable, verdict = _verdict(p_value, explained, r_squared, lag, lag_at_edge, max_lag_s, decay,
                               bool(res.status > 0), n_isolated, min_isolated_spikes, int(spikes.size))

    intervals = None
    if n_bootstrap > 0:
        intervals = _bootstrap(problem, res.x, w, lag_bounds, lag, isolation_s, n_bootstrap, confidence, seed)

    impulse = impulse_t = None
    free_r2 = float("nan")
    if model == "free":
        length_s = 4.0 * decay if free_length_s is None else free_length_s
        length_frames = max(int(math.ceil(length_s * frame_rate)), 3)
        impulse, impulse_t, free_r2 = _free_kernel(problem, lag, w, length_frames)

    return KernelFit(
        kernel=kernel, lag_s=float(lag), lag_initial_s=float(lag0), confidence=intervals,
        baseline=float(baseline), residual_sd=residual_sd, r_squared=r_squared,
        per_spike_amplitude=amps, isolated_spike_times_s=spikes[isolated_idx],
        n_spikes=int(spikes.size), n_isolated=n_isolated, n_ignored_spikes=n_ignored,
        n_missing_frames=missing.count, isolation_s=isolation_s, model=model, frame_rate=frame_rate,
        converged=bool(res.status > 0), impulse_response=impulse, impulse_time_s=impulse_t,
        free_r_squared=free_r2, burst_linearity=bursts, usable=usable, verdict=verdict,
        response_p_value=p_value, signal_explained=explained, lag_at_edge=bool(lag_at_edge),
    )


def _test_shapes(frame_rate, duration_s):
    """Kernel shapes (rise, decay) searched alike at the true and at every shifted alignment: a grid of decays
    spanning the fit's range (up to a fifth of the recording) at three rise/decay ratios. (Not the fitted shape:
    it was chosen at the true alignment, and would favour it.)"""
    low = max(_DECAY_BOUNDS_S[0], 1.0 / frame_rate)
    high = max(min(_DECAY_BOUNDS_S[1], duration_s / 5.0), low)
    decays = np.geomspace(low, high, _TEST_DECAYS)
    return [(ratio * d, d) for d in decays for ratio in _TEST_RATIOS]


def _response_test(problem, shapes, lag_s, max_lag_s, decay_s) -> float:
    """P-value of the spike-locked response against circularly shifted spike trains (Notes 7 of fit_kernel)."""
    fr, n = problem.frame_rate, problem.n_frames
    finite = problem.finite
    yc = np.where(finite, problem.y - problem.y[finite].mean(), 0.0)
    norm_y = float(np.linalg.norm(yc))
    k_low = min(int(math.ceil((-max_lag_s - lag_s) * fr)), 0)
    k_high = max(int(math.floor((max_lag_s - lag_s) * fr)), 0)
    width = k_high - k_low + 1
    apart = int(math.ceil(_RESPONSE_DECAYS * decay_s * fr))
    shifts = np.arange(width + apart, n - width - apart + 1)
    if shifts.size < _MIN_NULL_SHIFTS or not norm_y > 0:
        return float("nan")
    spectrum_y = np.fft.rfft(yc)
    best = np.full(n, -np.inf)
    # The spike train repeated one recording earlier: the response is then periodic, so that a circular shift of
    # it is exactly the response of the shifted train, and the true alignment has no build-up from zero at the
    # first frame (which would line up with the edges of a ΔF/F baseline at no other shift).
    periodic = np.concatenate([problem.spikes - problem.end_s, problem.spikes])
    for rise, decay in shapes:
        unit = problem.unit_response(rise, decay, lag_s, spikes=periodic)
        uc = unit - unit[finite].mean()
        norm_u = float(np.linalg.norm(uc))
        if not norm_u > 0:
            continue
        # c[k] = sum_t yc[t] uc[t - k] (circular): the trace against the spikes moved k frames later
        c = np.fft.irfft(spectrum_y * np.conj(np.fft.rfft(uc)), n) / (norm_y * norm_u)
        # best over each window of `width` lags, circularly: window j covers c[j .. j + width - 1]
        extended = np.concatenate([c, c[:width - 1]])
        np.maximum(best, maximum_filter1d(extended, size=width, mode="nearest")[width // 2: width // 2 + n],
                   out=best)
    observed = best[k_low % n]
    null = best[(shifts + k_low) % n]
    counted = (1 + np.count_nonzero(null >= observed)) / (1 + null.size)
    # Neighbouring shifts give nearly the same value (they share most of their alignment), so beating every one
    # of them is far less telling than their number suggests. The tail beyond the null values is read off the
    # extreme-value (Gumbel) law that a maximum over many lags and shapes follows, fitted by its mean and s.d.
    # (Gumbel 1958): with z the observed value in null s.d. above the null mean, P = 1 - exp(-exp(-(g + a z))),
    # g = 0.5772 (Euler's constant, the mean of the standard law) and a = pi / sqrt(6) (its s.d.).
    spread = float(np.std(null))
    if not spread > 0:
        return float(counted)
    z = (observed - float(np.mean(null))) / spread
    extreme = -math.expm1(-math.exp(-(np.euler_gamma + math.pi / math.sqrt(6.0) * z)))
    return float(max(counted, extreme))


def _signal_explained(y, finite, frame_rate, r_squared) -> float:
    """R² as a share of the largest R² the trace's white noise allows (NaN when that is not positive)."""
    try:
        noise = float(estimate_noise(np.where(finite, y, np.nan), frame_rate))
    except ValueError:  # too short, or no stretch of finite frames long enough for a spectrum
        return float("nan")
    ceiling = 1.0 - noise ** 2 / float(np.var(y[finite]))
    return float(r_squared / ceiling) if ceiling > 0 and np.isfinite(r_squared) else float("nan")


def _verdict(p_value, explained, r_squared, lag, lag_at_edge, max_lag_s, decay, converged, n_isolated,
             min_isolated_spikes, n_spikes):
    """(usable, verdict text) of a fit; see fit_kernel, Notes 7."""
    problems, notes = [], []
    if math.isnan(p_value):
        problems.append(f"the trace is too short to test its response against the spikes shifted in time "
                        f"(fewer than {_MIN_NULL_SHIFTS} shifts a response apart): record longer")
    elif p_value > RESPONSE_ALPHA:
        problems.append(f"the trace does not respond to these spikes more than to the same spikes shifted in time "
                        f"(p = {p_value:.2g} > {RESPONSE_ALPHA:g}; R² {r_squared:.3f}): are they this cell's spikes, "
                        f"and on this trace's clock?")
    if lag_at_edge:
        problems.append(f"the clock lag {lag * 1e3:+.0f} ms sits at the edge of the search range (max_lag_s="
                        f"{max_lag_s:g} s), so the true offset may lie beyond it: refit with a wider max_lag_s "
                        f"(e.g. {2 * max_lag_s:g})")
    low, high = _DECAY_BOUNDS_S
    if not (low * 1.01 < decay < high * 0.99):
        problems.append(f"the decay ran into the bound of the fit ({decay:.4g} s; bounds {low:g}-{high:g} s): "
                        f"this trace does not determine the kinetics")
    if np.isfinite(explained) and explained < SIGNAL_EXPLAINED_NOTE:
        text = (f"the spikes explain only {explained:.0%} of the trace's signal above its noise (R² "
                f"{r_squared:.3f}): much of the trace moves without them (another cell's spikes, spikes missing "
                f"from the recording, or a fit that went wrong?)")
        if explained < SIGNAL_EXPLAINED_LOW:
            problems.append(text.replace(" (R²", f", less than the {SIGNAL_EXPLAINED_LOW:.0%} needed (R²", 1))
        else:
            notes.append(text)
    if not converged:
        notes.append("the least-squares fit stopped before it converged")
    if n_isolated < min_isolated_spikes:
        notes.append(f"busy cell: {n_isolated} isolated spike(s), fitted through the summed responses of all "
                     f"{n_spikes} spikes")
    if problems:
        return False, "; ".join(problems + notes)
    text = f"responds to the spikes beyond chance (p = {p_value:.2g} against shifted spike trains)"
    if np.isfinite(explained):
        text += f"; the spikes explain {min(explained, 1.0):.0%} of the signal above the noise"
    return True, "; ".join([text] + notes)


def _expanded_tail(level, n_units):
    """Tail probability of the expanded percentile interval (Hesterberg 2015).

    The plain percentile interval is too narrow for few resampled units: it
    omits the factor ``sqrt(n / (n - 1))`` of the variance and uses normal
    rather than Student-t quantiles. The expanded interval takes the
    percentiles at ``Φ(-sqrt(n / (n - 1)) t_{n-1, (1+level)/2})`` instead.
    """
    z = math.sqrt(n_units / (n_units - 1)) * student_t.ppf(0.5 + level / 2, n_units - 1)
    return float(norm.cdf(-z))


def _bootstrap(problem, x_hat, w, lag_bounds, lag, isolation_s, n_bootstrap, level, seed):
    labels, n_segments = _segment_labels(problem.spikes + lag, problem.n_frames, problem.frame_rate,
                                         0.5 * isolation_s)
    if n_segments < 2:
        warnings.warn(f"only {n_segments} spike-containing segment(s): no bootstrap intervals", UserWarning,
                      stacklevel=3)
        return None
    if n_segments < 10:
        warnings.warn(f"only {n_segments} spike-containing segments to resample: the bootstrap intervals will "
                      "be too narrow; record longer for reliable intervals", UserWarning, stacklevel=3)
    rng = np.random.default_rng(seed)
    samples = []
    for _ in range(n_bootstrap):
        draws = np.bincount(rng.integers(0, n_segments, n_segments), minlength=n_segments)
        wb = w * draws[labels]
        if wb.sum() < 8:
            continue
        try:
            _, rise, decay, lag_b, a, _, _ = _fit_once(problem, x_hat, wb, lag_bounds, max_nfev=60, tol=1e-6)
        except (ValueError, np.linalg.LinAlgError, FloatingPointError):
            continue
        if not (a > 0):
            continue
        k = Kernel(rise, decay, a)
        samples.append((rise, decay, a, lag_b, k.half_rise_s, k.half_decay_s))
    if len(samples) < 2:
        warnings.warn("the bootstrap refits failed: no intervals", UserWarning, stacklevel=3)
        return None
    samples = np.array(samples)
    tail = _expanded_tail(level, n_segments)
    q = 100 * np.array([tail, 1 - tail])
    bounds = {name: tuple(float(v) for v in np.percentile(samples[:, i], q, method="weibull"))
              for i, name in enumerate(_INTERVAL_NAMES)}
    return KernelIntervals(level=level, n_bootstrap=len(samples), n_segments=n_segments, samples=samples, **bounds)


# ---------------------------------------------------------------------------
# public: check_kinetics
# ---------------------------------------------------------------------------
# Tolerated ratio fitted/published (our own choice, documented in check_kinetics): single-spike
# kinetics vary about two-fold between cells and preparations, amplitudes about three-fold.
TIME_RATIO_LIMITS = (0.5, 2.0)
AMPLITUDE_RATIO_LIMITS = (1 / 3, 3.0)
# Response per spike of a group, relative to an isolated spike, below which the group counts as
# sub-linear (saturating); our own choice.
_SUBLINEAR = 0.8


@dataclass(frozen=True)
class KineticsRow:
    """One compared quantity.

    Attributes
    ----------
    quantity : str
        ``"half-rise"`` (or ``"time to peak"`` when that is what was
        published), ``"half-decay"`` or ``"single-spike ΔF/F"``.
    fitted, published : float
        Seconds for times, a fraction for ΔF/F.
    ratio : float
        ``fitted / published``.
    limits : tuple of float
        Allowed range of ``ratio``.
    ok : bool
        ``limits[0] <= ratio <= limits[1]``.
    """

    quantity: str
    fitted: float
    published: float
    ratio: float
    limits: tuple
    ok: bool


@dataclass(frozen=True)
class KineticsCheck:
    """Fitted kinetics beside the published ones.

    Attributes
    ----------
    indicator : str
        Indicator name.
    rows : tuple of KineticsRow
    ok : bool
        True when every row is within its limits.
    messages : tuple of str
        Plain-words likely causes of what lies outside; may also hold a
        saturation note while ``ok`` is True.
    source : str
        Where the published values come from (with its caveats).
    """

    indicator: str
    rows: tuple
    ok: bool
    messages: tuple
    source: str

    def __str__(self) -> str:
        header = ("quantity", "fitted", "published", "ratio", "allowed", "")
        table = [header]
        for r in self.rows:
            if r.quantity.endswith("ΔF/F"):
                fitted, published = f"{r.fitted * 100:.3g} %", f"{r.published * 100:.3g} %"
            else:
                fitted, published = f"{r.fitted * 1e3:.4g} ms", f"{r.published * 1e3:.4g} ms"
            table.append((r.quantity, fitted, published, f"{r.ratio:.2f}",
                          f"{r.limits[0]:.2g}-{r.limits[1]:.2g}", "ok" if r.ok else "OUTSIDE"))
        widths = [max(len(row[c]) for row in table) for c in range(len(header))]
        lines = [f"Kinetics compared with published {self.indicator} values"]
        lines += ["  " + "  ".join(cell.ljust(wd) for cell, wd in zip(row, widths)).rstrip() for row in table]
        lines.append(f"  source: {self.source}")
        if self.ok:
            lines.append("All within the expected range.")
        if self.messages:
            lines.append("Notes:" if self.ok else "Likely causes:")
            lines += [f"  - {m}" for m in self.messages]
        return "\n".join(lines)


def check_kinetics(fit_or_kernel, indicator, *, temperature_c=None) -> KineticsCheck:
    """Compare fitted kinetics with the published values of an indicator.

    Parameters
    ----------
    fit_or_kernel : KernelFit or Kernel
        The fitted kernel (a :class:`KernelFit` also brings its burst data).
    indicator : str or IndicatorKinetics
        Indicator name (see :func:`calcium.indicators.get_indicator`) or row.
    temperature_c : float, optional
        Temperature of the recording, if known; used to explain slow decays.

    Returns
    -------
    KineticsCheck

    Notes
    -----
    Compared: the half-rise time (or the time to peak, whichever the table
    gives), the half-decay time and the single-spike peak ΔF/F. The ranges
    are our own choice: times within a factor 2 of the published value
    (ratio in [1/2, 2]), the amplitude within a factor 3 (ratio in
    [1/3, 3]); single-spike responses vary that much between cells and
    preparations. Likely causes (rules of thumb, common practice):

    * rise and decay off by the same factor (within 25 % of each other) in
      the same direction: a wrong frame rate in the metadata, which scales
      every time alike;
    * amplitude far lower: heavy neuropil contamination or a wrong F0;
    * groups of two or more spikes responding less than 0.8 × an isolated
      spike per spike (``KernelFit.burst_linearity``, at least two groups
      of that size), usually with a lower amplitude and a longer decay:
      saturation of the indicator. This note can appear while every row is
      within its range (``ok`` only reflects the rows);
    * decay longer than the in-vivo value with the recording colder than the
      published one (e.g. a slice at room temperature): temperature;
    * amplitude far higher: F0 too low (e.g. background subtracted twice).

    Examples
    --------
    >>> from calcium.kernel import Kernel
    >>> check_kinetics(Kernel.from_indicator("GCaMP6f"), "GCaMP6f").ok
    True
    """
    if isinstance(fit_or_kernel, KernelFit):
        kernel, fit = fit_or_kernel.kernel, fit_or_kernel
    elif isinstance(fit_or_kernel, Kernel):
        kernel, fit = fit_or_kernel, None
    else:
        raise ValueError(f"fit_or_kernel must be a KernelFit or a Kernel, got {type(fit_or_kernel).__name__}")
    row = indicator if isinstance(indicator, IndicatorKinetics) else get_indicator(indicator)
    if temperature_c is not None:
        temperature_c = float(temperature_c)
        if not math.isfinite(temperature_c):
            raise ValueError(f"temperature_c must be a finite number, got {temperature_c!r}")

    def make(quantity, fitted, published, limits):
        ratio = fitted / published
        return KineticsRow(quantity, float(fitted), float(published), float(ratio), limits,
                           bool(limits[0] <= ratio <= limits[1]))

    rows = []
    if row.half_rise_s is not None:
        rows.append(make("half-rise", kernel.half_rise_s, row.half_rise_s, TIME_RATIO_LIMITS))
    else:
        rows.append(make("time to peak", kernel.time_to_peak_s, row.time_to_peak_s, TIME_RATIO_LIMITS))
    rows.append(make("half-decay", kernel.half_decay_s, row.half_decay_s, TIME_RATIO_LIMITS))
    rows.append(make("single-spike ΔF/F", kernel.amplitude, row.dff_single_spike, AMPLITUDE_RATIO_LIMITS))
    rise, decay, amp = rows
    messages = _likely_causes(rise, decay, amp, row, fit, temperature_c)
    return KineticsCheck(indicator=row.name, rows=tuple(rows), ok=all(r.ok for r in rows),
                         messages=tuple(messages), source=row.source)


def _likely_causes(rise, decay, amp, row, fit, temperature_c):
    messages = []
    same_factor = (not rise.ok and not decay.ok and (rise.ratio > 1) == (decay.ratio > 1)
                   and abs(math.log(rise.ratio / decay.ratio)) < math.log(1.25))
    if same_factor:
        factor = math.sqrt(rise.ratio * decay.ratio)
        messages.append(f"rise and decay are both {factor:.2g} times the published values: a wrong frame rate in "
                        f"the metadata scales every time by the same factor (true frame rate ≈ "
                        f"{factor:.2g} × the one given?)")
    sublinear = None
    if fit is not None:
        multi = [(n, ratio) for n, count, ratio in fit.burst_linearity if n >= 2 and count >= 2]
        low = [(n, ratio) for n, ratio in multi if ratio < _SUBLINEAR]
        if low:
            sublinear = max(low)  # the largest group that responds sub-linearly
    if sublinear is not None:
        n, ratio = sublinear
        extra = []
        if amp.ratio < 1:
            extra.append(f"single-spike ΔF/F {amp.ratio:.2g} × published")
        if decay.ratio > 1:
            extra.append(f"decay {decay.ratio:.2g} × published")
        extra_text = f" ({', '.join(extra)})" if extra else ""
        messages.append(f"groups of {n} spikes give only {ratio:.2g} × the response per spike of an isolated "
                        f"spike{extra_text}: the indicator is probably saturating (high expression or high "
                        "resting calcium), which lowers the fitted amplitude and lengthens the fitted decay; "
                        "fit isolated spikes only or model the saturation")
    if not amp.ok and amp.ratio < 1 and sublinear is None:
        messages.append(f"single-spike ΔF/F is {amp.ratio:.2g} × the published value: heavy neuropil "
                        "contamination (background diluting the signal) or a wrong F0 (baseline "
                        "overestimated) are the usual causes")
    elif not amp.ok and amp.ratio > 1:
        messages.append(f"single-spike ΔF/F is {amp.ratio:.2g} × the published value: F0 is probably too low "
                        "(e.g. background subtracted twice, or an offset in the raw data)")
    if not decay.ok and decay.ratio > 1 and not same_factor:
        published_t = row.temperature_c
        if temperature_c is not None and published_t is not None and temperature_c < published_t - 3:
            messages.append(f"the decay is {decay.ratio:.2g} × the published value, measured at "
                            f"{published_t:g} °C while this recording was at {temperature_c:g} °C: indicator "
                            "kinetics slow down in the cold (a different temperature than the published one)")
        elif sublinear is None:
            where = f" ({row.conditions}, {published_t:g} °C)" if published_t is not None else ""
            messages.append(f"the decay is {decay.ratio:.2g} × the published value{where}: a lower temperature "
                            "than the published one (e.g. a slice at room temperature) slows it; so do "
                            "saturation during bursts and a different cell type")
    if not decay.ok and decay.ratio < 1 and not same_factor:
        messages.append(f"the decay is {decay.ratio:.2g} × the published value: check the frame rate, and that "
                        "the trace is not high-pass filtered or detrended too aggressively")
    if not rise.ok and not same_factor:
        if rise.ratio > 1:
            messages.append(f"the rise is {rise.ratio:.2g} × the published value: a low frame rate or long "
                            "exposure smears the onset, a clock jitter between spikes and frames blurs it, "
                            "or the frame rate in the metadata is wrong")
        else:
            messages.append(f"the rise is {rise.ratio:.2g} × the published value: a fast rise cannot be "
                            "resolved below about one frame; at low frame rates this is expected")
    return messages
