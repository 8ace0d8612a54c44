"""Plain-Python (and numpy) reference of the exact AR solver, for the tests.

It follows the same algorithm as the compiled kernels (:mod:`calcium.infer.ar`): the same pool-pass rule,
with each pool's value recomputed from its frames at every step; the same exact support solves (dense here)
and the same pivoting rule.  Slow (dense algebra): use only on short traces.
"""
from __future__ import annotations

import numpy as np

from ._driver import initial_baseline, prepare_weights, tolerances
from ._state import MAX_PIVOTS
from .ar import check_ar_coefficients


def penalty_coefficients(T: int, g: np.ndarray) -> np.ndarray:
    r"""The factors :math:`a_t` with :math:`\sum_t s_t = \sum_t a_t c_t`."""
    a = np.full(T, 1.0 - g.sum())
    for i, gi in enumerate(g, start=1):
        a[T - i:] += gi
    return a


def deconvolve_ar_reference(y, coefficients, *, penalty, baseline=0.0, weights=None, min_spike=0.0):
    """Plain-Python (and numpy) implementation of the same algorithm, for tests.

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
    a = penalty_coefficients(T, np.array([g1, g2]))

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
