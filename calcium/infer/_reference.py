"""Plain-Python (numpy, scipy) references of the compiled kernels of ``calcium.infer``, for the tests.

The reference of a compiled kernel ``name`` (or ``_name``) is ``name_reference``; it computes the same thing
the obvious way (plain loops, dense algebra, numpy or scipy), so that the kernel can be checked against it.
``tests/test_infer_references.py`` keeps the registry of every compiled kernel and the reference it answers
to (a kernel that is one step of the exact AR solver answers to :func:`deconvolve_ar_reference`).

:func:`deconvolve_ar_reference` follows the same algorithm as the compiled solver (:mod:`calcium.infer.ar`):
the same pool-pass rule, with each pool's value recomputed from its frames at every step; the same exact
support solves (dense here) and the same pivoting rule.  Slow (dense algebra): use only on short traces.
"""
from __future__ import annotations

import math

import numpy as np
import scipy.optimize
import scipy.signal

from ._driver import initial_baseline, prepare_weights, tolerances
from ._state import DY, EY, MAX_PIVOTS, SW, A, B, C, F, H
from .ar import check_ar_coefficients


# --------------------------------------------------------------------------- the AR model
def response_tables_reference(g1: float, g2: float, n: int):
    """(h, tables): the impulse response h_0..h_{n-1} of c_t = g1 c_{t-1} + g2 c_{t-2} + s_t by its recursion,
    and the prefix sums over k < L of h_k^2, h_k f_k, f_k^2, h_k, f_k (f_k = g2 h_{k-1}) for L = 0..n."""
    h = np.zeros(n)
    for k in range(n):
        h[k] = 1.0 if k == 0 else g1 * h[k - 1] + (g2 * h[k - 2] if k >= 2 else 0.0)
    f = np.concatenate([[0.0], g2 * h[:-1]])
    tables = np.zeros((5, n + 1))
    tables[:, 1:] = np.cumsum([h * h, h * f, f * f, h, f], axis=1)
    return h, tables


def frame_penalty_reference(T: int, g) -> np.ndarray:
    r"""The factors :math:`a_t` with :math:`\sum_t s_t = \sum_t a_t c_t` (s_t = c_t - sum_i g_i c_{t-i})."""
    g = np.asarray(g, dtype=np.float64)
    a = np.full(T, 1.0 - g.sum())
    for i, gi in enumerate(g, start=1):
        a[T - i:] += gi
    return a


def backward_filter_reference(y, level: float, g1: float, g2: float):
    """(z, tail, max |y|, sum y^2): z_t = sum_{tau >= t} h_{tau - t} (y_tau - level) (two zeros appended) by
    scipy.signal.lfilter run over the reversed trace, and tail_t = sum_{tau >= t} (y_tau - level) (one zero)."""
    y = np.asarray(y, dtype=np.float64)
    z = scipy.signal.lfilter([1.0], [1.0, -g1, -g2], (y - level)[::-1])[::-1]
    tail = np.cumsum((y - level)[::-1])[::-1]
    return np.concatenate([z, [0.0, 0.0]]), np.concatenate([tail, [0.0]]), float(np.max(np.abs(y))), float(y @ y)


def data_scale_reference(y, w, unit: bool):
    """(max |y| over the weighted frames, sqrt(sum w y^2), max w)."""
    y = np.asarray(y, dtype=np.float64)
    w = np.ones_like(y) if unit else np.asarray(w, dtype=np.float64)
    seen = w > 0
    return float(np.max(np.abs(y[seen]), initial=0.0)), math.sqrt(float(np.sum(w * y * y))), float(w.max())


def objective_reference(y, w, unit: bool, lam: float, b: float, c, s) -> float:
    """1/2 sum w (y - b - c)^2 + lam sum s."""
    r = np.asarray(y) - b - np.asarray(c)
    w = np.ones_like(r) if unit else np.asarray(w)
    return 0.5 * float(np.sum(w * r * r)) + lam * float(np.sum(s))


