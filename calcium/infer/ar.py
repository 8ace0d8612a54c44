r"""Exact non-negative deconvolution of a trace under an AR(1) or AR(2) calcium model.

The problem solved here, for a trace :math:`y_0 \dots y_{T-1}`, frame weights
:math:`w_t \ge 0`, a baseline :math:`b` and AR coefficients :math:`g`, is

.. math::

    \min_{c,\,b}\; \tfrac12 \sum_t w_t\,(y_t - b - c_t)^2 + \lambda \sum_t s_t
    \quad\text{s.t.}\quad s_t = c_t - \sum_{i=1}^{p} g_i\, c_{t-i} \ge 0,
    \qquad c_t = 0 \text{ for } t < 0,

the non-negative sparse deconvolution model of Vogelstein et al. (2010) [1]_.
It is solved by an active-set pool-adjacent-violators method of the kind
described by Friedrich, Zhou & Paninski (2017) [2]_: frames are grouped into
*pools* that start with a spike and then follow the AR impulse response; a
new frame opens a pool, and a pool whose starting spike would be negative is
merged into the pool before it.  Each pool keeps a handful of running sums,
so a merge costs O(1) and the pass costs O(T) in the expected case.

For AR(1) with :math:`0 < g < 1` and a fixed baseline this pass is already
exact (the problem is an isotonic regression in disguise).  For AR(2), for a
fitted baseline and for unusual coefficients the pass gives a support (the
set of frames with a spike) that is then finished exactly: the problem
restricted to a support is an equality-constrained quadratic programme that
a backward recursion over the pools solves in O(T) (see :func:`_pools_solve`),
and the Karush-Kuhn-Tucker conditions are checked on every frame; frames that
violate them are exchanged by block principal pivoting [3]_ until none do.
Should the pivoting cycle (degenerate problems: many frames of weight 0, a
near-zero penalty), a primal active-set method [4]_ restarts from a feasible
point; it lowers the objective at every step.

References
----------
.. [1] Vogelstein, J. T., Packer, A. M., Machado, T. A., Sippy, T., Babadi, B.,
   Yuste, R. & Paninski, L. (2010). Fast nonnegative deconvolution for spike
   train inference from population calcium imaging. J. Neurophysiol. 104,
   3691-3704.
.. [2] Friedrich, J., Zhou, P. & Paninski, L. (2017). Fast online deconvolution
   of calcium imaging data. PLoS Comput. Biol. 13(3), e1005423.
.. [3] Júdice, J. J. & Pires, F. M. (1994). A block principal pivoting
   algorithm for large-scale strictly monotone linear complementarity
   problems. Comput. Oper. Res. 21, 587-596.
.. [4] Lawson, C. L. & Hanson, R. J. (1974). Solving Least Squares Problems.
   Prentice-Hall, ch. 23.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass

import numpy as np
from numba import njit

from .._checks import as_traces, check_nonnegative

__all__ = ["ARDeconvolution", "deconvolve_ar", "check_ar_coefficients", "ar_objective"]

# Solver outcomes of the support solve.
_OK, _SINGULAR_POOL, _NO_BASELINE = 0, 1, 2
# Relative tolerances of the optimality check (scaled by the data; see _tolerances).
_TOL_SPIKE = 1e-11
_TOL_GRADIENT = 1e-11
_MAX_PIVOTS = 500
# Values below this are set to 0 in the decaying recursions: far below any
# meaningful calcium level, and it keeps the arithmetic out of the (very slow)
# subnormal range.
_FLUSH = 1e-150


# --------------------------------------------------------------------------- result
@dataclass(frozen=True)
class ARDeconvolution:
    """Result of :func:`deconvolve_ar`.

    Attributes
    ----------
    calcium : ndarray, shape (T,)
        Denoised calcium :math:`c_t` (same units as the trace, baseline removed).
    spikes : ndarray, shape (T,)
        :math:`s_t = c_t - \\sum_i g_i c_{t-i} \\ge 0`; ``spikes[0]`` is the
        calcium already present at the first frame.
    baseline : float
        The baseline :math:`b` (given or fitted).
    penalty : float
        The weight :math:`\\lambda` of the sparsity term.
    objective : float
        Value of the objective at the solution.
    iterations : int
        Passes over the trace: pool passes plus exact support solves.
    converged : bool
        True when the optimality conditions were verified on every frame
        (False only when the pivoting and its fallback both hit their
        iteration limits, on a degenerate problem).  For ``min_spike > 0``
        True means the pool pass finished, which does not certify a global
        optimum of that non-convex problem.
    coefficients : ndarray
        The AR coefficients used.
    """

    calcium: np.ndarray
    spikes: np.ndarray
    baseline: float
    penalty: float
    objective: float
    iterations: int
    converged: bool
    coefficients: np.ndarray


# --------------------------------------------------------------------------- checks
def check_ar_coefficients(coefficients, name: str = "coefficients") -> np.ndarray:
    """Validate AR(1)/AR(2) coefficients; return them as a float64 array.

    The AR polynomial :math:`z^p - g_1 z^{p-1} - \\dots - g_p` must have every
    root strictly inside the unit circle (a stable, decaying response).
    """
    try:
        g = np.asarray(coefficients, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be 1 or 2 real numbers (AR(1) or AR(2)), got {coefficients!r}") from None
    if g.size not in (1, 2) or not np.all(np.isfinite(g)):
        raise ValueError(f"{name} must be 1 or 2 finite real numbers (AR(1) or AR(2)), got {coefficients!r}")
    roots = np.roots(np.concatenate([[1.0], -g]))
    radius = float(np.max(np.abs(roots))) if roots.size else 0.0
    if not radius < 1.0 - 1e-12:
        raise ValueError(f"{name}={g.tolist()!r}: the AR polynomial has a root of modulus {radius:.6g}; every root "
                         "must lie strictly inside the unit circle (a decaying impulse response)")
    return g


def _prepare_weights(y: np.ndarray, weights, name: str = "weights"):
    """Return (y with missing set to 0, weights, unit_weights flag, number of weighted frames)."""
    finite = np.isfinite(y)
    all_finite = bool(finite.all())
    if weights is None:
        if all_finite:
            return y, np.ones(0), True, y.size
        w = finite.astype(np.float64)
    else:
        w = np.asarray(weights, dtype=np.float64)
        if w.shape != y.shape:
            raise ValueError(f"{name} must have the trace's shape {y.shape}, got {w.shape}")
        if not np.all(np.isfinite(w)) or np.any(w < 0):
            raise ValueError(f"{name} must be finite and >= 0")
        w = np.where(finite, w, 0.0)
    y = np.where(finite, y, 0.0) if not all_finite else y
    n_obs = int(np.count_nonzero(w))
    if n_obs == 0:
        raise ValueError("the trace has no frame with a positive weight (all frames missing or weighted 0)")
    return y, w, False, n_obs


def _penalty_coefficients(T: int, g: np.ndarray) -> np.ndarray:
    r"""The factors :math:`a_t` with :math:`\sum_t s_t = \sum_t a_t c_t`."""
    a = np.full(T, 1.0 - g.sum())
    for i, gi in enumerate(g, start=1):
        a[T - i:] += gi
    return a


def ar_objective(y, calcium, coefficients, *, penalty, baseline=0.0, weights=None) -> float:
    """Objective of :func:`deconvolve_ar` at a given calcium trace (spikes taken from it)."""
    y = np.asarray(y, dtype=np.float64)
    c = np.asarray(calcium, dtype=np.float64)
    g = np.asarray(coefficients, dtype=np.float64).ravel()
    y, w, unit, _ = _prepare_weights(y, weights)
    s = c.copy()
    for i, gi in enumerate(g, start=1):
        s[i:] -= gi * c[:-i]
    r = y - baseline - c
    fit = 0.5 * float(np.dot(r, r) if unit else np.dot(w * r, r))
    return fit + float(penalty) * float(s.sum())


# --------------------------------------------------------------------------- numba kernels
@njit(cache=True)
def _impulse(g1, g2, n):
    """AR impulse response h[0..n-1] (h[0] = 1)."""
    h = np.zeros(max(n, 2))
    h[0] = 1.0
    h[1] = g1
    for k in range(2, n):
        x = g1 * h[k - 1] + g2 * h[k - 2]
        if abs(x) < _FLUSH and abs(h[k - 1]) < _FLUSH:
            break  # the rest is 0: stop before subnormal numbers slow everything down
        h[k] = x
    return h


@njit(cache=True, inline="always")
def _frame_penalty(t, T, g1, g2):
    """a_t of the linear term lambda * sum_t a_t c_t."""
    if t < T - 2:
        return 1.0 - g1 - g2
    if t == T - 2:
        return 1.0 - g1
    return 1.0


@njit(cache=True)
def _greedy_ar1(y, w, unit, g, lam, b, thr, c, s, pstart, pval, pA, pD, pG):
    """Pool pass for AR(1); exact for 0 < g < 1 when thr == 0.

    Fills ``c`` and ``s``; returns the number of pools (their starts and values
    in ``pstart``/``pval``, their sums in ``pA``/``pD``).
    """
    T = y.shape[0]
    lam_mid = lam * (1.0 - g)
    # the newest pool ("top": tA, tD, tG = g^length, tst, tv) lives in registers; pools 0..n-1 below it in
    # the arrays, so the common step (a frame joins the top pool) touches memory only to read pool n-1
    wt = 1.0 if unit else w[0]
    tA = wt
    tD = wt * (y[0] - b) - (lam_mid if T > 1 else lam)
    tG = g
    tst = 0
    tv = tD / tA if tA > 0.0 else 0.0
    if tv < thr or tv < 0.0:
        tv = 0.0
    n = 0
    for t in range(1, T):
        wt = 1.0 if unit else w[t]
        A = wt
        D = wt * (y[t] - b) - (lam_mid if t < T - 1 else lam)
        # spike v - g^L v_top >= thr with v = D / A, tested without a division (A > 0)
        if A > 0.0 and D - A * (tv * tG + thr) >= 0.0:
            pstart[n] = tst
            pA[n] = tA
            pD[n] = tD
            pG[n] = tG
            pval[n] = tv
            n += 1
            tA = A
            tD = D
            tG = g
            tst = t
            tv = D / A
            continue
        # the frame's spike would be negative (or below thr): it joins the top pool, which must then
        # be checked against the pool below it (and merged into it, and so on)
        A = tA + tG * tG * A
        D = tD + tG * D
        G = tG * g
        if G < _FLUSH:
            G = 0.0
        st = tst
        while True:
            if n == 0:
                v = D / A if A > 0.0 else 0.0
                if v < thr or v < 0.0:
                    v = 0.0
                break
            j = n - 1
            gj = pG[j]
            if A > 0.0 and D - A * (pval[j] * gj + thr) >= 0.0:
                v = D / A
                break
            A = pA[j] + gj * gj * A
            D = pD[j] + gj * D
            G = gj * G
            if G < _FLUSH:
                G = 0.0
            st = pstart[j]
            n -= 1
        tA = A
        tD = D
        tG = G
        tst = st
        tv = v
    pstart[n] = tst
    pA[n] = tA
    pD[n] = tD
    pG[n] = tG
    pval[n] = tv
    n += 1
    # expand the pools
    for i in range(n):
        st = pstart[i]
        en = pstart[i + 1] if i + 1 < n else T
        v = pval[i]
        s[st] = v - g * c[st - 1] if st > 0 else v
        x = v
        c[st] = x
        for t in range(st + 1, en):
            x *= g
            if abs(x) < _FLUSH:
                x = 0.0
            c[t] = x
            s[t] = 0.0
    return n


@njit(cache=True, inline="always")
def _pool_out(j, L, pinned, g2, h, A, B, C, D, E, inpf, inpb, inK, ink,
              opf, opb, oK, ok, oqa, oqe, oxv0, oxve, oxp0, oxpe, tiny):
    """Arrival cost that pool j hands to the pool after it.

    R_j(v, p) = cost_j(v, p) + G_j(p) is the least cost of pools 0..j for
    given (v, p) of pool j.  Minimising it under "pool j ends at e" gives the
    next pool's arrival cost G(e) = K e^2 / 2 - k e (+ const), the optimal
    (v, p) of pool j as an affine map of e, and the value of c two frames
    before the next pool (q) as an affine map of e.  When e cannot move (the
    pool's response has decayed to 0, or pool 0 is pinned) the next pool
    gets p fixed instead.
    """
    a1 = h[L - 1]
    a2 = g2 * h[L - 2] if L >= 2 else 0.0
    if L == 1:
        c1 = 0.0
        c2 = 1.0
    else:
        c1 = h[L - 2]
        c2 = g2 * h[L - 3] if L >= 3 else 0.0
    # outcome: next pool's p fixed (pf, pb) or its arrival quadratic (K, k); pool j's (v, p) = x0 + xe * e
    if pinned:
        pf, pb_out, K, k, xv0, xve, xp0, xpe = True, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
    elif inpf:
        pb = inpb
        dv = D - B * pb
        if abs(a1) > _FLUSH:
            inv = 1.0 / a1
            K = A * inv * inv
            pf, pb_out, k, xv0, xve, xp0, xpe = False, 0.0, dv * inv + K * a2 * pb, -a2 * pb * inv, inv, pb, 0.0
        else:
            v = dv / A
            pf, pb_out, K, k, xv0, xve, xp0, xpe = True, a1 * v + a2 * pb, 0.0, 0.0, v, 0.0, pb, 0.0
    else:
        qpp = C + inK
        lp = E + ink
        inv_det = 1.0 / (A * qpp - B * B)
        x0v = (qpp * D - B * lp) * inv_det
        x0p = (A * lp - B * D) * inv_det
        dv = (qpp * a1 - B * a2) * inv_det
        dp = (A * a2 - B * a1) * inv_det
        sq = a1 * dv + a2 * dp
        e0 = a1 * x0v + a2 * x0p
        if sq > tiny:
            inv_sq = 1.0 / sq
            xve = dv * inv_sq
            xpe = dp * inv_sq
            pf, pb_out, K, k, xv0, xp0 = False, 0.0, inv_sq, e0 * inv_sq, x0v - xve * e0, x0p - xpe * e0
        else:
            pf, pb_out, K, k, xv0, xve, xp0, xpe = True, e0, 0.0, 0.0, x0v, 0.0, x0p, 0.0
    opf[j] = pf
    opb[j] = pb_out
    oK[j] = K
    ok[j] = k
    oxv0[j] = xv0
    oxve[j] = xve
    oxp0[j] = xp0
    oxpe[j] = xpe
    oqa[j] = c1 * oxv0[j] + c2 * oxp0[j]
    oqe[j] = c1 * oxve[j] + c2 * oxpe[j]


@njit(cache=True, inline="always")
def _store_pool(i, start, A, B, C, D, E, pstart, pA, pB, pC, pD, pE):
    pstart[i] = start
    pA[i] = A
    pB[i] = B
    pC[i] = C
    pD[i] = D
    pE[i] = E


@njit(cache=True)
def _greedy_dp(y, w, unit, g1, g2, h, lam, b, thr, c, s, pstart, pval, pprev, pA, pB, pC, pD, pE,
               opf, opb, oK, ok, oqa, oqe, oxv0, oxve, oxp0, oxpe, tiny):
    """Pool pass with exact filtered values (AR(1) or AR(2), fixed baseline).

    Every decision uses the optimum of the problem cut at the current frame
    with the current pools as support: pool j's arrival cost (see _pool_out)
    carries the best arrangement of the pools before it, so the newest pool's
    value, the calcium just before it and its spike are exact for that cut
    problem.  A pool whose spike would be negative (below thr) is merged into
    the pool before it, as in the AR(1) pass.  At the end a backward sweep
    through the stored affine maps gives the exact optimum on the final
    support; earlier pools' spikes are not re-checked here (the caller checks
    the optimality conditions).  Returns the number of pools and whether
    pool 0 is pinned at 0.
    """
    T = y.shape[0]
    n = 0
    pinned0 = False
    for t in range(T):
        wt = 1.0 if unit else w[t]
        A = wt
        B = 0.0
        C = 0.0
        D = wt * (y[t] - b) - lam * _frame_penalty(t, T, g1, g2)
        E = 0.0
        st = t
        while True:
            if n == 0:
                v = D / A if A > 0.0 else 0.0
                pinned0 = v < thr or v <= 0.0
                _store_pool(0, st, A, B, C, D, E, pstart, pA, pB, pC, pD, pE)
                _pool_out(0, t + 1 - st, pinned0, g2, h, A, B, C, D, E, True, 0.0, 0.0, 0.0,
                          opf, opb, oK, ok, oqa, oqe, oxv0, oxve, oxp0, oxpe, tiny)
                n = 1
                break
            j = n - 1
            if A > 0.0:
                # spike test without divisions: u * den >= thr * den with den > 0
                if opf[j]:
                    p = opb[j]
                    den = A
                    vn = D - B * p
                    pn = p * den
                else:
                    qpp = C + oK[j]
                    lp = E + ok[j]
                    den = A * qpp - B * B
                    vn = qpp * D - B * lp
                    pn = A * lp - B * D
                qn = oqa[j] * den + oqe[j] * pn
                if vn - g1 * pn - g2 * qn >= thr * den:
                    _store_pool(n, st, A, B, C, D, E, pstart, pA, pB, pC, pD, pE)
                    _pool_out(n, t + 1 - st, False, g2, h, A, B, C, D, E, opf[j], opb[j], oK[j], ok[j],
                              opf, opb, oK, ok, oqa, oqe, oxv0, oxve, oxp0, oxpe, tiny)
                    n += 1
                    break
            # merge into pool j: on the second part c = alpha h_i + beta g2 h_{i-1}
            # with (alpha, beta) = (c_{t0+Lj}, c_{t0+Lj-1}) linear in pool j's (v, p)
            Lj = st - pstart[j]
            a1 = h[Lj]
            a2 = g2 * h[Lj - 1]
            b1 = h[Lj - 1]
            b2 = g2 * h[Lj - 2] if Lj >= 2 else 0.0
            nA = pA[j] + a1 * a1 * A + 2.0 * a1 * b1 * B + b1 * b1 * C
            nB = pB[j] + a1 * a2 * A + (a1 * b2 + a2 * b1) * B + b1 * b2 * C
            nC = pC[j] + a2 * a2 * A + 2.0 * a2 * b2 * B + b2 * b2 * C
            nD = pD[j] + a1 * D + b1 * E
            nE = pE[j] + a2 * D + b2 * E
            A, B, C, D, E = nA, nB, nC, nD, nE
            st = pstart[j]
            n -= 1
    # backward sweep: exact values on the final support
    j = n - 1
    if j == 0:
        v = 0.0 if pinned0 else pD[0] / pA[0]
        p = 0.0
    else:
        k = j - 1
        if opf[k]:
            p = opb[k]
            v = (pD[j] - pB[j] * p) / pA[j]
        else:
            qpp = pC[j] + oK[k]
            lp = pE[j] + ok[k]
            det = pA[j] * qpp - pB[j] * pB[j]
            v = (qpp * pD[j] - pB[j] * lp) / det
            p = (pA[j] * lp - pB[j] * pD[j]) / det
    pval[j] = v
    pprev[j] = p
    for j in range(n - 2, -1, -1):
        e = pprev[j + 1]
        pval[j] = oxv0[j] + oxve[j] * e
        pprev[j] = oxp0[j] + oxpe[j] * e
    # expand
    for i in range(n):
        st = pstart[i]
        en = pstart[i + 1] if i + 1 < n else T
        v = pval[i]
        c1 = c[st - 1] if st >= 1 else 0.0
        c2 = c[st - 2] if st >= 2 else 0.0
        s[st] = v - g1 * c1 - g2 * c2
        c[st] = v
        c1 = v
        c2 = c[st - 1] if st >= 1 else 0.0
        for t in range(st + 1, en):
            x = g1 * c1 + g2 * c2
            if abs(x) < _FLUSH and abs(c1) < _FLUSH:
                x = 0.0
            c[t] = x
            s[t] = 0.0
            c2 = c1
            c1 = x
    return n, pinned0


@njit(cache=True)
def _pool_sums(y, w, unit, g1, g2, h, lam, b, fit_b, starts, n, A, B, C, D, E, H, F, SW, SWY):
    """Per-pool sums of the quadratic cost (see _pools_solve)."""
    T = y.shape[0]
    bb = 0.0 if fit_b else b
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        sa = 0.0
        sb = 0.0
        sc = 0.0
        sd = 0.0
        se = 0.0
        sh = 0.0
        sf = 0.0
        sw = 0.0
        swy = 0.0
        for t in range(st, en):
            k = t - st
            hk = h[k]
            fk = g2 * h[k - 1] if k >= 1 else 0.0
            wt = 1.0 if unit else w[t]
            m = wt * (y[t] - bb) - lam * _frame_penalty(t, T, g1, g2)
            sa += wt * hk * hk
            sb += wt * hk * fk
            sc += wt * fk * fk
            sd += m * hk
            se += m * fk
            if fit_b:
                sh += wt * hk
                sf += wt * fk
                sw += wt
                swy += wt * y[t]
        A[i] = sa
        B[i] = sb
        C[i] = sc
        D[i] = sd
        E[i] = se
        H[i] = sh
        F[i] = sf
        SW[i] = sw
        SWY[i] = swy


@njit(cache=True)
def _pools_solve(T, g1, g2, h, starts, n, free0, fit_b, b, A, B, C, D, E, H, F, SW, SWY,
                 mvv, mvp, mvb, lv, c, tiny):
    r"""Exact minimiser with the spikes restricted to the pool starts.

    Pool i (start t_i, length L_i) has calcium c = v h_k + p g2 h_{k-1}, with
    v its first value and p = c_{t_i - 1}; its cost is a quadratic in
    (v, p, b) given by the sums A..SWY.  The next pool's p is linear in
    (v, p).  A backward recursion over the pools carries the optimal
    cost-to-go as a quadratic in (p, b); a forward pass recovers v.
    Returns (baseline, status, index of a singular pool).
    """
    P11 = 0.0
    P12 = 0.0
    P22 = 0.0
    r1 = 0.0
    r2 = 0.0
    for i in range(n - 1, -1, -1):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        L = en - st
        al = h[L - 1]
        be = g2 * h[L - 2] if L >= 2 else 0.0
        Mvv = A[i] + P11 * al * al
        Mvp = B[i] + P11 * al * be
        Mpp = C[i] + P11 * be * be
        Mvb = H[i] + P12 * al
        Mpb = F[i] + P12 * be
        Mbb = SW[i] + P22
        l_v = D[i] + r1 * al
        l_p = E[i] + r1 * be
        l_b = SWY[i] + r2
        if i > 0 or free0:
            if not Mvv > tiny:
                # the data cannot see v_i apart from the later spikes; the cost is linear in it: with
                # l_v > 0 it grows until the next pool's spike reaches 0, else its own spike does
                if l_v > 0.0 and i + 1 < n:
                    return b, _SINGULAR_POOL, i + 1
                return b, _SINGULAR_POOL, i
            inv = 1.0 / Mvv
            mvv[i] = inv
            mvp[i] = Mvp
            mvb[i] = Mvb
            lv[i] = l_v
            P11 = Mpp - Mvp * Mvp * inv
            P12 = Mpb - Mvp * Mvb * inv
            P22 = Mbb - Mvb * Mvb * inv
            r1 = l_p - Mvp * l_v * inv
            r2 = l_b - Mvb * l_v * inv
        else:
            P11 = Mpp
            P12 = Mpb
            P22 = Mbb
            r1 = l_p
            r2 = l_b
    status = _OK
    if fit_b:
        if P22 > tiny:
            b = r2 / P22
        else:
            status = _NO_BASELINE
    # forward: fill c
    p = 0.0
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        if i > 0 or free0:
            v = (lv[i] - mvp[i] * p - (mvb[i] * b if fit_b else 0.0)) * mvv[i]
        else:
            v = 0.0
        c[st] = v
        c1 = v
        c2 = p
        for t in range(st + 1, en):
            x = g1 * c1 + g2 * c2
            if abs(x) < _FLUSH and abs(c1) < _FLUSH:
                x = 0.0
            c[t] = x
            c2 = c1
            c1 = x
        p = c1
    return b, status, -1


@njit(cache=True)
def _starts_from_support(on, starts):
    n = 1
    starts[0] = 0
    for t in range(1, on.shape[0]):
        if on[t]:
            starts[n] = t
            n += 1
    return n


@njit(cache=True, inline="always")
def _spike_at(c, t, g1, g2):
    """s_t = c_t - g1 c_{t-1} - g2 c_{t-2} (c = 0 before the first frame)."""
    x = c[t]
    if t >= 1:
        x -= g1 * c[t - 1]
    if t >= 2:
        x -= g2 * c[t - 2]
    return x


@njit(cache=True)
def _check_optimality(y, w, unit, g1, g2, lam, b, c, on, allowed, use_allowed, tol_s, tol_g, s, grad, bad):
    """One backward pass: spikes on the support, the gradient, and the frames that violate the KKT conditions.

    The violators go into ``bad`` in decreasing frame order; returns their number.
    """
    T = y.shape[0]
    z1 = 0.0
    z2 = 0.0
    n_bad = 0
    for t in range(T - 1, -1, -1):
        wt = 1.0 if unit else w[t]
        z = wt * (y[t] - b - c[t]) + g1 * z1 + g2 * z2
        z2 = z1
        z1 = z
        gt = lam - z
        grad[t] = gt
        if on[t]:
            x = _spike_at(c, t, g1, g2)
            s[t] = x
            if x < -tol_s:
                bad[n_bad] = t
                n_bad += 1
        else:
            s[t] = 0.0
            if gt < -tol_g and (not use_allowed or allowed[t]):
                bad[n_bad] = t
                n_bad += 1
    return n_bad


@njit(cache=True)
def _exact_finish(y, w, unit, g1, g2, h, lam, fit_b, b, on, allowed, use_allowed, tol_s, tol_g, max_iter,
                  presolved, c, s, grad, starts, bad, A, B, C, D, E, H, F, SW, SWY, mvv, mvp, mvb, lv, tiny):
    """Block principal pivoting on the support ``on`` until the KKT conditions hold.

    With ``presolved`` the calcium ``c`` is already the exact optimum on
    ``on`` (and baseline ``b``), and the first solve is skipped.
    Returns (baseline, solves, converged).
    """
    T = y.shape[0]
    best = T + 2
    tries = 3
    b_cur = b
    solves = 0
    for it in range(max_iter):
        if not (it == 0 and presolved):
            solves += 1
            b_cur = _solve_on_support(y, w, unit, g1, g2, h, lam, fit_b, b_cur, on, c, starts,
                                      A, B, C, D, E, H, F, SW, SWY, mvv, mvp, mvb, lv, tiny)
        n_bad = _check_optimality(y, w, unit, g1, g2, lam, b_cur, c, on, allowed, use_allowed, tol_s, tol_g,
                                  s, grad, bad)
        if n_bad == 0:
            return b_cur, solves, True
        if n_bad < best:
            best = n_bad
            tries = 3
            full = True
        elif tries > 0:
            tries -= 1
            full = True
        else:
            full = False
        if full:
            # remove every negative spike; of each run of adjacent frames that want a spike,
            # add only the most wanting one (adding whole runs overshoots)
            run_best = -1
            prev = -2
            for i in range(n_bad - 1, -1, -1):
                t = bad[i]
                if on[t]:
                    on[t] = False
                    if run_best >= 0:
                        on[run_best] = True
                        run_best = -1
                    prev = -2
                    continue
                if run_best >= 0 and t != prev + 1:
                    on[run_best] = True
                    run_best = -1
                if run_best < 0 or grad[t] < grad[run_best]:
                    run_best = t
                prev = t
            if run_best >= 0:
                on[run_best] = True
        else:  # single exchange of the last violator: the backup rule that ends cycling (Judice & Pires 1994)
            t = bad[0]
            on[t] = not on[t]
    return b_cur, solves, False


@njit(cache=True)
def _active_set(y, w, unit, g1, g2, h, lam, fit_b, b, on, allowed, use_allowed, tol_s, tol_g, max_iter,
                c, s, grad, starts, bad, c_new, s_old, A, B, C, D, E, H, F, SW, SWY, mvv, mvp, mvb, lv, tiny):
    """Primal active-set method (Lawson & Hanson 1974) from a feasible point (c, s >= 0, b).

    The fallback when block pivoting cycles (degenerate problems: frames of
    weight 0 that make spikes indistinguishable, oscillating kernels): every
    step lowers the objective, so it terminates.  One frame enters the
    support per outer step.  Returns (baseline, solves, converged).
    """
    T = y.shape[0]
    solves = 0
    for it in range(max_iter):
        # optimum on the current support (the baseline too), stepping back to stay feasible
        for inner in range(T + 1):
            for t in range(T):
                s_old[t] = _spike_at(c, t, g1, g2) if on[t] else 0.0
            solves += 1
            b_new = _solve_on_support(y, w, unit, g1, g2, h, lam, fit_b, b, on, c_new, starts,
                                      A, B, C, D, E, H, F, SW, SWY, mvv, mvp, mvb, lv, tiny)
            alpha = 1.0
            for t in range(T):
                if on[t]:
                    z = _spike_at(c_new, t, g1, g2)
                    if z <= 0.0 and s_old[t] - z > 0.0:
                        a = s_old[t] / (s_old[t] - z)
                        if a < alpha:
                            alpha = a
            for t in range(T):
                c[t] = c[t] + alpha * (c_new[t] - c[t])
            b = b + alpha * (b_new - b)
            if alpha >= 1.0:
                break
            for t in range(T):  # drop the spikes that reached zero
                if on[t] and _spike_at(c, t, g1, g2) <= tol_s:
                    on[t] = False
        _check_optimality(y, w, unit, g1, g2, lam, b, c, on, allowed, use_allowed, tol_s, tol_g, s, grad, bad)
        best = -1
        for t in range(T):
            if not on[t] and grad[t] < -tol_g and (not use_allowed or allowed[t]):
                if best < 0 or grad[t] < grad[best]:
                    best = t
        if best < 0:
            return b, solves, True
        on[best] = True
    return b, solves, False


@njit(cache=True)
def _solve_on_support(y, w, unit, g1, g2, h, lam, fit_b, b, on, c, starts,
                      A, B, C, D, E, H, F, SW, SWY, mvv, mvp, mvb, lv, tiny):
    """Exact optimum with spikes only where ``on``; fills c.

    Spikes the data cannot determine (singular pools, see _pools_solve) are
    taken out of ``on``.  Returns the baseline.
    """
    T = y.shape[0]
    while True:
        n = _starts_from_support(on, starts)
        _pool_sums(y, w, unit, g1, g2, h, lam, b, fit_b, starts, n, A, B, C, D, E, H, F, SW, SWY)
        b_new, status, bad = _pools_solve(T, g1, g2, h, starts, n, on[0], fit_b, b, A, B, C, D, E,
                                          H, F, SW, SWY, mvv, mvp, mvb, lv, c, tiny)
        if status == _NO_BASELINE:
            # the support explains any constant: keep b fixed for this step
            _pool_sums(y, w, unit, g1, g2, h, lam, b, False, starts, n, A, B, C, D, E, H, F, SW, SWY)
            b_new, status, bad = _pools_solve(T, g1, g2, h, starts, n, on[0], False, b, A, B, C, D, E,
                                              H, F, SW, SWY, mvv, mvp, mvb, lv, c, tiny)
        if status == _SINGULAR_POOL:
            on[starts[bad]] = False
            continue
        break
    return b_new


@njit(cache=True)
def _objective(y, w, unit, g1, g2, lam, b, c, s):
    T = y.shape[0]
    fit = 0.0
    total = 0.0
    for t in range(T):
        r = y[t] - b - c[t]
        fit += r * r if unit else w[t] * r * r
        total += s[t]
    return 0.5 * fit + lam * total


# --------------------------------------------------------------------------- driver
class _Work:
    """Scratch arrays for the numba kernels (np.empty: pages are touched only as used)."""

    def __init__(self, T: int):
        f = np.empty
        self.c = f(T)
        self.s = f(T)
        self.grad = f(T)
        self.starts = np.empty(T, np.int64)
        self.bad = np.empty(T, np.int64)
        self.pval = f(T)
        self.pprev = f(T)
        self.sums = [f(T) for _ in range(9)]
        self.dp = [f(T) for _ in range(4)]
        self.out_pf = np.empty(T, np.bool_)
        self.out = [f(T) for _ in range(9)]


def _greedy(y, w, unit, g1, g2, h, lam, b, thr, work: _Work):
    """One pool pass at a fixed baseline; returns (number of pools, pool 0 pinned)."""
    if g2 == 0.0 and g1 > 0.0:
        A, D, G = work.sums[0], work.sums[3], work.sums[5]
        n = _greedy_ar1(y, w, unit, g1, lam, b, thr, work.c, work.s, work.starts, work.pval, A, D, G)
        return n, not work.pval[0] > 0.0
    _, tiny_h, _ = _tolerances_cached(work, y, w, unit, lam)
    return _greedy_dp(y, w, unit, g1, g2, h, lam, b, thr, work.c, work.s, work.starts, work.pval,
                      work.pprev, *work.sums[:5], work.out_pf, *work.out, tiny_h)


def _tolerances_cached(work, y, w, unit, lam):
    key = (lam,)
    if getattr(work, "_tol_key", None) != key:
        work._tol = _tolerances(y, w, unit, lam)
        work._tol_key = key
    return work._tol


@njit(cache=True)
def _data_scale(y, w, unit):
    """(max |y| over weighted frames, sqrt(sum w y^2), max w) in one pass (no BLAS)."""
    scale = 0.0
    energy = 0.0
    wmax = 1.0 if unit else 0.0
    for t in range(y.shape[0]):
        wt = 1.0 if unit else w[t]
        if wt > 0.0:
            a = abs(y[t])
            if a > scale:
                scale = a
            energy += wt * y[t] * y[t]
            if wt > wmax:
                wmax = wt
    return scale, math.sqrt(energy), wmax


def _tolerances(y, w, unit, lam):
    scale, energy, wmax = _data_scale(y, w, unit)
    scale = max(scale, 1e-300)
    return _TOL_SPIKE * scale, _TOL_GRADIENT * (lam + energy + scale), 1e-13 * wmax


def _solve(y, w, unit, g, lam, baseline, min_spike, *, b0=None, support=None, allowed=None, work=None):
    """Core solver shared by the public functions (inputs already validated).

    Returns (c, s, b, iterations, converged) with fresh arrays.
    """
    T = y.shape[0]
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    # a private scratch space can hand its arrays out; a shared one (warm starts) must copy them
    shared = work is not None
    work = work or _Work(T)
    fit_b = isinstance(baseline, str)
    b = float(baseline) if not fit_b else (float(b0) if b0 is not None else _initial_baseline(y, w, unit))
    thr = float(min_spike)
    iterations = 0
    exact_pass = g2 == 0.0 and g1 > 0.0 and thr == 0.0 and not fit_b
    h = _impulse(g1, g2, T + 1) if not (exact_pass and support is None) else np.zeros(2)
    presolved = False
    if support is None:
        # one pool pass at the current baseline; a free baseline is then fitted jointly by the exact finish
        n, pinned0 = _greedy(y, w, unit, g1, g2, h, lam, b, thr, work)
        iterations += 1
        presolved = not fit_b
        if thr > 0.0 or exact_pass:
            np.maximum(work.s, 0.0, out=work.s)  # rounding-level negatives of c_t - g c_{t-1}
            if shared:
                return work.c.copy(), work.s.copy(), b, iterations, True
            return work.c, work.s, b, iterations, True
        on = np.zeros(T, dtype=bool)
        on[work.starts[:n]] = True
        on[0] = not pinned0
    else:
        on = np.asarray(support, dtype=bool).copy()
    tol_s, tol_g, tiny = _tolerances_cached(work, y, w, unit, lam)
    use_allowed = allowed is not None
    allowed_arr = np.asarray(allowed, dtype=bool) if use_allowed else np.zeros(1, dtype=bool)
    if use_allowed:
        presolved = presolved and not np.any(on & ~allowed_arr)
        on &= allowed_arr
    b_start = b
    b, its, converged = _exact_finish(y, w, unit, g1, g2, h, lam, fit_b, b, on, allowed_arr, use_allowed,
                                      tol_s, tol_g, _MAX_PIVOTS, presolved, work.c, work.s, work.grad,
                                      work.starts, work.bad, *work.sums, *work.dp, tiny)
    iterations += its
    if not converged:
        # pivoting cycled (a degenerate problem): restart from a feasible point with the monotone method
        b = b_start
        if support is None:
            n, pinned0 = _greedy(y, w, unit, g1, g2, h, lam, b, thr, work)
            on = np.zeros(T, dtype=bool)
            on[work.starts[:n]] = True
            on[0] = not pinned0
        else:  # start from no spike at all (feasible), on the allowed frames
            on = np.zeros(T, dtype=bool)
            work.c[:] = 0.0
            if fit_b:
                b = float(np.mean(y)) if unit else float(np.sum(w * y) / np.sum(w))
        b, its, converged = _active_set(y, w, unit, g1, g2, h, lam, fit_b, b, on, allowed_arr, use_allowed,
                                        tol_s, tol_g, 20 * T + 100, work.c, work.s, work.grad, work.starts,
                                        work.bad, np.empty(T), np.empty(T), *work.sums, *work.dp, tiny)
        iterations += its
    s = np.maximum(work.s, 0.0)  # clears rounding-level negatives (|s| <= tol) on the support
    return (work.c.copy() if shared else work.c), s, b, iterations, converged


def _initial_baseline(y, w, unit):
    """Starting baseline for the joint fit: the median of the weighted frames."""
    obs = y if unit else y[w > 0]
    step = max(1, obs.size // 20000)  # a subsample is enough for a starting point
    return float(np.median(obs[::step]))


def _check_penalty(penalty) -> float:
    return check_nonnegative(penalty, "penalty")


def _check_baseline(baseline):
    if isinstance(baseline, str):
        if baseline != "fit":
            raise ValueError(f"baseline must be a finite number or 'fit', got {baseline!r}")
        return baseline
    if not isinstance(baseline, numbers.Real) or isinstance(baseline, bool) or not np.isfinite(baseline):
        raise ValueError(f"baseline must be a finite number or 'fit', got {baseline!r}")
    return float(baseline)


def deconvolve_ar(y, coefficients, *, penalty, baseline=0.0, weights=None, min_spike=0.0) -> ARDeconvolution:
    r"""Exact non-negative deconvolution of a trace with an AR(1) or AR(2) calcium model.

    Solves

    .. math::

        \min_{c,\,b}\; \tfrac12 \sum_t w_t\,(y_t - b - c_t)^2 + \lambda \sum_t s_t,
        \qquad s_t = c_t - \sum_{i} g_i\, c_{t-i} \ge 0,\; c_{t<0} = 0,

    to the optimum.

    Parameters
    ----------
    y : array_like, shape (T,)
        The trace (ΔF/F), T >= 3.  NaN/inf frames are missing: they get
        weight 0 and cost nothing.
    coefficients : array_like, length 1 or 2
        AR coefficients ``[g]`` or ``[g1, g2]``; the AR polynomial
        :math:`z^p - g_1 z^{p-1} - \dots` must have all roots strictly inside
        the unit circle.
    penalty : float
        :math:`\lambda \ge 0`, the price of one unit of spike.
    baseline : float or "fit", default 0.0
        A fixed baseline :math:`b`, or ``"fit"`` to minimise over it jointly.
    weights : array_like, shape (T,), optional
        Frame weights :math:`w_t \ge 0` (0 for frames to ignore).  Default 1
        for finite frames, 0 for NaN/inf.
    min_spike : float, default 0.0
        If > 0, the hard-threshold variant: every non-zero spike is at least
        ``min_spike``.  That problem is not convex; the pool pass merges any
        pool whose spike is below the threshold (as in [2]_), which gives a
        good feasible solution, not a certified global optimum.

    Returns
    -------
    ARDeconvolution

    Raises
    ------
    ValueError
        For unstable coefficients, a negative penalty, length mismatches,
        T < 3 or a trace without any weighted frame.

    Notes
    -----
    The sparsity term is linear in :math:`c`:
    :math:`\sum_t s_t = \sum_t c_t\,(1 - \sum_i g_i [t+i \le T-1])`, so for a
    fixed baseline the problem is a weighted least-squares fit of shifted
    targets under the ordering constraints of the pools.  The active-set
    pool-adjacent-violators pass [2]_ solves AR(1) exactly in one sweep; for
    AR(2) (and a fitted baseline) its support is refined by exact solves on
    the support and block principal pivoting [3]_ until the KKT conditions

    .. math::

        s_t \ge 0,\quad \lambda - \sum_{\tau \ge t} h_{\tau-t} w_\tau
        (y_\tau - b - c_\tau) \ge 0,\quad\text{with equality where } s_t > 0,

    (and :math:`\sum_t w_t (y_t - b - c_t) = 0` for a fitted baseline) hold on
    every frame; :math:`h` is the AR impulse response.

    References
    ----------
    .. [1] Vogelstein, J. T. et al. (2010). Fast nonnegative deconvolution for
       spike train inference from population calcium imaging. J.
       Neurophysiol. 104, 3691-3704.
    .. [2] Friedrich, J., Zhou, P. & Paninski, L. (2017). Fast online
       deconvolution of calcium imaging data. PLoS Comput. Biol. 13(3),
       e1005423.
    .. [3] Júdice, J. J. & Pires, F. M. (1994). A block principal pivoting
       algorithm for large-scale strictly monotone linear complementarity
       problems. Comput. Oper. Res. 21, 587-596.

    Examples
    --------
    >>> import numpy as np
    >>> y = np.zeros(8); y[2:] = 0.9 ** np.arange(6)
    >>> result = deconvolve_ar(y, [0.9], penalty=0.0)
    >>> np.round(result.spikes, 6)
    array([0., 0., 1., 0., 0., 0., 0., 0.])
    """
    y = as_traces(y, "y")
    if y.ndim != 1:
        raise ValueError(f"y must be one trace of shape (frames,), got shape {y.shape}")
    if y.size < 3:
        raise ValueError(f"y must have at least 3 frames, got {y.size}")
    g = check_ar_coefficients(coefficients)
    lam = _check_penalty(penalty)
    baseline = _check_baseline(baseline)
    min_spike = check_nonnegative(min_spike, "min_spike")
    y, w, unit, _ = _prepare_weights(y, weights)
    if g.size == 2 and g[1] == 0.0:
        g = g[:1]
    c, s, b, iterations, converged = _solve(y, w, unit, g, lam, baseline, min_spike)
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    objective = float(_objective(y, w, unit, g1, g2, lam, b, c, s))
    return ARDeconvolution(calcium=c, spikes=s, baseline=float(b), penalty=lam, objective=objective,
                           iterations=int(iterations), converged=bool(converged), coefficients=g.copy())


# --------------------------------------------------------------------------- plain-Python reference
def reference_deconvolve_ar(y, coefficients, *, penalty, baseline=0.0, weights=None, min_spike=0.0):
    """Plain-Python (and numpy) implementation of the same algorithm, for tests.

    The pool pass decides each pool by the exact least-squares optimum of
    the problem cut at the current frame with the current pools as support
    (here a dense solve; the numba pass gets the same numbers from its
    arrival costs); the exact support solves (dense here) and the pivoting
    rule are the same.  Slow (dense algebra at every frame): use
    only on short traces.

    Returns (calcium, spikes, baseline).
    """
    y = np.asarray(y, dtype=np.float64)
    g = check_ar_coefficients(coefficients)
    y, w, unit, _ = _prepare_weights(y, weights)
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
    a = _penalty_coefficients(T, np.array([g1, g2]))

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

    def greedy(b):
        """Pool pass at a fixed baseline; returns (pool starts, pool 0 pinned)."""
        starts = []
        pinned0 = False
        for t in range(T):
            cand = t
            while True:
                A = float(np.sum(w[cand:t + 1] * h[:t + 1 - cand] ** 2))
                if not starts:
                    m = w[:t + 1] * (y[:t + 1] - b) - lam * a[:t + 1]
                    v = float(np.dot(m, h[:t + 1])) / A if A > 0 else 0.0
                    pinned0 = v < thr or v <= 0.0
                    starts = [0]
                    break
                if A > 0:
                    c = cut_solve(starts + [cand], pinned0, t + 1, b)
                    p = c[cand - 1]
                    q = c[cand - 2] if cand >= 2 else 0.0
                    if c[cand] - g1 * p - g2 * q >= thr:
                        starts.append(cand)
                        break
                cand = starts.pop()
        return starts, pinned0

    def cut_solve(starts, pinned0, upto, b):
        """Cut problem with the whole-trace penalty factors a_t."""
        cols = [t for t in starts if not (t == 0 and pinned0)]
        K = np.zeros((upto, len(cols)))
        for j, t in enumerate(cols):
            K[t:, j] = h[:upto - t]
        ww = w[:upto]
        M = K.T @ (ww[:, None] * K)
        rhs = K.T @ (ww * (y[:upto] - b) - lam * a[:upto])
        x = np.linalg.solve(M, rhs) if cols else np.zeros(0)
        return K @ x

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

    b = float(baseline) if not fit_b else _initial_baseline(y, w, False)
    starts, pinned0 = greedy(b)
    on = support_of(starts, pinned0)
    if thr > 0 or (g2 == 0.0 and g1 > 0 and not fit_b):
        c, _ = full_solve(on, b, False)
        return c, np.where(on, spikes_of(c), 0.0), b
    tol_s, tol_g, _ = _tolerances(y, w, False, lam)
    best, tries = T + 2, 3
    for _ in range(_MAX_PIVOTS):
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
