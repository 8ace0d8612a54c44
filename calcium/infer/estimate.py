r"""Automatic parameters of the deconvolution: noise level, AR coefficients, penalty.

* Noise: the standard deviation of the white part of the trace, from the
  upper band of its power spectrum (:func:`calcium.signal.estimate_noise`).
* AR coefficients: the autocovariance of the calcium signal obeys the
  Yule-Walker equations of its AR model; white noise only adds to the lag-0
  term, so the equations are written with lags >= 1 and the noise variance
  taken off lag 0 (Pnevmatikakis et al. 2016 [1]_).  The estimate is then
  refined by fitting: the decay (and rise) that lets the detected events,
  refitted without penalty and with non-negative sizes, explain the trace
  best.
* Penalty: the :math:`\lambda` at which the residual matches the noise,
  :math:`\sum_t w_t (y_t - b - c_t)^2 = \sigma^2 N` (the noise-constrained
  problem of [1]_, solved through its penalised form).  On a fixed support
  the solution is affine in :math:`\lambda`, so the residual is a quadratic
  in :math:`\lambda` that is solved exactly; a safeguarded iteration of such
  steps (warm-started on the previous support) converges in a few solves,
  as suggested by Friedrich et al. (2017) [2]_.

References
----------
.. [1] Pnevmatikakis, E. A. et al. (2016). Simultaneous denoising,
   deconvolution, and demixing of calcium imaging data. Neuron 89, 285-299.
.. [2] Friedrich, J., Zhou, P. & Paninski, L. (2017). Fast online
   deconvolution of calcium imaging data. PLoS Comput. Biol. 13(3),
   e1005423.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit
from scipy.optimize import minimize, minimize_scalar

from .._checks import as_traces, check_frame_rate, check_int, check_positive
from .ar import (ARDeconvolution, _impulse, _objective, _pool_sums, _pools_solve, _prepare_weights, _solve,
                 _starts_from_support, _tolerances, _Work, _check_baseline, _OK, check_ar_coefficients)

__all__ = ["estimate_noise_sd", "estimate_ar_coefficients", "penalty_for_noise", "PenaltySearch",
           "signal_detected", "MAX_ESTIMATION_FRAMES"]

#: Noise and kinetics are estimated from at most this many frames (a central
#: block of longer traces): plenty for both, and it bounds the cost.
MAX_ESTIMATION_FRAMES = 30000
#: The refinement of the kinetics (many exact fits) uses at most this many frames.
MAX_KINETICS_FRAMES = 10000
_RTOL_RESIDUAL = 5e-3  # the noise level itself is rarely known better than to a few per cent
_MAX_PENALTY_STEPS = 40


def _central_block(n: int, max_frames: int) -> slice:
    if n <= max_frames:
        return slice(0, n)
    start = (n - max_frames) // 2
    return slice(start, start + max_frames)


def estimate_noise_sd(y, frame_rate, *, max_frames=MAX_ESTIMATION_FRAMES) -> float:
    """Noise standard deviation of a trace (white part, from the power spectrum).

    Calls :func:`calcium.signal.estimate_noise` on at most ``max_frames``
    frames (the central block); NaN/inf frames are handled there.

    Parameters
    ----------
    y : array_like, shape (T,)
    frame_rate : float
    max_frames : int, default 30000

    Returns
    -------
    float
    """
    from ..signal.noise import MIN_FRAMES, estimate_noise

    y = as_traces(y, "y")
    if y.ndim != 1:
        raise ValueError(f"y must be one trace of shape (frames,), got shape {y.shape}")
    frame_rate = check_frame_rate(frame_rate)
    max_frames = check_int(max_frames, "max_frames", minimum=MIN_FRAMES)
    if y.size < MIN_FRAMES:
        raise ValueError(f"the trace has {y.size} frames, too few to estimate its noise level from the spectrum "
                         f"(at least {MIN_FRAMES}); give noise_sd")
    return float(estimate_noise(y[_central_block(y.size, max_frames)], frame_rate))


@njit(cache=True)
def _autocovariance(y, observed, max_lag):
    """Autocovariance at lags 0..max_lag over pairs of observed frames (mean removed)."""
    T = y.shape[0]
    total = 0.0
    count = 0
    for t in range(T):
        if observed[t]:
            total += y[t]
            count += 1
    mean = total / max(count, 1)
    out = np.zeros(max_lag + 1)
    for k in range(max_lag + 1):
        acc = 0.0
        pairs = 0
        for t in range(T - k):
            if observed[t] and observed[t + k]:
                acc += (y[t] - mean) * (y[t + k] - mean)
                pairs += 1
        out[k] = acc / pairs if pairs > 0 else 0.0
    return out


def signal_detected(y, noise_sd, *, lags=3, z=5.0, max_frames=MAX_ESTIMATION_FRAMES) -> bool:
    r"""Whether a trace holds more than white noise: correlated signal at short lags.

    For white noise of s.d. :math:`\sigma` the sample autocovariances at
    lags :math:`k \ge 1` are about normal with mean 0 and s.d.
    :math:`\sigma^2/\sqrt{N}` (Bartlett 1946 [1]_); calcium transients make
    them large and positive.  True when the mean of lags 1..``lags`` exceeds
    ``z`` such standard deviations.

    References
    ----------
    .. [1] Bartlett, M. S. (1946). On the theoretical specification and
       sampling properties of autocorrelated time-series. J. R. Stat. Soc.
       Suppl. 8, 27-41.
    """
    y = as_traces(y, "y")
    sigma = check_positive(noise_sd, "noise_sd")
    yb = y[_central_block(y.size, max_frames)]
    yc, w, unit, n_obs = _prepare_weights(yb, None)
    observed = np.ones(yc.size, dtype=bool) if unit else w > 0
    lags = min(lags, max(1, yc.size // 4))
    gamma = _autocovariance(yc, observed, lags)
    mean_cov = float(np.mean(gamma[1:lags + 1]))
    return mean_cov > z * sigma ** 2 / math.sqrt(n_obs * lags)


def _yule_walker(gamma: np.ndarray, order: int, noise_var: float) -> np.ndarray:
    """AR coefficients from autocovariances, lag 0 corrected for white noise.

    Equations gamma(k) = sum_i g_i gamma(|k - i|) for k = 1..len(gamma)-1,
    solved in the least-squares sense (Pnevmatikakis et al. 2016).
    """
    g0 = gamma.copy()
    g0[0] = max(gamma[0] - noise_var, 1e-3 * gamma[0])
    lags = np.arange(1, gamma.size)
    M = np.array([[g0[abs(k - i)] for i in range(1, order + 1)] for k in lags])
    coeffs, *_ = np.linalg.lstsq(M, g0[lags], rcond=None)
    return coeffs


def _roots_to_coefficients(decay_root: float, rise_root: float) -> np.ndarray:
    if rise_root <= 0.0:
        return np.array([decay_root])
    return np.array([decay_root + rise_root, -decay_root * rise_root])


def _times_from_coefficients(g: np.ndarray, frame_rate: float):
    """(rise_s, decay_s) of AR coefficients with real roots in [0, 1); None if they have none."""
    if g.size == 1:
        d = float(g[0])
        return (0.0, -1.0 / (frame_rate * math.log(d))) if 0.0 < d < 1.0 else None
    disc = g[0] ** 2 + 4.0 * g[1]
    if disc < 0:
        return None
    d = 0.5 * (g[0] + math.sqrt(disc))
    r = 0.5 * (g[0] - math.sqrt(disc))
    if not (0.0 < d < 1.0 and 0.0 <= r < d):
        return None
    rise = 0.0 if r <= 0.0 else -1.0 / (frame_rate * math.log(r))
    return rise, -1.0 / (frame_rate * math.log(d))


def _coefficients_from_times(rise_s: float, decay_s: float, frame_rate: float, order: int) -> np.ndarray:
    d = math.exp(-1.0 / (decay_s * frame_rate))
    if order == 1:
        return np.array([d])
    r = math.exp(-1.0 / (rise_s * frame_rate)) if rise_s > 0 else 0.0
    return _roots_to_coefficients(d, r)


@dataclass(frozen=True)
class PenaltySearch:
    """Result of :func:`penalty_for_noise`.

    Attributes
    ----------
    penalty : float
        The penalty at which the residual matches the noise (or 0 / the
        smallest penalty with no spike, when no penalty can match it).
    deconvolution : ARDeconvolution
        The solution at that penalty.
    residual : float
        Σ w (y − b − c)² at the solution.
    target : float
        σ² N (N the number of weighted frames).
    solves : int
        Deconvolutions run during the search.
    """

    penalty: float
    deconvolution: ARDeconvolution
    residual: float
    target: float
    solves: int


@njit(cache=True)
def _weighted_rss(y, w, unit, b, c):
    acc = 0.0
    for t in range(y.shape[0]):
        r = y[t] - b - c[t]
        acc += r * r if unit else w[t] * r * r
    return acc


@njit(cache=True)
def _affine_terms(y, w, unit, b_y, c_y, b_a, c_a):
    """Coefficients of RSS(lam) = sum w (r0 - lam d)^2 with r0 = y - b_y - c_y, d = b_a + c_a."""
    s_dd = 0.0
    s_rd = 0.0
    s_rr = 0.0
    for t in range(y.shape[0]):
        wt = 1.0 if unit else w[t]
        r0 = y[t] - b_y - c_y[t]
        d = b_a + c_a[t]
        s_dd += wt * d * d
        s_rd += wt * r0 * d
        s_rr += wt * r0 * r0
    return s_dd, s_rd, s_rr


def _max_useful_penalty(y, w, unit, g, fit_b, b):
    """Smallest penalty at which the solution has no spike at all, and the baseline there."""
    if fit_b:
        b = float(np.mean(y)) if unit else float(np.sum(w * y) / np.sum(w))
    r = (y - b) if unit else w * (y - b)
    # z_t = sum_{tau >= t} h_{tau - t} r_tau: the anti-causal AR filter of the residual
    from scipy.signal import lfilter

    z = lfilter([1.0], np.concatenate([[1.0], -g]), r[::-1])[::-1]
    return max(float(np.max(z)), 0.0), b


class _PenaltyEngine:
    """Solves at a sequence of penalties, warm-starting on the previous support."""

    def __init__(self, y, w, unit, g, baseline, work=None):
        self.y, self.w, self.unit, self.g = y, w, unit, g
        self.baseline = baseline
        self.fit_b = isinstance(baseline, str)
        self.T = y.size
        self.work = work or _Work(self.T)
        self.g1 = float(g[0])
        self.g2 = float(g[1]) if g.size > 1 else 0.0
        self.h = _impulse(self.g1, self.g2, self.T + 1)
        self.zeros = np.zeros(self.T)
        self.support = None
        self.b = None
        self.solves = 0

    def solve(self, lam):
        c, s, b, its, conv = _solve(self.y, self.w, self.unit, self.g, lam, self.baseline, 0.0,
                                    b0=self.b, support=self.support, work=self.work)
        self.solves += 1
        self.support = s > 0
        self.support[0] = s[0] > 0
        self.b = b
        rss = _weighted_rss(self.y, self.w, self.unit, b, c)
        return c, s, b, its, conv, rss

    def affine_penalty(self, target):
        """Penalty at which the residual, with the current support held, equals ``target``."""
        on = self.support
        work = self.work
        T = self.T
        _, _, tiny = _tolerances(self.y, self.w, self.unit, 1.0)
        n = _starts_from_support(on, work.starts)
        c_y = np.empty(T)
        c_a = np.empty(T)
        b_fixed = 0.0 if self.fit_b else float(self.baseline)
        _pool_sums(self.y, self.w, self.unit, self.g1, self.g2, self.h, 0.0, b_fixed, self.fit_b, work.starts, n,
                   *work.sums)
        b_y, st1, _ = _pools_solve(T, self.g1, self.g2, self.h, work.starts, n, on[0], self.fit_b, b_fixed,
                                   *work.sums, *work.dp, c_y, tiny)
        _pool_sums(self.zeros, self.w, self.unit, self.g1, self.g2, self.h, 1.0, 0.0, self.fit_b, work.starts, n,
                   *work.sums)
        b_a, st2, _ = _pools_solve(T, self.g1, self.g2, self.h, work.starts, n, on[0], self.fit_b, 0.0,
                                   *work.sums, *work.dp, c_a, tiny)
        if st1 != _OK or st2 != _OK:
            return None
        if not self.fit_b:
            b_y, b_a = b_fixed, 0.0
        s_dd, s_rd, s_rr = _affine_terms(self.y, self.w, self.unit, b_y, c_y, b_a, c_a)
        # s_dd lam^2 - 2 s_rd lam + s_rr = target; the residual grows with lam on the branch we want
        if s_dd <= 0:
            return None
        disc = s_rd * s_rd - s_dd * (s_rr - target)
        if disc < 0:
            return None
        return (s_rd + math.sqrt(disc)) / s_dd


def _search_penalty(y, w, unit, g, noise_sd, baseline, n_obs, *, rtol=_RTOL_RESIDUAL, work=None):
    """Noise-matching penalty on prepared inputs; returns (lam, c, s, b, iterations, converged, rss, target, solves)."""
    target = noise_sd ** 2 * n_obs
    fit_b = isinstance(baseline, str)
    engine = _PenaltyEngine(y, w, unit, g, baseline, work)
    lam_max, b_quiet = _max_useful_penalty(y, w, unit, g, fit_b, 0.0 if fit_b else float(baseline))
    rss_quiet = float(_weighted_rss(y, w, unit, b_quiet, np.zeros(y.size)))
    if rss_quiet <= target or lam_max == 0.0:
        # even no spike at all leaves a residual within the noise: a quiet trace (a hair above the
        # smallest spike-free penalty, where the optimum is unique)
        lam_max = lam_max * (1.0 + 1e-9) + 1e-300
        c, s, b, its, conv, rss = engine.solve(lam_max)
        return lam_max, c, s, b, its, conv, rss, target, engine.solves
    lo, hi = 0.0, lam_max
    # first guess: twice the s.d. of the noise seen through the kernel (where the search usually ends)
    h = engine.h
    lam = min(2.0 * noise_sd * math.sqrt(float(np.sum(h[:min(h.size, 10 * y.size)] ** 2))), 0.5 * lam_max)
    total_its = 0
    best = None
    for _ in range(_MAX_PENALTY_STEPS):
        c, s, b, its, conv, rss = engine.solve(lam)
        total_its += its
        gap = (rss - target) / target
        if best is None or abs(gap) < abs(best[-1]):
            best = (lam, c, s, b, conv, rss, gap)
        if abs(gap) <= rtol:
            break
        if rss < target:
            lo = lam
        else:
            hi = lam
        step = engine.affine_penalty(target)
        if step is not None and lo < step < hi:
            lam = step
        else:
            lam = 0.5 * (lo + hi) if lo > 0 else hi * 0.1 if hi > 0 else 0.0
        if hi - lo <= 1e-12 * hi:
            break
    lam, c, s, b, conv, rss, _ = best
    if abs(best[-1]) > rtol and lo == 0.0 and rss > target:
        # even the least-penalised fit leaves more than the noise: penalty 0
        c, s, b, its, conv, rss = engine.solve(0.0)
        lam = 0.0
    return lam, c, s, b, total_its, conv, rss, target, engine.solves


def penalty_for_noise(y, coefficients, noise_sd, *, baseline="fit", weights=None, rtol=_RTOL_RESIDUAL) -> PenaltySearch:
    r"""The penalty whose solution leaves a residual equal to the noise.

    Finds :math:`\lambda` with :math:`\sum_t w_t (y_t - b - c_t)^2 = \sigma^2 N`
    (relative tolerance ``rtol``), N the number of weighted frames, by exact
    quadratic steps on the current support with bisection as a safeguard.

    Parameters
    ----------
    y : array_like, shape (T,)
    coefficients : array_like, length 1 or 2
        AR coefficients.
    noise_sd : float
        :math:`\sigma > 0`.
    baseline : float or "fit", default "fit"
    weights : array_like, optional
    rtol : float, default 5e-3

    Returns
    -------
    PenaltySearch

    Notes
    -----
    If even the fit without penalty leaves more residual than
    :math:`\sigma^2 N`, the penalty is 0; if the trace with no spike at all
    already fits within the noise, the penalty is the smallest one that
    gives no spike.

    References
    ----------
    .. [1] Pnevmatikakis, E. A. et al. (2016). Neuron 89, 285-299.
    .. [2] Friedrich, J., Zhou, P. & Paninski, L. (2017). PLoS Comput. Biol.
       13(3), e1005423.
    """
    y = as_traces(y, "y")
    if y.ndim != 1 or y.size < 3:
        raise ValueError(f"y must be one trace of at least 3 frames, got shape {y.shape}")
    g = check_ar_coefficients(coefficients)
    sigma = check_positive(noise_sd, "noise_sd")
    baseline = _check_baseline(baseline)
    rtol = check_positive(rtol, "rtol")
    y, w, unit, n_obs = _prepare_weights(y, weights)
    lam, c, s, b, its, conv, rss, target, solves = _search_penalty(y, w, unit, g, sigma, baseline, n_obs, rtol=rtol)
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    objective = float(_objective(y, w, unit, g1, g2, lam, b, c, s))
    result = ARDeconvolution(calcium=c, spikes=s, baseline=float(b), penalty=float(lam), objective=objective,
                             iterations=int(its), converged=bool(conv), coefficients=g.copy())
    return PenaltySearch(penalty=float(lam), deconvolution=result, residual=float(rss), target=float(target),
                         solves=int(solves))


# --------------------------------------------------------------------------- kinetics
def _event_support(s: np.ndarray, min_size: float) -> np.ndarray:
    """Frames of the events (runs of adjacent non-zero spikes) whose total is >= min_size."""
    from .counts import activity_events

    keep = np.zeros(s.shape, dtype=bool)
    starts, stops = activity_events(s)
    totals = np.add.reduceat(s, starts) if starts.size else np.zeros(0)
    for a, b, total in zip(starts, stops, totals):
        if total >= min_size:
            keep[a:b] = True
    return keep


def _support_fit_rss(y, w, unit, g, support, b0, work):
    """Residual of the non-negative least-squares fit (free baseline) with spikes only on ``support``."""
    c, s, b, _, _ = _solve(y, w, unit, g, 0.0, "fit", 0.0, b0=b0, support=support, allowed=support, work=work)
    return float(_weighted_rss(y, w, unit, b, c)), b


def estimate_ar_coefficients(y, frame_rate, *, order=2, noise_sd=None, weights=None, refine=True,
                             max_lag=None, max_frames=MAX_KINETICS_FRAMES) -> np.ndarray:
    r"""AR(1) or AR(2) coefficients of the calcium dynamics in a trace.

    Parameters
    ----------
    y : array_like, shape (T,)
        ΔF/F trace; NaN/inf frames are missing.
    frame_rate : float
        Hz.
    order : {1, 2}, default 2
        1: instantaneous rise and one decay; 2: a rise and a decay.
    noise_sd : float, optional
        Noise standard deviation; estimated with :func:`estimate_noise_sd`
        when not given.
    weights : array_like, optional
        Frame weights (0 = ignore the frame).
    refine : bool, default True
        Refine the autocovariance estimate by fitting (see Notes).
    max_lag : int, optional
        Largest autocovariance lag used (default ``order + 4``, at least
        covering 0.1 s).
    max_frames : int, default 10000
        Longer traces are estimated on their central block of this length.

    Returns
    -------
    ndarray, shape (order,)
        ``[g]`` or ``[g1, g2]``; an AR(2) result always has real roots in
        [0, 1) (a rise and a decay time, as a :class:`~calcium.kernel.Kernel`
        needs).

    Notes
    -----
    *Start.* Yule-Walker equations :math:`\gamma(k)=\sum_i g_i\gamma(k-i)`
    for lags :math:`k \ge 1`, with :math:`\sigma^2` taken off
    :math:`\gamma(0)` (white noise adds only there), solved by least squares
    [1]_.

    *Refinement.* Deconvolve with the noise-matched penalty, keep the
    events (adjacent non-zero spikes) larger than one noise s.d., and refit
    them without penalty, non-negative, with a free baseline; the decay (1-D
    bounded search on its logarithm) or the rise and decay (Nelder-Mead on
    their logarithms, to 0.5 %) that minimise that residual are kept.  Two rounds.
    The penalised solution itself is not used as the criterion: its
    sparsity term favours slow decays (one unit of spike buys more calcium).

    References
    ----------
    .. [1] Pnevmatikakis, E. A. et al. (2016). Simultaneous denoising,
       deconvolution, and demixing of calcium imaging data. Neuron 89,
       285-299.
    """
    y = as_traces(y, "y")
    if y.ndim != 1:
        raise ValueError(f"y must be one trace of shape (frames,), got shape {y.shape}")
    frame_rate = check_frame_rate(frame_rate)
    order = check_int(order, "order", minimum=1, maximum=2)
    if y.size < 3:
        raise ValueError(f"y must have at least 3 frames, got {y.size}")
    block = _central_block(y.size, check_int(max_frames, "max_frames", minimum=16))
    yb = y[block]
    wb = None if weights is None else np.asarray(weights, dtype=np.float64)[block]
    if noise_sd is None:
        noise_sd = estimate_noise_sd(yb, frame_rate)
    else:
        noise_sd = check_positive(noise_sd, "noise_sd")
    yc, w, unit, n_obs = _prepare_weights(yb, wb)
    observed = np.ones(yc.size, dtype=bool) if unit else w > 0
    if max_lag is None:
        max_lag = max(order + 4, int(math.ceil(0.1 * frame_rate)))
    max_lag = check_int(max_lag, "max_lag", minimum=order + 1)
    max_lag = min(max_lag, max(order + 1, yc.size // 4))
    gamma = _autocovariance(yc, observed, max_lag)
    g = _yule_walker(gamma, order, noise_sd ** 2)
    times = _times_from_coefficients(g, frame_rate)
    if times is None or times[1] < 0.5 / frame_rate:
        # fall back on the ratio of successive lags (AR(1) reading of the decay)
        ratio = gamma[2] / gamma[1] if gamma[1] > 0 and gamma[2] > 0 else 0.9
        ratio = min(max(ratio, 0.05), 0.999)
        times = (0.0, -1.0 / (frame_rate * math.log(ratio)))
    rise_s, decay_s = times
    decay_s = min(max(decay_s, 0.5 / frame_rate), 1e4 / frame_rate)
    if order == 2:
        rise_s = min(max(rise_s, 0.2 / frame_rate), 0.5 * decay_s)
    if not refine or yc.size < 20:
        return _coefficients_from_times(rise_s, decay_s, frame_rate, order)

    work = _Work(yc.size)
    lo_decay, hi_decay = math.log(0.5 / frame_rate), math.log(max(yc.size, 20) / frame_rate)
    for _ in range(2):
        g = _coefficients_from_times(rise_s, decay_s, frame_rate, order)
        lam, c, s, b, *_ = _search_penalty(yc, w, unit, g, noise_sd, "fit", n_obs, work=work)
        support = _event_support(s, noise_sd)
        support[0] = s[0] > 0
        if np.count_nonzero(support) < 2:
            break
        cache = {}

        def cost(params):
            key = tuple(np.round(params, 12))
            if key not in cache:
                if order == 1:
                    tau_r, tau_d = 0.0, math.exp(params[0])
                else:
                    tau_r, tau_d = math.exp(params[0]), math.exp(params[1])
                    if not tau_r < 0.9 * tau_d:
                        cache[key] = np.inf
                        return np.inf
                gg = _coefficients_from_times(tau_r, tau_d, frame_rate, order)
                cache[key] = _support_fit_rss(yc, w, unit, gg, support, b, work)[0]
            return cache[key]

        if order == 1:
            res = minimize_scalar(lambda x: cost([x]), bounds=(lo_decay, hi_decay), method="bounded",
                                  options=dict(xatol=5e-3))
            decay_s = math.exp(res.x)
        else:
            start = np.array([math.log(rise_s), math.log(decay_s)])
            res = minimize(cost, start, method="Nelder-Mead",
                           options=dict(xatol=5e-3, fatol=1e-7 * max(cost(start), 1e-300), maxfev=80,
                                        initial_simplex=np.array([start, start + [0.3, 0.0], start + [0.0, 0.2]])))
            rise_s, decay_s = math.exp(res.x[0]), math.exp(res.x[1])
    return _coefficients_from_times(rise_s, decay_s, frame_rate, order)