# --------------------------------------------------------------------------- solves on a support
def _pools_residual(sums, v, p, b, syy, sy):
    """sum w (y' - b' - c)^2 of pools (v, p) at b', written out term by term from the pool sums (see
    _support.pool_sums): syy - 2 b' sy + b'^2 SW - 2 sum (v DY + p EY) + 2 b' sum (v H + p F)
    + sum (v^2 A + 2 v p B + p^2 C)."""
    return (syy - 2 * b * sy + b * b * sums[SW].sum() - 2 * np.sum(v * sums[DY] + p * sums[EY])
            + 2 * b * np.sum(v * sums[H] + p * sums[F])
            + np.sum(v * v * sums[A] + 2 * v * p * sums[B] + p * p * sums[C]))


def pools_rss_quadratic_reference(n, pools, b0, b1, syy, sy):
    """(c0, c1, c2) with residual(lam) = c0 + c1 lam + c2 lam^2 for the affine pools (v, p, b') = x0 - lam x1:
    the residual written out (_pools_residual) at lam = 0, 1, -1, and the quadratic through them."""
    sums = pools.sums[:, :n]

    def at(lam):
        return _pools_residual(sums, pools.value[:n] - lam * pools.value_slope[:n],
                               pools.start_value[:n] - lam * pools.start_value_slope[:n], b0 - lam * b1, syy, sy)

    r0, r1, r2 = at(0.0), at(1.0), at(-1.0)
    return r0, 0.5 * (r1 - r2), 0.5 * (r1 + r2) - r0


def project_out_reference(x, w, unit: bool, g1: float, g2: float, starts, free0: bool) -> np.ndarray:
    """x minus its (weighted) least-squares fit by a constant and the impulse response started at each pool
    start (frame 0 only if ``free0``): numpy.linalg.lstsq on the dense design."""
    x = np.asarray(x, dtype=np.float64)
    T = x.size
    h, _ = response_tables_reference(g1, g2, T)
    cols = [np.ones(T)] + [np.concatenate([np.zeros(t), h[:T - t]]) for t in starts if t > 0 or free0]
    design = np.array(cols).T
    root = np.ones(T) if unit else np.sqrt(np.asarray(w, dtype=np.float64))
    coef, *_ = np.linalg.lstsq(design * root[:, None], x * root, rcond=None)
    return x - design @ coef


