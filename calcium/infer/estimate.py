r"""Automatic parameters of the deconvolution: noise level, AR coefficients, penalty.

* Noise: the standard deviation of the white part of the trace, from the
  upper band of its power spectrum (:func:`calcium.signal.estimate_noise`).
* AR coefficients: the autocovariance of the calcium signal obeys the
  Yule-Walker equations of its AR model; white noise only adds to the lag-0
  term, so the equations are written with lags >= 1 and the noise variance
  taken off lag 0 (Pnevmatikakis et al. 2016 [1]_).  The estimate is then
  refined by fitting: the decay (and rise) that lets the detected events,
  refitted without penalty and with non-negative sizes, explain the trace
  best (Gauss-Newton steps for separable least squares, see
  :func:`_refine_kinetics`).
* Penalty: the :math:`\lambda` at which the residual matches the noise,
  :math:`\sum_t w_t (y_t - b - c_t)^2 = \sigma^2 N` (the noise-constrained
  problem of [1]_, solved through its penalised form).  On a fixed support
  the solution is affine in :math:`\lambda`, so the residual is a quadratic
  in :math:`\lambda` that is solved exactly.  That step is taken inside the
  exact solver after each support solve of its first rounds, so that the
  pivoting and the penalty reach the final support together: usually one
  solve; a safeguarded iteration of such steps (warm-started on the
  previous support) follows if needed, as suggested by Friedrich et al.
  (2017) [2]_.

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

from .._checks import as_traces, check_frame_rate, check_int, check_positive
from ..kernel import DECAY_RANGE_S
from ._driver import PREVIOUS, Workspace, backward_filter, check_baseline, objective, prepare_weights, solve
from .ar import ARDeconvolution, check_ar_coefficients

__all__ = ["estimate_noise_sd", "estimate_ar_coefficients", "penalty_for_noise", "PenaltySearch",
           "signal_detected", "MAX_ESTIMATION_FRAMES"]

#: The noise is estimated from at most this many frames (a central block of
#: longer traces; the estimate then has a relative s.d. of ~0.6 %): plenty, and it
#: bounds the cost.
MAX_ESTIMATION_FRAMES = 16384
#: The kinetics are estimated (a deconvolution and a few exact fits) on at most this many frames.
MAX_KINETICS_FRAMES = 8192
#: Rows (frames) in which a long noise block is handed to the spectrum estimate.
_NOISE_ROW = 4096
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
    frames (the central block); NaN/inf frames are handled there.  A block
    of at least two rows of 4,096 frames without missing frames is handed
    over as rows (their spectra are computed together), and the variance is
    the mean over the rows: the same Welch average, less the few segments
    that would straddle two rows.

    Parameters
    ----------
    y : array_like, shape (T,)
    frame_rate : float
    max_frames : int, default 16384

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
    block = y[_central_block(y.size, max_frames)]
    rows = block.size // _NOISE_ROW
    if rows >= 2 and np.isfinite(block).all():
        # the same Welch average, its segments handed over as rows of equal length (the spectra of a 2-D
        # input are computed together, much faster than segment by segment): the noise variance is the
        # mean over the rows
        per_row = estimate_noise(block[:rows * _NOISE_ROW].reshape(rows, _NOISE_ROW), frame_rate)
        return float(np.sqrt(np.mean(np.square(per_row))))
    return float(estimate_noise(block, frame_rate))


@njit(cache=True)
def _autocovariance(y, observed, max_lag):
    """Autocovariance at lags 0..max_lag over pairs of observed frames (mean removed)."""
    T = y.shape[0]
    everything = True
    for t in range(T):
        if not observed[t]:
            everything = False
            break
    if everything:
        return _autocovariance_observed(y, max_lag)
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


@njit(cache=True, fastmath={"reassoc", "contract"})
def _autocovariance_observed(y, max_lag):
    """_autocovariance when every frame is observed: no per-pair tests, sums in any order (vectorised)."""
    T = y.shape[0]
    total = 0.0
    for t in range(T):
        total += y[t]
    d = y - total / T
    out = np.zeros(max_lag + 1)
    for k in range(max_lag + 1):
        acc = 0.0
        for t in range(T - k):
            acc += d[t] * d[t + k]
        out[k] = acc / (T - k) if T > k else 0.0
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
    yc, w, unit, n_obs = prepare_weights(yb, None)
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
    return _least_squares(M, g0[lags])


def _least_squares(M: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Least-squares solution of M x = rhs for one or two columns: the normal equations solved in closed form
    when they are well conditioned (far cheaper than a general solver on so small a problem), otherwise
    numpy.linalg.lstsq."""
    if M.shape[1] <= 2 and M.shape[0] >= M.shape[1]:
        # (the condition number of M is at most about 1e4: the squared system loses at most 8 digits)
        x = _cramer(M.T @ M, M.T @ rhs, 1e-8)
        if x is not None:
            return x
    coeffs, *_ = np.linalg.lstsq(M, rhs, rcond=None)
    return coeffs


