r"""The size of one spike from the sizes of a trace's events: a quantal mixture.

The deconvolution turns a trace into events (runs of activity), each with a
size in ΔF/F (the peak ΔF/F its spikes would have had alone, summed).  An
event of k spikes has a size near k times the single-spike size q; the
deconvolution also returns small events where there is no spike at all
(noise, baseline drift).  Following the classical quantal analysis of
synaptic amplitudes (del Castillo & Katz 1954 [1]_; a mixture of Gaussians
at integer multiples of a quantum, fitted by maximum likelihood, Kullmann
1989 [2]_), the sizes are modelled as

.. math::

    f(x) = \pi_0\, \Gamma(x; \alpha, \theta)
         + (1 - \pi_0) \sum_{k \ge 1} p_k\, \mathcal N(x;\, k q,\;
           a^2 + k\, v^2 q^2)

* a noise pile :math:`\Gamma(\alpha, \theta)`, whose mean stays below
  :math:`q/2` (the events of no spike are smaller than half a spike);
* whole-spike components whose variance grows with k (independent
  spike-to-spike variation of relative s.d. v, plus the size noise a of the
  fit, never below the least-squares size noise of a one-frame event);
* non-increasing proportions :math:`p_1 \ge p_2 \ge \dots` (fewer events
  of many spikes than of few).  The maximum-likelihood estimate of a
  non-increasing distribution is the non-increasing isotonic regression of
  the observed proportions (Grenander 1956 [3]_; pool-adjacent-violators,
  Robertson, Wright & Dykstra 1988 [4]_), used in the M step.

The last constraint is what identifies q: without it, half the quantum with
only even components explains the same sizes equally well (a known
ambiguity of quantal analysis, [2]_).  The likelihood is maximised over the
other parameters by EM (Dempster, Laird & Rubin 1977 [5]_) for every q on a
logarithmic grid (the profile likelihood), which is returned so that a
session can combine it with a prior across cells (see
:mod:`calcium.calibrate`).

References
----------
.. [1] del Castillo, J. & Katz, B. (1954). Quantal components of the
   end-plate potential. J. Physiol. 124, 560-573.
.. [2] Kullmann, D. M. (1989). Applications of the expectation-maximization
   algorithm to quantal analysis of postsynaptic potentials. J. Neurosci.
   Methods 30, 231-245.
.. [3] Grenander, U. (1956). On the theory of mortality measurement, part
   II. Skand. Aktuarietidskr. 39, 125-153.
.. [4] Robertson, T., Wright, F. T. & Dykstra, R. L. (1988). Order
   Restricted Statistical Inference. Wiley.
.. [5] Dempster, A. P., Laird, N. M. & Rubin, D. B. (1977). Maximum
   likelihood from incomplete data via the EM algorithm. J. R. Stat. Soc.
   B 39, 1-38.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .._checks import check_int, check_positive

__all__ = ["QuantalFit", "fit_quantal_mixture", "MIN_QUANTUM_Z"]

#: The smallest quantum considered, in units of the one-frame size noise: below it a single spike is not told
#: apart from the noise events (the noise pile of a penalised fit reaches about 3 size-noise s.d.; measured on
#: white noise through our own solver, see tests/test_quantal.py).
MIN_QUANTUM_Z = 3.0
#: A quantum below this many size-noise s.d. is fitted but flagged.  The noise events of the penalised fit reach
#: about 3 size-noise s.d. (measured on our independent generator, scripts/bench_calibration.py); they stay
#: below half a spike, the counting threshold, only when one spike is at least 6 s.d.
IDENTIFIABLE_Z = 6.0
_GRID_POINTS = 48
_MAX_COMPONENTS = 24
_EM_STEPS = 60
_EM_TOLERANCE = 1e-3  # log-likelihood gain below which EM stops (far below the 1.92 of the interval)
_V_BOUNDS = (0.05, 0.35)  # relative s.d. of one spike's size between spikes (bounds of the fit)
#: Events of one spike are taken to be at least this many times as common as events of two.  For a Poisson
#: train of rate r, an event window w holds a second spike with probability about r w, so the ratio is about
#: 1 / (r w): above 2 up to r w = 0.5 (3 Hz and a 0.15 s window; rates of cortical neurons in vivo are mostly
#: below a few Hz, common practice).  Bursts add events of several spikes, but in a share of the events.
SINGLE_TO_DOUBLE = 2.0


@dataclass(frozen=True)
class QuantalFit:
    """Result of :func:`fit_quantal_mixture`.

    Attributes
    ----------
    quantum : float
        Maximum-likelihood size of one spike (units of the sizes); NaN when
        there were too few events.
    interval : tuple of float
        ``(low, high)``: the values of q whose profile log-likelihood is
        within 1.92 of the maximum (a 95 % likelihood interval, Wilks 1938).
    grid : ndarray
        The q values of the profile likelihood (logarithmic grid).
    log_likelihood : ndarray
        Profile log-likelihood at each grid value.
    n_events : int
        Events used (above ``MIN_QUANTUM_Z - 1`` size-noise s.d.).
    noise_share : float
        Share of those events that the fit assigns to the noise pile.
    proportions : ndarray
        :math:`p_k`, k = 1, 2, ..., at the maximum.
    relative_sd : float
        v, the relative s.d. of one spike's size at the maximum.
    quantum_z : float
        ``quantum / noise_size``.
    """

    quantum: float
    interval: tuple
    grid: np.ndarray
    log_likelihood: np.ndarray
    n_events: int
    noise_share: float
    proportions: np.ndarray
    relative_sd: float
    quantum_z: float


def fit_quantal_mixture(sizes, *, noise_size, min_events=8, grid_points=_GRID_POINTS, search=None) -> QuantalFit:
    r"""Single-spike size from event sizes: maximum likelihood of a quantal mixture.

    Parameters
    ----------
    sizes : array_like
        Event sizes (ΔF/F per event; non-finite and non-positive values are
        ignored).
    noise_size : float
        Standard deviation of the least-squares size of a one-frame event
        in the trace's noise (same units), e.g.
        :func:`calcium.infer.counts.event_noise_size` divided by the
        activity of one unit-amplitude spike.
    min_events : int, default 8
        With fewer events above the noise, ``quantum`` is NaN.
    grid_points : int, default 48
        Points of the logarithmic grid of q.
    search : (low, high), optional
        Search q only within this range (intersected with the default one),
        e.g. where a prior across cells puts nearly all its mass.

    Returns
    -------
    QuantalFit

    Notes
    -----
    The grid runs from ``MIN_QUANTUM_Z`` size-noise s.d. to the 95th
    percentile of the sizes.  Events below ``MIN_QUANTUM_Z - 1`` s.d. are
    left out (they are noise in any model).  See the module docstring for
    the model and its references.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> counts = 1 + rng.poisson(0.4, 400)           # spikes per event
    >>> sizes = 0.2 * counts + rng.normal(0, 0.02, 400)
    >>> fit = fit_quantal_mixture(sizes, noise_size=0.02)
    >>> round(fit.quantum / 0.2, 1)
    1.0
    """
    noise_size = check_positive(noise_size, "noise_size")
    min_events = check_int(min_events, "min_events", minimum=1)
    grid_points = check_int(grid_points, "grid_points", minimum=4)
    x = np.asarray(sizes, dtype=np.float64).ravel()
    x = x[np.isfinite(x) & (x > (MIN_QUANTUM_Z - 1.0) * noise_size)]
    empty = np.zeros(0)
    if x.size < min_events:
        return QuantalFit(math.nan, (math.nan, math.nan), empty, empty, int(x.size), math.nan, empty, math.nan,
                          math.nan)
    lo = MIN_QUANTUM_Z * noise_size
    hi = max(float(np.quantile(x, 0.95)), lo * 1.5)
    if search is not None:
        low, high = float(search[0]), float(search[1])
        if not 0 < low < high:
            raise ValueError(f"search must be (low, high) with 0 < low < high, got {tuple(search)}")
        lo, hi = max(lo, low), min(hi, high)
        if not lo < hi:  # (the range and the data do not meet: its nearer end)
            lo, hi = (hi / 1.5, hi) if low >= hi else (lo, lo * 1.5)
    grid = np.exp(np.linspace(math.log(lo), math.log(hi), grid_points))
    values, weights = _binned(x, noise_size)
    loglik = np.empty(grid.size)
    shares = np.empty(grid.size)
    vs = np.empty(grid.size)
    props = np.zeros((grid.size, _MAX_COMPONENTS))
    _profile(values, weights, grid, noise_size, _EM_STEPS, _EM_TOLERANCE, loglik, shares, vs, props)
    best = int(np.argmax(loglik))
    within = np.flatnonzero(loglik >= loglik[best] - 1.92)  # chi-square(1) 95 % / 2 (Wilks 1938)
    interval = (float(grid[within.min()]), float(grid[within.max()]))
    k_used = props[best]
    return QuantalFit(quantum=float(grid[best]), interval=interval, grid=grid, log_likelihood=loglik,
                      n_events=int(x.size), noise_share=float(shares[best]),
                      proportions=k_used[:np.flatnonzero(k_used > 0).max() + 1] if (k_used > 0).any() else k_used,
                      relative_sd=float(vs[best]), quantum_z=float(grid[best] / noise_size))


def _binned(x, noise_size):
    """Sizes binned finely enough not to matter (bins of a fifth of the size noise, or 2 % of the size,
    whichever is wider; a single spike's size varies by more than 5 % between spikes): the mean size and the
    count of each occupied bin, sorted."""
    # bin coordinate: steps of 0.2 noise_size up to 10 noise_size, then steps of 2 % of the size
    knee = 10.0 * noise_size
    coordinate = np.where(x < knee, x / (0.2 * noise_size), 50.0 + 50.0 * np.log(np.maximum(x, knee) / knee))
    _, groups = np.unique(np.floor(coordinate).astype(np.int64), return_inverse=True)
    weights = np.bincount(groups).astype(np.float64)
    values = np.bincount(groups, weights=x) / weights
    return values, weights


@njit(cache=True)
def _pava_non_increasing(values, out):
    """Non-increasing isotonic regression (unit weights) of values into out (pool adjacent violators)."""
    n = values.shape[0]
    level = np.empty(n)
    width = np.empty(n, np.int64)
    m = 0
    for i in range(n):
        level[m] = values[i]
        width[m] = 1
        m += 1
        while m > 1 and level[m - 2] < level[m - 1]:
            total = level[m - 2] * width[m - 2] + level[m - 1] * width[m - 1]
            width[m - 2] += width[m - 1]
            level[m - 2] = total / width[m - 2]
            m -= 1
    i = 0
    for b in range(m):
        for _ in range(width[b]):
            out[i] = level[b]
            i += 1


@njit(cache=True)
def _profile(x, weight, grid, noise_size, steps, tolerance, loglik_out, share_out, v_out, proportions_out):
    """The profile likelihood over the grid of q (ascending): EM at each q from its default start (``fresh``;
    the previous q's parameters are not carried over), stopped when an EM step gains less than ``tolerance``
    in log-likelihood."""
    state = np.empty(5)  # pi0, alpha, theta, a^2, v
    p = np.zeros(_MAX_COMPONENTS)
    for j in range(grid.shape[0]):
        loglik_out[j], share_out[j], v_out[j] = _em_fit(x, weight, grid[j], noise_size, steps, tolerance, state, p,
                                                         True)
        for k in range(_MAX_COMPONENTS):
            proportions_out[j, k] = p[k]


@njit(cache=True)
def _em_fit(x, weight, q, noise_size, steps, tolerance, state, p, fresh):
    """EM for the mixture at a fixed quantum q; returns (log-likelihood, noise share, v); ``state`` and ``p``
    (the proportions p_k) hold the parameters, in and out (``fresh``: start from the defaults)."""
    n = x.shape[0]
    n_total = 0.0
    for i in range(n):
        n_total += weight[i]
    K = min(_MAX_COMPONENTS, max(3, int(math.ceil(x[n - 1] / q)) + 2))
    if fresh:
        total = 0.0
        for k in range(K):
            p[k] = 0.5 ** (k + 1)
            total += p[k]
        for k in range(K):
            p[k] /= total
        state[0] = 0.5
        # the noise pile starts at the median of the events below half a quantum
        count = 0
        below = 0.0
        for i in range(n):
            if x[i] < 0.5 * q:
                count += 1
                below += weight[i]
        mean0 = x[count // 2] if below > 4 else min(3.0 * noise_size, 0.4 * q)
        state[1] = 8.0
        state[2] = mean0 / 8.0
        state[3] = noise_size * noise_size
        state[4] = 0.15
    else:
        # components the previous (smaller) quantum had beyond this one's K are folded into the last
        total = 0.0
        for k in range(K, _MAX_COMPONENTS):
            p[K - 1] += p[k]
            p[k] = 0.0
        for k in range(K):
            total += p[k]
        for k in range(K):
            p[k] = p[k] / total if total > 0 else 1.0 / K
        if state[2] * state[1] > 0.5 * q:  # (the pile's mean stays below half a quantum)
            state[2] = 0.5 * q / state[1]
    pi0, alpha, theta, a2, v = state[0], state[1], state[2], state[3], state[4]
    resp = np.empty(K + 1)
    nk = np.empty(K + 1)
    sk = np.empty(K + 1)       # sum of resp * x (noise) / resp * (x - kq)^2 (spikes)
    share = np.empty(K)
    iso = np.empty(K)
    loglik = -np.inf
    previous = -np.inf
    for step in range(steps + 1):
        for k in range(K + 1):
            nk[k] = 0.0
            sk[k] = 0.0
        s0x2 = 0.0
        loglik = 0.0
        log_norm0 = -math.lgamma(alpha) - alpha * math.log(theta)
        log_pi0 = math.log(max(pi0, 1e-300))
        sd_max = math.sqrt(a2 + K * v * v * q * q)
        for i in range(n):
            xi = x[i]
            resp[0] = log_pi0 + log_norm0 + (alpha - 1.0) * math.log(xi) - xi / theta
            best = resp[0]
            # components more than 8 s.d. away contribute nothing a double can hold (exp(-32)): skipped
            lo_k = max(1, int(math.floor((xi - 8.0 * sd_max) / q)))
            hi_k = min(K, int(math.ceil((xi + 8.0 * sd_max) / q)))
            for k in range(1, K + 1):
                if k < lo_k or k > hi_k:
                    resp[k] = -np.inf
                    continue
                m = k * q
                var = a2 + k * v * v * q * q
                d = xi - m
                resp[k] = (math.log(max((1.0 - pi0) * p[k - 1], 1e-300)) - 0.5 * d * d / var
                           - 0.5 * math.log(2.0 * math.pi * var))
                if resp[k] > best:
                    best = resp[k]
            total = 0.0
            for k in range(K + 1):
                resp[k] = math.exp(resp[k] - best) if resp[k] > -np.inf else 0.0
                total += resp[k]
            loglik += weight[i] * (best + math.log(total))
            for k in range(K + 1):
                if resp[k] == 0.0:
                    continue
                r = weight[i] * resp[k] / total
                nk[k] += r
                if k == 0:
                    sk[0] += r * xi
                    s0x2 += r * xi * xi
                else:
                    d = xi - k * q
                    sk[k] += r * d * d
        if step == steps or loglik - previous < tolerance:
            break
        previous = loglik
        # M step: noise share and pile (moments of a gamma, mean kept below q / 2)
        pi0 = nk[0] / n_total
        if nk[0] > 1e-9:
            mean = sk[0] / nk[0]
            var0 = max(s0x2 / nk[0] - mean * mean, 1e-30 * mean * mean + 1e-300)
            mean = min(mean, 0.5 * q)
            alpha = min(max(mean * mean / var0, 1.0), 200.0)
            theta = mean / alpha
        # proportions: non-increasing (Grenander)
        spikes = n_total - nk[0]
        for k in range(K):
            share[k] = nk[k + 1] / spikes if spikes > 1e-12 else 1.0 / K
        _pava_non_increasing(share, iso)
        total = 0.0
        for k in range(K):
            p[k] = max(iso[k], 0.0)
            total += p[k]
        for k in range(K):
            p[k] = p[k] / total if total > 0 else 1.0 / K
        # events of one spike at least SINGLE_TO_DOUBLE times as common as events of two (see the module notes):
        # the constrained maximum of p_1, p_2 keeps their sum and puts them at that ratio
        if K > 1 and p[0] < SINGLE_TO_DOUBLE * p[1]:
            pair = p[0] + p[1]
            p[0] = pair * SINGLE_TO_DOUBLE / (1.0 + SINGLE_TO_DOUBLE)
            p[1] = pair / (1.0 + SINGLE_TO_DOUBLE)
            total = 0.0
            for k in range(K):
                if k >= 2 and p[k] > p[1]:
                    p[k] = p[1]
                total += p[k]
            for k in range(K):
                p[k] /= total
        # variances: least squares of sum_k r (x - kq)^2 = n_k (a^2 + k v^2 q^2) over k
        s11 = 0.0
        s12 = 0.0
        s22 = 0.0
        t1 = 0.0
        t2 = 0.0
        for k in range(1, K + 1):
            w = nk[k]
            if w <= 1e-12:
                continue
            kq2 = k * q * q
            # rows: n_k * [1, k q^2] . [a^2, v^2] = sk[k]; normal equations weighted by 1 / n_k
            s11 += w
            s12 += w * kq2
            s22 += w * kq2 * kq2
            t1 += sk[k]
            t2 += sk[k] * kq2
        det = s11 * s22 - s12 * s12
        if det > 1e-12 * s11 * s22 and s11 > 0:
            new_a2 = (t1 * s22 - t2 * s12) / det
            new_v2 = (s11 * t2 - s12 * t1) / det
        else:
            new_a2 = t1 / max(s11, 1e-12)
            new_v2 = 0.0
        a2 = max(new_a2, noise_size * noise_size)
        v = min(max(math.sqrt(max(new_v2, 0.0)), _V_BOUNDS[0]), _V_BOUNDS[1])
    state[0], state[1], state[2], state[3], state[4] = pi0, alpha, theta, a2, v
    for k in range(K, _MAX_COMPONENTS):
        p[k] = 0.0
    return loglik, pi0, v