# --------------------------------------------------------------------------- the exact AR solver
def deconvolve_ar_reference(y, coefficients, *, penalty, baseline=0.0, weights=None, min_spike=0.0):
    """Plain-Python (and numpy) implementation of :func:`calcium.infer.ar.deconvolve_ar`'s algorithm.

    The pool pass follows the same rule (each pool's value by least squares
    over its frames with the value before it held fixed, here recomputed
    from the frames at every step); the exact support solves (dense here)
    and the pivoting rule are the same.  Slow (dense algebra): use only on
    short traces.

    Returns (calcium, spikes, baseline).
    """
    y = np.asarray(y, dtype=np.float64)
    g = check_ar_coefficients(coefficients)
    y, w, unit, _ = prepare_weights(y, weights)
    if unit:
        w = np.ones_like(y)
    T = y.size
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    lam = float(penalty)
    fit_b = isinstance(baseline, str)
    thr = float(min_spike)
    h = np.zeros(T + 1)
    h[0] = 1.0
    for k in range(1, T + 1):
        h[k] = g1 * h[k - 1] + (g2 * h[k - 2] if k >= 2 else 0.0)
    a = frame_penalty_reference(T, [g1, g2])

    def spikes_of(c):
        s = c.copy()
        s[1:] -= g1 * c[:-1]
        s[2:] -= g2 * c[:-2]
        return s

    def least_squares(starts, pinned0, upto, b, free_b):
        """Exact minimiser over frames 0..upto-1 with spikes only at ``starts`` (free, any sign)."""
        cols = [t for t in starts if t < upto and not (t == 0 and pinned0)]
        # spikes that the weighted frames cannot tell apart (around frames of weight 0): drop the
        # last unobserved one until the rest are determined, as the pool recursion does
        while True:
            K = np.zeros((upto, len(cols)))
            for j, t in enumerate(cols):
                K[t:, j] = h[:upto - t]
            if free_b:
                K = np.hstack([K, np.ones((upto, 1))])
            ww = w[:upto]
            unobserved = [t for t in cols if ww[t] == 0]
            if not unobserved or np.linalg.matrix_rank(K[ww > 0]) == K.shape[1]:
                break
            cols.remove(unobserved[-1])
        lin = np.concatenate([np.full(len(cols), lam), [0.0] if free_b else []])
        M = K.T @ (ww[:, None] * K)
        rhs = K.T @ (ww * (y[:upto] - (0.0 if free_b else b))) - lin
        try:
            x = np.linalg.solve(M, rhs)
        except np.linalg.LinAlgError:
            x = np.linalg.lstsq(M, rhs, rcond=None)[0]
        if free_b:
            b = float(x[-1])
        c = K[:, :len(cols)] @ x[:len(cols)]
        return c, b, cols

    f = np.concatenate([[0.0], g2 * h[:-1]])  # f_k = g2 h_{k-1}: the response to the value before a pool

    def pool_value(st, en, p, first, b):
        """Least-squares value v of a pool over frames st..en-1 with its start value p held fixed."""
        k = np.arange(en - st)
        m = w[st:en] * (y[st:en] - b) - lam * a[st:en]
        A = float(np.sum(w[st:en] * h[k] ** 2))
        if A <= 0:
            return 0.0, A
        v = (float(np.dot(m, h[k])) - p * float(np.sum(w[st:en] * h[k] * f[k]))) / A
        if first and (v < thr or v <= 0.0):
            v = 0.0  # pool 0 has no spike before it: held at 0
        return v, A

    def greedy(b):
        """Pool pass at a fixed baseline; returns (pool starts, pool 0 pinned, its calcium)."""
        pools = [[0, 0.0, 0.0]]  # start, p = c just before, q = c two frames before (frozen)
        for t in range(1, T):
            st, p, q = pools[-1]
            v, _ = pool_value(st, t, p, len(pools) == 1, b)
            L = t - st
            # the frame's own value against the calcium the top pool predicts for it
            if w[t] > 0 and (w[t] * (y[t] - b) - lam * a[t]) / w[t] - (v * h[L] + p * f[L]) >= thr:
                pools.append([t, v * h[L - 1] + p * f[L - 1], v * h[L - 2] + p * f[L - 2] if L >= 2 else p])
                continue
            while len(pools) > 1:  # the frame joins the top pool; merge pools whose spike fell below thr
                st, p, q = pools[-1]
                v, A = pool_value(st, t + 1, p, False, b)
                if A > 0 and v - g1 * p - g2 * q >= thr:
                    break
                pools.pop()
        starts = [pool[0] for pool in pools]
        c = np.zeros(T)
        for i, (st, p, _) in enumerate(pools):
            en = starts[i + 1] if i + 1 < len(pools) else T
            v, _ = pool_value(st, en, p, i == 0, b)
            c[st:en] = v * h[:en - st] + p * f[:en - st]
        pinned0 = pool_value(0, starts[1] if len(starts) > 1 else T, 0.0, True, b)[0] == 0.0
        return starts, pinned0, c

    def full_solve(on, b, free_b):
        starts = [0] + [t for t in range(1, T) if on[t]]
        c, b, cols = least_squares(starts, not on[0], T, b, free_b)
        on[:] = False
        on[cols] = True
        return c, b

    def support_of(starts, pinned0):
        on = np.zeros(T, dtype=bool)
        on[starts] = True
        on[0] = not pinned0
        return on

    def gradient(c, b):
        r = w * (y - b - c)
        z = np.zeros(T + 2)
        for t in range(T - 1, -1, -1):
            z[t] = r[t] + g1 * z[t + 1] + g2 * z[t + 2]
        return lam - z[:T]

    b = float(baseline) if not fit_b else initial_baseline(y, w, False)
    starts, pinned0, c = greedy(b)
    on = support_of(starts, pinned0)
    if thr > 0 or (g2 == 0.0 and g1 > 0 and not fit_b):
        # the pass's own solution (exact for AR(1) with thr = 0)
        return c, np.maximum(np.where(on, spikes_of(c), 0.0), 0.0), b
    tol_s, tol_g, _ = tolerances(y, w, False, lam)
    best, tries = T + 2, 3
    for _ in range(MAX_PIVOTS):
        c, b = full_solve(on, b, fit_b)
        s = np.where(on, spikes_of(c), 0.0)
        grad = gradient(c, b)
        neg = [t for t in range(T) if on[t] and s[t] < -tol_s]
        want = [t for t in range(T) if not on[t] and grad[t] < -tol_g]
        bad = sorted(neg + want)
        if not bad:
            return c, np.maximum(s, 0.0), b
        if len(bad) < best:
            best, tries, full = len(bad), 3, True
        elif tries > 0:
            tries, full = tries - 1, True
        else:
            full = False
        if full:
            on[neg] = False
            # of each run of adjacent frames that want a spike, add the most wanting one
            run = []
            for t in range(T + 1):
                if t < T and t in want and (not run or t == run[-1] + 1):
                    run.append(t)
                    continue
                if run:
                    on[min(run, key=lambda i: grad[i])] = True
                    run = [t] if t < T and t in want else []
        else:
            on[bad[-1]] = not on[bad[-1]]
    return c, np.maximum(s, 0.0), b