def _cramer(A: np.ndarray, rhs: np.ndarray, rel_det: float):
    """A x = rhs for a 1x1 or 2x2 A by Cramer's rule; None unless A is clearly positive definite (A[0, 0] > 0
    and det A > max(0, rel_det A[0, 0] A[1, 1]))."""
    if A.shape == (1, 1):
        return np.array([rhs[0] / A[0, 0]]) if A[0, 0] > 0.0 else None
    if A.shape == (2, 2):
        det = A[0, 0] * A[1, 1] - A[0, 1] * A[1, 0]
        if A[0, 0] > 0.0 and det > 0.0 and det > rel_det * (A[0, 0] * A[1, 1]):
            return np.array([(A[1, 1] * rhs[0] - A[0, 1] * rhs[1]) / det, (A[0, 0] * rhs[1] - A[1, 0] * rhs[0]) / det])
    return None


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


@njit(cache=True, fastmath={"contract", "reassoc"})
def _weighted_rss(y, w, unit, b, c):
    acc = 0.0
    if unit:
        for t in range(y.shape[0]):
            r = y[t] - b - c[t]
            acc += r * r
    else:
        for t in range(y.shape[0]):
            r = y[t] - b - c[t]
            acc += w[t] * r * r
    return acc


@njit(cache=True, fastmath={"contract", "reassoc"})
def _level_stats(y, w, unit, b):
    """(sum w (y - b)^2, sum w (y - b), sum w) in one pass."""
    s2 = 0.0
    s1 = 0.0
    sw = 0.0
    if unit:
        for t in range(y.shape[0]):
            r = y[t] - b
            s2 += r * r
            s1 += r
        return s2, s1, float(y.shape[0])
    for t in range(y.shape[0]):
        r = y[t] - b
        s2 += w[t] * r * r
        s1 += w[t] * r
        sw += w[t]
    return s2, s1, sw


def _quiet_solution(fit_b, b, s2, s1, sw):
    """Baseline and residual of the solution without any spike, from the _level_stats at ``b``."""
    if fit_b:
        # the weighted mean: sum w (y - m)^2 = s2 - s1^2 / sw
        return b + s1 / sw, s2 - s1 * s1 / sw
    return b, s2


def _max_useful_penalty(y, w, unit, g, b):
    """Smallest penalty at which the solution with baseline ``b`` has no spike at all.

    At c = 0 the gradient of frame t is lam - z_t, z_t = sum_{tau >= t}
    h_{tau-t} w_tau (y_tau - b): every frame stays empty when lam >= max z.
    """
    z = np.empty(y.size + 2)
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    backward_filter(y if unit else w * (y - b), b if unit else 0.0, g1, g2, z, np.empty(y.size + 1))
    return max(float(np.max(z[:y.size])), 0.0)