# --------------------------------------------------------------------------- kinetics, counts, quantal sizes
def autocovariance_reference(y, observed, max_lag: int) -> np.ndarray:
    """Autocovariance at lags 0..max_lag: the mean of (y_t - m)(y_{t+k} - m) over the pairs of observed frames,
    m the mean of the observed frames."""
    y = np.asarray(y, dtype=np.float64)
    observed = np.asarray(observed, dtype=bool)
    d = y - y[observed].mean()
    out = np.zeros(max_lag + 1)
    for k in range(max_lag + 1):
        both = observed[:y.size - k] & observed[k:]
        if both.any():
            out[k] = np.mean(d[:y.size - k][both] * d[k:][both])
    return out


def weighted_rss_reference(y, w, unit: bool, b: float, c) -> float:
    r = np.asarray(y) - b - np.asarray(c)
    return float(np.sum(r * r if unit else np.asarray(w) * r * r))


def level_stats_reference(y, w, unit: bool, b: float):
    """(sum w (y - b)^2, sum w (y - b), sum w)."""
    r = np.asarray(y) - b
    w = np.ones_like(r) if unit else np.asarray(w)
    return float(np.sum(w * r * r)), float(np.sum(w * r)), float(np.sum(w))


def coefficient_derivative_reference(c, g1: float, g2: float) -> np.ndarray:
    """dc/dg1 with the spikes held: u_t = c_{t-1} + g1 u_{t-1} + g2 u_{t-2}, by scipy.signal.lfilter."""
    return scipy.signal.lfilter([0.0, 1.0], [1.0, -g1, -g2], np.asarray(c, dtype=np.float64))


def shift_in_place_reference(x, lag: int) -> np.ndarray:
    """x moved ``lag`` frames earlier, zeros at the end (a new array)."""
    x = np.asarray(x, dtype=np.float64)
    return np.concatenate([x[lag:], np.zeros(min(lag, x.size))])