class _PenaltyEngine:
    """Solves at a sequence of penalties, warm-starting on the previous support.

    The solution on a fixed support is affine in the penalty, so its
    residual is a quadratic in it: :meth:`affine_penalty` solves that
    quadratic exactly and leaves the pools at the new penalty in the work,
    so that the next solve starts from them (presolved) and only has to
    check (and repair) the optimality conditions.
    """

    def __init__(self, y, w, unit, g, baseline, work=None):
        self.y, self.w, self.unit, self.g = y, w, unit, g
        self.baseline = baseline
        self.fit_b = isinstance(baseline, str)
        self.T = y.size
        self.work = work or Workspace(self.T)
        self.g1 = float(g[0])
        self.g2 = float(g[1]) if g.size > 1 else 0.0
        self.warm = False
        self.presolved = False
        self.b = None
        self.solves = 0

    def solve(self, lam, target=None):
        """Solve at ``lam``; with ``target`` the penalty follows the residual target during the first
        rounds (the penalty reached is in self.lam)."""
        match = None
        if target is not None:
            bb = self.work.level(self.y, self.w, self.unit, self.fit_b, 0.0 if self.fit_b else float(self.baseline))
            match = (target, *self._level_sums(bb))
        c, s, b, its, conv = solve(self.y, self.w, self.unit, self.g, lam, self.baseline, 0.0, b0=self.b,
                                   support=PREVIOUS if self.warm else None, work=self.work,
                                   presolved=self.presolved, match=match, copy=False)
        self.lam = self.work.lam
        self.solves += 1
        self.warm = True
        self.presolved = False
        self.b = b
        rss = _weighted_rss(self.y, self.w, self.unit, b, c)
        return c, s, b, its, conv, rss

    def affine_penalty(self, target):
        """Penalty at which the residual, with the current support held, equals ``target`` (or None).

        The pools at that penalty are left in the workspace for the next
        solve (see Workspace.penalty_on_support).
        """
        y, w, unit = self.y, self.w, self.unit
        b_fixed = 0.0 if self.fit_b else float(self.baseline)
        bb = self.work.level(y, w, unit, self.fit_b, b_fixed)
        found = self.work.penalty_on_support(y, w, unit, self.g1, self.g2, self.fit_b, b_fixed, target,
                                             *self._level_sums(bb))
        if found is None:
            return None
        lam, self.b = found
        self.presolved = True
        return lam

    def _level_sums(self, bb):
        if getattr(self, "_level_key", None) != bb:
            s2, s1, _ = _level_stats(self.y, self.w, self.unit, bb)
            self._level = (s2, s1)
            self._level_key = bb
        return self._level


def search_penalty(y, w, unit, g, noise_sd, baseline, n_obs, *, rtol=_RTOL_RESIDUAL, work=None, start=None,
                    b0=None, copy=True):
    """Noise-matching penalty on prepared inputs; returns (lam, c, s, b, iterations, converged, rss, target, solves).

    ``start`` is a first guess of the penalty (default: the noise seen
    through the kernel, a little below where the search usually ends: from
    below, the first solve can move the penalty onto the target), ``b0`` of a
    free baseline (for the first pool pass).  With ``copy`` False, c and s
    may be the work's own arrays (valid until its next use).
    """
    target = noise_sd ** 2 * n_obs
    fit_b = isinstance(baseline, str)
    engine = _PenaltyEngine(y, w, unit, g, baseline, work)
    # (a free baseline is taken about the mean, where the sums are best conditioned)
    level = engine.work.level(y, w, unit, True, 0.0) if fit_b else float(baseline)
    s2, s1, sw = _level_stats(y, w, unit, level)
    engine._level, engine._level_key = (s2, s1), level  # (the level sums the penalty match needs, at its level)
    b_quiet, rss_quiet = _quiet_solution(fit_b, level, s2, s1, sw)
    if rss_quiet <= target:
        # even no spike at all leaves a residual within the noise: a quiet trace (a hair above the
        # smallest spike-free penalty, where the optimum is unique)
        lam_max = _max_useful_penalty(y, w, unit, g, b_quiet)
        lam_max = lam_max * (1.0 + 1e-9) + 1e-300
        engine.b = b_quiet
        c, s, b, its, conv, rss = engine.solve(lam_max)
        if copy:
            c, s = c.copy(), s.copy()
        return lam_max, c, s, b, its, conv, rss, target, engine.solves
    lo, hi = 0.0, math.inf
    if fit_b and b0 is not None:
        engine.b = float(b0)
    if start is not None and start > 0:
        lam = float(start)
    else:
        lam = noise_sd * math.sqrt(engine.work.response_energy(engine.g1, engine.g2))  # sqrt(sum h^2)
    total_its = 0
    best = None
    live = False  # best holds the work's arrays (the latest solve): copied before they are overwritten
    for step_number in range(_MAX_PENALTY_STEPS):
        if live:
            best = (best[0], best[1].copy(), best[2].copy(), *best[3:])
            live = False
        # the first solve moves the penalty to the target once, on its first support (usually enough)
        c, s, b, its, conv, rss = engine.solve(lam, target if step_number == 0 else None)
        lam = engine.lam
        total_its += its
        gap = (rss - target) / target
        if best is None or abs(gap) < abs(best[-1]):
            best = (lam, c, s, b, conv, rss, gap)
            live = True
        if abs(gap) <= rtol:
            break
        if rss < target:
            lo = lam
        else:
            hi = lam
        step = engine.affine_penalty(target) if np.any(s > 0) else None
        if step is not None and lo < step < hi:
            lam = step
            continue
        engine.presolved = False
        if math.isinf(hi):
            hi = max(_max_useful_penalty(y, w, unit, g, b_quiet), 2.0 * lam)
        lam = 0.5 * (lo + hi) if lo > 0 else hi * 0.1 if hi > 0 else 0.0
        if hi - lo <= 1e-12 * hi:
            break
    lam, c, s, b, conv, rss, gap = best
    if abs(gap) > rtol and lo == 0.0 and rss > target:
        # even the least-penalised fit leaves more than the noise: penalty 0
        engine.presolved = False
        c, s, b, its, conv, rss = engine.solve(0.0)
        lam = 0.0
        live = True
    if copy and live:
        c, s = c.copy(), s.copy()
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
    baseline = check_baseline(baseline)
    rtol = check_positive(rtol, "rtol")
    y, w, unit, n_obs = prepare_weights(y, weights)
    lam, c, s, b, its, conv, rss, target, solves = search_penalty(y, w, unit, g, sigma, baseline, n_obs, rtol=rtol)
    objective_value = float(objective(y, w, unit, lam, b, c, s))
    result = ARDeconvolution(calcium=c, spikes=s, baseline=float(b), penalty=float(lam), objective=objective_value,
                             iterations=int(its), converged=bool(conv), coefficients=g.copy())
    return PenaltySearch(penalty=float(lam), deconvolution=result, residual=float(rss), target=float(target),
                         solves=int(solves))


# --------------------------------------------------------------------------- kinetics
_KINETICS_STEPS = 2  # Gauss-Newton steps at most (a third moved the time constants < ~1 % on simulated traces)
_KINETICS_XTOL = 1e-2  # relative change of a time constant at which the refinement stops


def _event_support(s: np.ndarray, min_size: float) -> np.ndarray:
    """Frames of the events (runs of adjacent non-zero spikes) whose total is >= min_size."""
    from .counts import event_table

    starts, stops, totals = event_table(s, 0)
    marks = np.zeros(s.size + 1, dtype=np.int64)
    big = totals >= min_size
    # (runs of non-zero frames are separated by a zero frame: no start is also a stop)
    marks[starts[big]] = 1
    marks[stops[big]] = -1
    return np.cumsum(marks[:-1]) > 0


@njit(cache=True, fastmath={"contract"})
def _coefficient_derivative(c, g1, g2, u):
    """u = dc/dg1 with the spikes held: u_t = c_{t-1} + g1 u_{t-1} + g2 u_{t-2} (dc/dg2 is u one frame later)."""
    u1 = 0.0
    u2 = 0.0
    c_prev = 0.0
    for t in range(c.shape[0]):
        x = g1 * u1 + (c_prev + g2 * u2)
        u[t] = x
        u2 = u1
        u1 = x
        c_prev = c[t]