def event_bounds_reference(activity, merge_gap: int):
    """(starts, stops, totals) of the events: runs of frames with activity > 0, runs at most ``merge_gap``
    empty frames apart joined."""
    starts, stops, totals = [], [], []
    for t, x in enumerate(np.asarray(activity, dtype=np.float64)):
        if not x > 0:
            continue
        if stops and t - stops[-1] <= merge_gap:
            totals[-1] += x
        else:
            starts.append(t)
            totals.append(x)
            stops.append(t)
        stops[-1] = t + 1
    return np.array(starts, dtype=np.int64), np.array(stops, dtype=np.int64), np.array(totals)


def place_spikes_reference(activity, merge_gap: int, threshold: float) -> np.ndarray:
    """Spike positions in frames: an event of total a >= threshold has n = max(1, round(a)) spikes, at the
    quantiles (i + 1/2) / n of its activity, frame f's activity spread evenly over [f - 1/2, f + 1/2]."""
    activity = np.asarray(activity, dtype=np.float64)
    out = []
    for a, b, total in zip(*event_bounds_reference(activity, merge_gap)):
        if total < threshold:
            continue
        n = max(1, int(math.floor(total + 0.5)))
        frames = np.array([f for f in range(a, b) if activity[f] > 0])
        mass = activity[frames]
        edges = np.concatenate([[0.0], np.cumsum(mass)])
        for i in range(n):
            target = (i + 0.5) / n * total
            k = min(int(np.searchsorted(edges, target, side="left")) - 1, frames.size - 1)
            k = max(k, 0)
            out.append(frames[k] - 0.5 + (target - edges[k]) / mass[k])
    return np.array(out)


def pava_non_increasing_reference(values) -> np.ndarray:
    """Non-increasing isotonic regression with unit weights: scipy.optimize.isotonic_regression."""
    return scipy.optimize.isotonic_regression(np.asarray(values, dtype=np.float64), increasing=False).x