def _solve_small(A: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """A x = rhs for a 1x1 or 2x2 positive definite A by Cramer's rule (numpy.linalg.solve otherwise, and when
    A is not clearly positive definite)."""
    x = _cramer(A, rhs, 1e-12)
    return np.linalg.solve(A, rhs) if x is None else x


def _refine_kinetics(yc, w, unit, n_obs, frame_rate, order, rise_s, decay_s, noise_sd):
    r"""The rise and decay (or the decay) that let the detected events explain the trace best.

    The events are found once, with the starting kinetics and the
    noise-matched penalty (kept if larger than one noise s.d.).  Criterion:
    f(theta) = min over spikes s >= 0 on the event frames and a baseline b of
    sum w (y - b - K_theta s)^2, theta the logarithms of the time constants.
    It is minimised by Gauss-Newton steps for separable least squares
    (variable projection, Golub & Pereyra 1973 [1]_, with Kaufman's 1975
    [2]_ approximation): the gradient is -2 r' W J with J = dc/dtheta at fixed
    spikes (one AR filter pass; the optimal spikes and baseline need no
    derivative there), the Hessian 2 J_perp' W J_perp with J_perp the part of
    J the spikes and baseline cannot explain (one least-squares fit on the
    support per column); a step that does not lower f is shortened
    (Levenberg 1944 [3]_).  Returns (rise_s, decay_s, (penalty, baseline) of
    the event search, starting points for the whole trace).

    References
    ----------
    .. [1] Golub, G. H. & Pereyra, V. (1973). The differentiation of
       pseudo-inverses and nonlinear least squares problems whose variables
       separate. SIAM J. Numer. Anal. 10, 413-432.
    .. [2] Kaufman, L. (1975). A variable projection method for solving
       separable nonlinear least squares problems. BIT 15, 49-57.
    .. [3] Levenberg, K. (1944). A method for the solution of certain
       non-linear problems in least squares. Q. Appl. Math. 2, 164-168.
    """
    work = Workspace(yc.size)
    g = _coefficients_from_times(rise_s, decay_s, frame_rate, order)
    lam, c, s, b_search, *_ = search_penalty(yc, w, unit, g, noise_sd, "fit", n_obs, work=work, copy=False)
    support = _event_support(s, noise_sd)
    support[0] = s[0] > 0
    if np.count_nonzero(support) < 2:
        return rise_s, decay_s, (lam, b_search)
    b_cur = b_search
    _, _, tiny = work.tolerances(yc, w, unit, 0.0)
    # (within the decays a Kernel allows, calcium.kernel.DECAY_RANGE_S, as well as the trace's length)
    lo_decay = math.log(max(0.5 / frame_rate, DECAY_RANGE_S[0]))
    hi_decay = math.log(min(max(yc.size, 20) / frame_rate, DECAY_RANGE_S[1]))
    lo_rise = math.log(0.1 / frame_rate)

    def fit(theta, first):
        """The criterion at theta, and the state of its solution (calcium, baseline, coefficients, support)."""
        tr, td = (0.0, math.exp(theta[0])) if order == 1 else (math.exp(theta[0]), math.exp(theta[1]))
        gg = _coefficients_from_times(tr, td, frame_rate, order)
        # (c is the work's own array: it is used up before the next fit)
        c, _, b, _, _ = solve(yc, w, unit, gg, 0.0, "fit", 0.0, b0=b_cur, support=support if first else PREVIOUS,
                              allowed=support, work=work, copy=False)
        return float(_weighted_rss(yc, w, unit, b, c)), (c, b, gg, *work.support())

    theta = np.array([math.log(decay_s)] if order == 1 else [math.log(rise_s), math.log(decay_s)])
    f, state = fit(theta, True)
    damping = 0.0
    for _ in range(_KINETICS_STEPS):
        c, b_cur, gg, starts, free0 = state
        g1 = float(gg[0])
        g2 = float(gg[1]) if gg.size > 1 else 0.0
        r = (yc - b_cur - c) if unit else w * (yc - b_cur - c)
        u = np.empty(yc.size)
        _coefficient_derivative(c, g1, g2, u)
        u_prev = np.empty(yc.size)  # dc/dg2: u one frame later
        u_prev[0] = 0.0
        u_prev[1:] = u[:-1]
        # chain rule to the log time constants: g1 = d + q, g2 = -d q (d, q the decay and rise roots), and
        # d(root)/d(log tau) = -root log(root)
        d = math.exp(-1.0 / (math.exp(theta[-1]) * frame_rate))
        if order == 2:
            q = math.exp(-1.0 / (math.exp(theta[0]) * frame_rate))
            # rows (u - d u_prev) (-q log q) and (u - q u_prev) (-d log d), written in place (the same operations)
            J = np.empty((2, yc.size))
            for row, root, other in ((J[0], d, q), (J[1], q, d)):
                np.multiply(u_prev, root, out=row)
                np.subtract(u, row, out=row)
                np.multiply(row, -other * math.log(other), out=row)
        else:
            J = (u * (-d * math.log(d)))[None, :]
        perp = np.empty_like(J)
        for i in range(J.shape[0]):
            work.project_out(J[i], w, unit, g1, g2, starts, free0, tiny, perp[i])
        grad = -2.0 * (J @ r)
        hess = 2.0 * (perp @ (perp.T if unit else (w * perp).T))
        while True:
            step = -_solve_small(hess + damping * np.diag(np.diag(hess)), grad)
            new = theta + step
            new[-1] = min(max(new[-1], lo_decay), hi_decay)
            if order == 2:
                new[0] = min(max(new[0], lo_rise), new[-1] + math.log(0.9))
            f_new, state_new = fit(new, False)
            if f_new <= f or damping > 1e4:
                break
            damping = 1.0 if damping == 0.0 else 4.0 * damping
        if not f_new <= f:
            break
        moved = float(np.max(np.abs(new - theta)))
        theta, f, state = new, f_new, state_new
        damping = 0.0 if damping <= 1.0 else damping / 4.0
        if moved < _KINETICS_XTOL:
            break
    if order == 1:
        decay_s = math.exp(theta[0])
    else:
        rise_s, decay_s = math.exp(theta[0]), math.exp(theta[1])
    return rise_s, decay_s, (lam, b_search)


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
    max_frames : int, default 8192
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
    them without penalty, non-negative, with a free baseline; the decay, or
    the rise and decay, that minimise that residual are kept: Gauss-Newton
    steps for separable least squares on their logarithms (variable
    projection [2]_, [3]_), to 1 %, at most two.  The penalised solution
    itself is not used as the criterion: its sparsity term favours slow
    decays (one unit of spike buys more calcium).

    References
    ----------
    .. [1] Pnevmatikakis, E. A. et al. (2016). Simultaneous denoising,
       deconvolution, and demixing of calcium imaging data. Neuron 89,
       285-299.
    .. [2] Golub, G. H. & Pereyra, V. (1973). The differentiation of
       pseudo-inverses and nonlinear least squares problems whose variables
       separate. SIAM J. Numer. Anal. 10, 413-432.
    .. [3] Kaufman, L. (1975). A variable projection method for solving
       separable nonlinear least squares problems. BIT 15, 49-57.
    """
    y = as_traces(y, "y")
    if y.ndim != 1:
        raise ValueError(f"y must be one trace of shape (frames,), got shape {y.shape}")
    frame_rate = check_frame_rate(frame_rate)
    order = check_int(order, "order", minimum=1, maximum=2)
    if y.size < 3:
        raise ValueError(f"y must have at least 3 frames, got {y.size}")
    max_frames = check_int(max_frames, "max_frames", minimum=16)
    if noise_sd is not None:
        noise_sd = check_positive(noise_sd, "noise_sd")
    if max_lag is not None:
        max_lag = check_int(max_lag, "max_lag", minimum=order + 1)
    return estimate_kinetics(y, frame_rate, order, noise_sd, weights, refine, max_lag, max_frames)[0]


def estimate_kinetics(y, frame_rate, order, noise_sd, weights, refine, max_lag, max_frames):
    """estimate_ar_coefficients on validated arguments; returns (coefficients, (the block's noise-matched penalty
    and baseline, or None: starting points for the whole trace))."""
    block = _central_block(y.size, max_frames)
    yb = y[block]
    wb = None if weights is None else np.asarray(weights, dtype=np.float64)[block]
    if noise_sd is None:
        noise_sd = estimate_noise_sd(yb, frame_rate)
    yc, w, unit, n_obs = prepare_weights(yb, wb)
    observed = np.ones(yc.size, dtype=bool) if unit else w > 0
    if max_lag is None:
        max_lag = max(order + 4, int(math.ceil(0.1 * frame_rate)))
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
    hint = (None, None)
    if refine and yc.size >= 20:
        rise_s, decay_s, hint = _refine_kinetics(yc, w, unit, n_obs, frame_rate, order, rise_s, decay_s, noise_sd)
    return _coefficients_from_times(rise_s, decay_s, frame_rate, order), hint