def em_fit_reference(x, weight, q: float, noise_size: float, steps: int, tolerance: float, state, p, fresh: bool):
    """EM for the quantal mixture at a fixed quantum q (see :mod:`calcium.infer.quantal`), vectorised over the
    events with numpy: a gamma noise pile and Gaussian components at k q with variance a^2 + k v^2 q^2, their
    proportions non-increasing (PAVA, scipy) with single events at least SINGLE_TO_DOUBLE times as common as
    double ones.  Every component enters every event (the compiled EM skips those more than 8 s.d. away).
    ``state`` (pi0, alpha, theta, a^2, v) and ``p`` are read (unless ``fresh``) and written; returns
    (log-likelihood, noise share, v)."""
    from scipy.special import gammaln

    from .quantal import _MAX_COMPONENTS, _V_BOUNDS, SINGLE_TO_DOUBLE

    x = np.asarray(x, dtype=np.float64)
    weight = np.asarray(weight, dtype=np.float64)
    n_total = float(weight.sum())
    K = min(_MAX_COMPONENTS, max(3, int(math.ceil(x[-1] / q)) + 2))
    if fresh:
        p[:K] = 0.5 ** np.arange(1, K + 1)
        p[:K] /= p[:K].sum()
        below = x < 0.5 * q
        mean0 = x[int(below.sum()) // 2] if weight[below].sum() > 4 else min(3.0 * noise_size, 0.4 * q)
        state[:5] = 0.5, 8.0, mean0 / 8.0, noise_size * noise_size, 0.15
    else:
        p[K - 1] += p[K:].sum()
        p[K:] = 0.0
        total = p[:K].sum()
        p[:K] = p[:K] / total if total > 0 else 1.0 / K
        if state[2] * state[1] > 0.5 * q:
            state[2] = 0.5 * q / state[1]
    pi0, alpha, theta, a2, v = state[:5]
    k = np.arange(1, K + 1)
    loglik = previous = -np.inf
    for step in range(steps + 1):
        var = a2 + k * v * v * q * q
        log_noise = (math.log(max(pi0, 1e-300)) - gammaln(alpha) - alpha * math.log(theta)
                     + (alpha - 1.0) * np.log(x) - x / theta)
        log_spikes = (np.log(np.maximum((1.0 - pi0) * p[:K], 1e-300)) - 0.5 * (x[:, None] - k * q) ** 2 / var
                      - 0.5 * np.log(2.0 * np.pi * var))
        logs = np.column_stack([log_noise, log_spikes])
        top = logs.max(axis=1, keepdims=True)
        resp = np.exp(logs - top)
        total = resp.sum(axis=1, keepdims=True)
        loglik = float(np.sum(weight * (top[:, 0] + np.log(total[:, 0]))))
        r = weight[:, None] * resp / total
        nk = r.sum(axis=0)
        if step == steps or loglik - previous < tolerance:
            break
        previous = loglik
        pi0 = nk[0] / n_total
        if nk[0] > 1e-9:
            mean = float(r[:, 0] @ x) / nk[0]
            var0 = max(float(r[:, 0] @ (x * x)) / nk[0] - mean * mean, 1e-30 * mean * mean + 1e-300)
            mean = min(mean, 0.5 * q)
            alpha = min(max(mean * mean / var0, 1.0), 200.0)
            theta = mean / alpha
        spikes = n_total - nk[0]
        share = nk[1:] / spikes if spikes > 1e-12 else np.full(K, 1.0 / K)
        iso = np.maximum(pava_non_increasing_reference(share), 0.0)
        p[:K] = iso / iso.sum() if iso.sum() > 0 else 1.0 / K
        if K > 1 and p[0] < SINGLE_TO_DOUBLE * p[1]:
            pair = p[0] + p[1]
            p[0], p[1] = pair * SINGLE_TO_DOUBLE / (1.0 + SINGLE_TO_DOUBLE), pair / (1.0 + SINGLE_TO_DOUBLE)
            p[2:K] = np.minimum(p[2:K], p[1])
            p[:K] /= p[:K].sum()
        sk = np.sum(r[:, 1:] * (x[:, None] - k * q) ** 2, axis=0)
        used = nk[1:] > 1e-12
        kq2 = k * q * q
        s11, s12, s22 = nk[1:][used].sum(), (nk[1:] * kq2)[used].sum(), (nk[1:] * kq2 * kq2)[used].sum()
        t1, t2 = sk[used].sum(), (sk * kq2)[used].sum()
        det = s11 * s22 - s12 * s12
        if det > 1e-12 * s11 * s22 and s11 > 0:
            new_a2, new_v2 = (t1 * s22 - t2 * s12) / det, (s11 * t2 - s12 * t1) / det
        else:
            new_a2, new_v2 = t1 / max(s11, 1e-12), 0.0
        a2 = max(new_a2, noise_size * noise_size)
        v = min(max(math.sqrt(max(new_v2, 0.0)), _V_BOUNDS[0]), _V_BOUNDS[1])
    state[:5] = pi0, alpha, theta, a2, v
    p[K:] = 0.0
    return loglik, pi0, v


def profile_reference(x, weight, grid, noise_size: float, steps: int, tolerance: float):
    """The profile likelihood over the ascending grid of quanta: em_fit_reference at each from its default
    start; returns (log-likelihoods, noise shares, v, proportions)."""
    from .quantal import _MAX_COMPONENTS

    state = np.empty(5)
    p = np.zeros(_MAX_COMPONENTS)
    out = np.empty((3, len(grid)))
    proportions = np.zeros((len(grid), _MAX_COMPONENTS))
    for j, q in enumerate(grid):
        out[:, j] = em_fit_reference(x, weight, q, noise_size, steps, tolerance, state, p, True)
        proportions[j] = p
    return out[0], out[1], out[2], proportions
