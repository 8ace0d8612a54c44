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
exact (the problem is an isotonic regression in disguise).  For AR(2) the
pass holds each pool's start value at the end of the pool before it (as in
[2]_), and for AR(2), a fitted baseline and unusual coefficients its support
(the set of frames with a spike) is then finished exactly: the problem
restricted to a support is an equality-constrained quadratic programme that
a backward recursion over the pools solves (see :func:`_pools_solve`; with
unit weights its sums come from prefix tables of the impulse response and
from the trace run once backwards through the AR filter, so a solve costs
O(number of pools)); one backward pass fills the calcium and checks the
Karush-Kuhn-Tucker conditions on every frame; frames that violate them are
exchanged by block principal pivoting [3]_ until none do.  Should the
pivoting cycle (degenerate problems: many frames of weight 0, a near-zero
penalty), a primal active-set method [4]_ restarts from a feasible point; it
lowers the objective at every step.

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

import contextlib
import math
import numbers
import threading
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
# Rounds of the exact finish during which a noise-matched penalty follows the support (see _exact_finish); then it
# is held, and the pivoting's own rule against cycling applies.
_MATCH_ROUNDS = 20
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
    radius = _root_radius(g)
    if not radius < 1.0 - 1e-12:
        raise ValueError(f"{name}={g.tolist()!r}: the AR polynomial has a root of modulus {radius:.6g}; every root "
                         "must lie strictly inside the unit circle (a decaying impulse response)")
    return g


def _root_radius(g: np.ndarray) -> float:
    """Largest modulus of the roots of z^p - g1 z^{p-1} - ... (p = 1, 2), by the quadratic formula."""
    if g.size == 1:
        return abs(float(g[0]))
    g1, g2 = float(g[0]), float(g[1])
    disc = g1 * g1 + 4.0 * g2
    if disc >= 0.0:
        root = math.sqrt(disc)
        return max(abs(0.5 * (g1 + root)), abs(0.5 * (g1 - root)))
    return math.sqrt(-g2)  # complex pair: |z|^2 = product of the roots = -g2


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
# Kernels that only accumulate sums or run a linear recursion may fuse a multiply and an add into one
# rounding (FMA): that changes results by about one unit in the last place, far inside the 1e-11
# tolerances of the optimality check.  Nothing else is relaxed.
_FMA = {"contract"}


@njit(cache=True)
def _impulse_and_length(g1, g2, n):
    """(h, K): the impulse response and the number of its leading entries that can be non-zero."""
    h = np.empty(max(n, 2))
    h[0] = 1.0
    h[1] = g1
    h1 = g1  # h[k - 1] and h[k - 2], kept out of memory (the recursion is one long chain)
    h2 = 1.0
    for k in range(2, n):
        x = g1 * h1 + g2 * h2
        if abs(x) < _FLUSH and abs(h1) < _FLUSH:
            h[k:] = 0.0
            return h, k  # the rest is 0: stop before subnormal numbers slow everything down
        h[k] = x
        h2 = h1
        h1 = x
    return h, max(n, 2)


@njit(cache=True, fastmath=_FMA)
def _response_tables(g2, h, n_nonzero, length, out):
    """Prefix sums over k < L of h_k^2, h_k f_k, f_k^2, h_k, f_k (f_k = g2 h_{k-1}), for L = 0..length.

    With unit weights they are the quadratic sums of a pool of length L;
    beyond ``n_nonzero + 1`` every term is 0 and the sums stay constant.
    """
    a = b = c = d = e = 0.0
    out[0, 0] = out[1, 0] = out[2, 0] = out[3, 0] = out[4, 0] = 0.0
    hm = 0.0
    for k in range(length):
        hk = h[k] if k < n_nonzero else 0.0
        fk = g2 * hm
        hm = hk
        a += hk * hk
        b += hk * fk
        c += fk * fk
        d += hk
        e += fk
        out[0, k + 1] = a
        out[1, k + 1] = b
        out[2, k + 1] = c
        out[3, k + 1] = d
        out[4, k + 1] = e


@njit(cache=True, inline="always")
def _frame_penalty(t, T, g1, g2):
    """a_t of the linear term lambda * sum_t a_t c_t."""
    if t < T - 2:
        return 1.0 - g1 - g2
    if t == T - 2:
        return 1.0 - g1
    return 1.0


@njit(cache=True, inline="always")
def _ar1_step(m, g, thr, tA, tD, tG, tst, n, t, pstart, pA, pD, pG, pN, zero_thr):
    """One frame (unit weight, D = m) of the AR(1) pool pass; returns the new top (A, D, G, start) and n."""
    if zero_thr:
        tN = (tD if (n > 0 or tD > 0.0) else 0.0) * tG
    else:
        tN = (tD if (n > 0 or (tD > 0.0 and tD >= thr * tA)) else 0.0) * tG + thr * tA
    if m * tA >= tN:
        pstart[n] = tst
        pA[n] = tA
        pD[n] = tD
        pG[n] = tG
        pN[n] = tN
        return 1.0, m, g, t, n + 1
    # the frame's spike would be below thr: it joins the top pool, which is then checked against the pool
    # below it (and merged into it, and so on)
    tA += tG * tG
    tD += tG * m
    tG *= g
    if tG < _FLUSH:
        tG = 0.0
    while n > 0 and tD * pA[n - 1] < tA * pN[n - 1]:
        tA, tD, tG, tst, n = _ar1_merge_down(tA, tD, tG, n, pstart, pA, pD, pG)
    return tA, tD, tG, tst, n


@njit(cache=True, inline="always")
def _ar1_merge_down(tA, tD, tG, n, pstart, pA, pD, pG):
    """The top pool merged into pool n - 1 (AR(1): its frames are g^{L_j} times further on)."""
    j = n - 1
    gj = pG[j]
    tG *= gj
    if tG < _FLUSH:
        tG = 0.0
    return pA[j] + gj * gj * tA, pD[j] + gj * tD, tG, pstart[j], j


@njit(cache=True)
def _pass_ar1(y, w, unit, g, h, lam, b, thr, c, s, pstart, pA, pD, pG, pN):
    """Pool pass for AR(1), 0 < g < 1: exact (pool-adjacent violators) when thr == 0.

    Pool j holds the sums A = sum w h_k^2, D = sum m_t h_k (m_t = w_t (y_t - b)
    - lam a_t) and G = g^length; its value is v = D / A (pool 0: 0 when that
    is below thr or <= 0).  With unit weights (A >= 1) the tests compare
    without dividing: a new frame (A = 1, D = m) opens a pool when
    m A_top >= N_top with N = D G + thr A; the top pool stays above pool j
    when D_top A_j >= A_top N_j.  Fills ``c`` and ``s``; returns (number of
    pools, pool 0 pinned at 0).
    """
    T = y.shape[0]
    lam_mid = lam * (1.0 - g)
    # the newest pool (top) lives in registers; pools 0..n-1 below it in the arrays
    wt = 1.0 if unit else w[0]
    tA = wt
    tD = wt * (y[0] - b) - (lam_mid if T > 1 else lam)
    tG = g
    tst = 0
    n = 0
    if unit:
        # the last frame has the full penalty factor (a_{T-1} = 1): it is stepped on its own
        bl = b + lam_mid
        if thr == 0.0:
            for t in range(1, T - 1):
                tA, tD, tG, tst, n = _ar1_step(y[t] - bl, g, 0.0, tA, tD, tG, tst, n, t, pstart, pA, pD, pG, pN,
                                               True)
        else:
            for t in range(1, T - 1):
                tA, tD, tG, tst, n = _ar1_step(y[t] - bl, g, thr, tA, tD, tG, tst, n, t, pstart, pA, pD, pG, pN,
                                               False)
        if T > 1:
            tA, tD, tG, tst, n = _ar1_step(y[T - 1] - b - lam, g, thr, tA, tD, tG, tst, n, T - 1, pstart, pA, pD,
                                           pG, pN, False)
    else:
        # with weights a pool can have A = 0 (pool 0 over frames of weight 0): the tests compare values,
        # v = D / A, and pN holds the value a following pool must reach, v G + thr
        tv = tD / tA if tA > 0.0 else 0.0
        if not (tv > 0.0 and tv >= thr):
            tv = 0.0
        for t in range(1, T):
            A = w[t]
            D = A * (y[t] - b) - (lam_mid if t < T - 1 else lam)
            tN = tv * tG + thr
            if A > 0.0 and D - A * tN >= 0.0:
                pstart[n] = tst
                pA[n] = tA
                pD[n] = tD
                pG[n] = tG
                pN[n] = tN
                n += 1
                tA = A
                tD = D
                tG = g
                tst = t
                tv = D / A
                continue
            tA += tG * tG * A
            tD += tG * D
            tG *= g
            if tG < _FLUSH:
                tG = 0.0
            while n > 0 and not (tA > 0.0 and tD - tA * pN[n - 1] >= 0.0):
                tA, tD, tG, tst, n = _ar1_merge_down(tA, tD, tG, n, pstart, pA, pD, pG)
            tv = tD / tA if tA > 0.0 else 0.0
            if n == 0 and not (tv > 0.0 and tv >= thr):
                tv = 0.0
    pstart[n] = tst
    pA[n] = tA
    pD[n] = tD
    n += 1
    pinned0 = not (pA[0] > 0.0 and pD[0] > 0.0 and pD[0] >= thr * pA[0])
    # expand the pools: c = v g^k within a pool (g^k = h[k], zero once decayed)
    prev = 0.0
    for i in range(n):
        st = pstart[i]
        en = pstart[i + 1] if i + 1 < n else T
        v = 0.0 if (i == 0 and pinned0) else pD[i] / pA[i]
        x = v - g * prev
        s[st] = x if x > 0.0 else 0.0  # clears rounding-level negatives
        c[st] = v
        for k in range(1, en - st):
            c[st + k] = v * h[k]
            s[st + k] = 0.0
        prev = c[en - 1]
    return n, pinned0


@njit(cache=True, inline="always")
def _merge_into(j, Lj, g2, h, tA, tB, tC, tD, tE, pA, pB, pC, pD, pE):
    """Sums of pool j after the top pool (starting Lj frames after it) is merged into it.

    On the top's frames c = alpha h_i + beta g2 h_{i-1}, where (alpha, beta)
    = (c_{t0+Lj}, c_{t0+Lj-1}) are linear in pool j's (v, p): the top's
    quadratic sums are carried over through that map.
    """
    a1 = h[Lj]
    a2 = g2 * h[Lj - 1]
    b1 = h[Lj - 1]
    b2 = g2 * h[Lj - 2] if Lj >= 2 else 0.0
    return (pA[j] + a1 * a1 * tA + 2.0 * a1 * b1 * tB + b1 * b1 * tC,
            pB[j] + a1 * a2 * tA + (a1 * b2 + a2 * b1) * tB + b1 * b2 * tC,
            pC[j] + a2 * a2 * tA + 2.0 * a2 * b2 * tB + b2 * b2 * tC,
            pD[j] + a1 * tD + b1 * tE,
            pE[j] + a2 * tD + b2 * tE)


@njit(cache=True, inline="always")
def _store_top(n, tst, L, v, p, g2, h, tA, tB, tC, tD, tE, pstart, pA, pB, pC, pD, pE, pv, pp, pe, pq):
    """Store the top pool (length L, value v, start value p) as pool n; returns its end values
    (c at its last frame and the frame before), which start the next pool."""
    pstart[n] = tst
    pA[n] = tA
    pB[n] = tB
    pC[n] = tC
    pD[n] = tD
    pE[n] = tE
    pv[n] = v
    pp[n] = p
    e1 = v * h[L - 1] + (p * g2 * h[L - 2] if L >= 2 else 0.0)
    if L >= 2:
        e2 = v * h[L - 2] + (p * g2 * h[L - 3] if L >= 3 else 0.0)
    else:
        e2 = p
    pe[n] = e1
    pq[n] = e2
    return e1, e2


@njit(cache=True, inline="always")
def _merge_down(n, tst, g2, h, tA, tB, tC, tD, tE, pstart, pA, pB, pC, pD, pE, pp, pq):
    """The top pool merged into pool n - 1, which becomes the top: its sums, start, start values
    (p, q) = (c_{t0-1}, c_{t0-2}) and the new pool count."""
    j = n - 1
    tA, tB, tC, tD, tE = _merge_into(j, tst - pstart[j], g2, h, tA, tB, tC, tD, tE, pA, pB, pC, pD, pE)
    return tA, tB, tC, tD, tE, pstart[j], pp[j], (pq[j - 1] if j >= 1 else 0.0), j


@njit(cache=True, inline="always")
def _top_value(n, v0, tA, tB, tD, p):
    """The top pool's value: v0 for pool 0 (pinned or free), else the 1-D least squares (D - B p) / A."""
    return v0 if n == 0 else (tD - tB * p) / tA


@njit(cache=True, inline="always")
def _close_pass(T, g1, g2, h, n, tst, v, p, pstart, pv, pp, c, s):
    """End of a pool pass: the top pool stored as pool n, the pools expanded into c and s; returns
    the number of pools."""
    pstart[n] = tst
    pv[n] = v
    pp[n] = p
    n += 1
    _fill(T, g1, g2, h, pstart, n, pv, pp, c, s)
    return n


@njit(cache=True)
def _pass_ar2_unit(y, g1, g2, h, lam, b, c, s, pstart, pv, pp, pA, pB, pC, pD, pE, pe, pq):
    """_pass_ar2 for unit weights and thr = 0 (the common case), with the pass's constants hoisted.

    Same rule and same results as _pass_ar2; p g2 and g1 p + g2 q are kept
    per top pool, and the tests need no weight.
    """
    T = y.shape[0]
    amid = 1.0 - g1 - g2
    tA = 1.0
    tB = 0.0
    tC = 0.0
    tD = (y[0] - b) - lam * _frame_penalty(0, T, g1, g2)
    tE = 0.0
    tst = 0
    n = 0
    p = 0.0
    pg = 0.0  # p * g2
    kq = 0.0  # g1 p + g2 q
    pinned0 = not (tD > 0.0)
    v0 = 0.0 if pinned0 else tD
    pred_n = v0 * g1
    pred_d = 1.0
    bl = b + lam * amid
    for t in range(1, T):
        m = (y[t] - bl) if t < T - 2 else (y[t] - b) - lam * _frame_penalty(t, T, g1, g2)
        if m * pred_d >= pred_n:  # the frame opens a pool
            L = t - tst
            e1, e2 = _store_top(n, tst, L, _top_value(n, v0, tA, tB, tD, p), p, g2, h, tA, tB, tC, tD, tE,
                                pstart, pA, pB, pC, pD, pE, pv, pp, pe, pq)
            n += 1
            p = e1
            pg = e1 * g2
            kq = g1 * e1 + g2 * e2
            tA = 1.0
            tB = 0.0
            tC = 0.0
            tD = m
            tE = 0.0
            tst = t
            pred_n = m * g1 + pg
            pred_d = 1.0
            continue
        # the frame joins the top pool, which may then have to merge down
        L = t - tst
        a1 = h[L]
        a2 = g2 * h[L - 1]
        tA += a1 * a1
        tB += a1 * a2
        tC += a2 * a2
        tD += m * a1
        tE += m * a2
        while n > 0 and (tD - tB * p) - tA * kq < 0.0:
            tA, tB, tC, tD, tE, tst, p, q, n = _merge_down(n, tst, g2, h, tA, tB, tC, tD, tE,
                                                            pstart, pA, pB, pC, pD, pE, pp, pq)
            pg = p * g2
            kq = g1 * p + g2 * q
        L = t + 1 - tst
        if n == 0:
            pinned0 = not (tA > 0.0 and tD > 0.0)
            v0 = 0.0 if pinned0 else tD / tA
            pred_n = v0 * h[L]
            pred_d = 1.0
        else:
            pred_n = (tD - tB * p) * h[L] + tA * pg * h[L - 1]
            pred_d = tA
    return _close_pass(T, g1, g2, h, n, tst, _top_value(n, v0, tA, tB, tD, p), p, pstart, pv, pp, c, s), pinned0


@njit(cache=True)
def _pass_ar2(y, w, unit, g1, g2, h, lam, b, thr, c, s, pstart, pv, pp, pA, pB, pC, pD, pE, pe, pq):
    """Pool pass for AR(2) (any AR(1)/AR(2) coefficients), the start value of each pool held fixed.

    As in the AR(2) pass of Friedrich et al. (2017): a pool starting at t0
    has calcium c = v h_k + p f_k (f_k = g2 h_{k-1}) with p = c_{t0-1} taken
    from the pools before it, frozen; with p fixed the pool's value is the
    1-D least-squares v = (D - B p) / A over its frames.  A frame opens a
    pool when its own value exceeds the calcium the top pool predicts for
    it by thr; otherwise it joins the top pool, and a pool whose spike
    v - g1 p - g2 q falls below thr is merged into the pool before it.  The
    tests are written without divisions (A > 0).  This gives a good support,
    not the optimum: the exact finish follows (for thr == 0).  Returns
    (number of pools, pool 0 pinned at 0).
    """
    T = y.shape[0]
    wt = 1.0 if unit else w[0]
    tA = wt
    tB = 0.0
    tC = 0.0
    tD = wt * (y[0] - b) - lam * _frame_penalty(0, T, g1, g2)
    tE = 0.0
    tst = 0
    n = 0
    p = 0.0  # c just before the top pool (frozen)
    q = 0.0  # c two frames before it
    pinned0 = not (tA > 0.0 and tD > 0.0 and tD >= thr * tA)
    v0 = 0.0 if pinned0 else tD / tA
    # the top pool's prediction of the next frame's calcium: pred_n / pred_d (pred_d > 0)
    pred_n = v0 * g1
    pred_d = 1.0
    for t in range(1, T):
        wt = 1.0 if unit else w[t]
        m = wt * (y[t] - b) - lam * _frame_penalty(t, T, g1, g2)
        if wt > 0.0 and m * pred_d >= wt * (pred_n + thr * pred_d):
            # the frame opens a pool; the top is stored with its value and end values (c_{t-1}, c_{t-2})
            L = t - tst
            e1, e2 = _store_top(n, tst, L, _top_value(n, v0, tA, tB, tD, p), p, g2, h, tA, tB, tC, tD, tE,
                                pstart, pA, pB, pC, pD, pE, pv, pp, pe, pq)
            n += 1
            p = e1
            q = e2
            tA = wt
            tB = 0.0
            tC = 0.0
            tD = m
            tE = 0.0
            tst = t
            pred_n = m * g1 + wt * p * g2
            pred_d = wt
            continue
        # the frame joins the top pool (frame k of it: c = v h_k + p f_k)
        L = t - tst
        a1 = h[L]
        a2 = g2 * h[L - 1]
        tA += wt * a1 * a1
        tB += wt * a1 * a2
        tC += wt * a2 * a2
        tD += m * a1
        tE += m * a2
        while n > 0 and not (tA > 0.0 and (tD - tB * p) - tA * (g1 * p + g2 * q + thr) >= 0.0):
            # the top's spike would be below thr: merge it into pool j
            tA, tB, tC, tD, tE, tst, p, q, n = _merge_down(n, tst, g2, h, tA, tB, tC, tD, tE,
                                                            pstart, pA, pB, pC, pD, pE, pp, pq)
        L = t + 1 - tst
        if n == 0:
            pinned0 = not (tA > 0.0 and tD > 0.0 and tD >= thr * tA)
            v0 = 0.0 if pinned0 else tD / tA
            pred_n = v0 * h[L]
            pred_d = 1.0
        else:
            pred_n = (tD - tB * p) * h[L] + tA * p * g2 * h[L - 1]
            pred_d = tA
    return _close_pass(T, g1, g2, h, n, tst, _top_value(n, v0, tA, tB, tD, p), p, pstart, pv, pp, c, s), pinned0


# Rows of the per-pool sums array (see _pool_sums).
_A, _B, _C, _DY, _EY, _DP, _EP, _H, _F, _SW, _SWY = range(11)
_N_SUMS = 11


@njit(cache=True, fastmath=_FMA)
def _backward_filter(y, bb, g1, g2, z, tail):
    """z_t = sum_{tau >= t} h_{tau - t} (y_tau - bb) (z_T = z_{T+1} = 0), the anti-causal AR filter, and
    the tail sums tail_t = sum_{tau >= t} (y_tau - bb); returns (max |y|, sum y^2) (the data scale of the
    tolerances)."""
    T = y.shape[0]
    z[T] = 0.0
    z[T + 1] = 0.0
    tail[T] = 0.0
    z1 = 0.0
    z2 = 0.0
    acc = 0.0
    top = 0.0
    energy = 0.0
    for t in range(T - 1, -1, -1):
        yt = y[t]
        x = g1 * z1 + ((yt - bb) + g2 * z2)
        z[t] = x
        z2 = z1
        z1 = x
        acc += yt - bb
        tail[t] = acc
        top = max(top, abs(yt))
        energy += yt * yt
    return top, energy


@njit(cache=True, fastmath={"contract", "reassoc"})
def _pool_sums(y, w, unit, g1, g2, h, tab, zy, tail, bb, fit_b, starts, n, sums):
    """Per-pool sums of the quadratic cost (see _pools_solve), relative to the level ``bb``.

    Pool i (frames st..en-1, k = t - st) has c = v h_k + p f_k with
    f_k = g2 h_{k-1}.  With y' = y - bb, its cost
    1/2 sum w (y' - b' - c)^2 + lam sum a_t c_t is, up to a constant,
    1/2 A v^2 + B v p + 1/2 C p^2 - (DY - lam DP) v - (EY - lam EP) p
    + b' (H v + F p) + 1/2 SW b'^2 - SWY b', with DY = sum w y' h_k,
    EY = sum w y' f_k, DP = sum a_t h_k, EP = sum a_t f_k, H = sum w h_k,
    F = sum w f_k, SW = sum w, SWY = sum w y' (only for a free baseline).
    With unit weights A, B, C, H, F, SW come from the prefix tables ``tab``
    and DY, EY from the backward-filtered trace ``zy``
    (z_t = sum_{tau >= t} h_{tau-t} y'_tau): since h_{L+j} = h_L h_j + h_{L-1} f_j,
    sum_{k < L} h_k y'_{st+k} = z_st - h_L z_en - g2 h_{L-1} z_{en+1}, O(1) per
    pool.  With weights the sums run over the frames.
    """
    T = y.shape[0]
    amid = 1.0 - g1 - g2
    top = tab.shape[1] - 1
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        L = en - st
        if unit:
            dy = zy[st] - h[L] * zy[en] - g2 * h[L - 1] * zy[en + 1]
            if L >= 2:
                ey = g2 * (zy[st + 1] - h[L - 1] * zy[en] - g2 * h[L - 2] * zy[en + 1])
            else:
                ey = 0.0
            li = min(L, top)
            dp = amid * tab[3, li]
            ep = amid * tab[4, li]
            # the last two frames carry a larger penalty factor (a_{T-2} = 1 - g1, a_{T-1} = 1)
            for t in range(max(st, T - 2), en):
                k = t - st
                extra = g2 if t == T - 2 else g1 + g2
                dp += extra * h[k]
                ep += extra * (g2 * h[k - 1] if k >= 1 else 0.0)
            swy = tail[st] - tail[en]
            sums[_A, i] = tab[0, li]
            sums[_B, i] = tab[1, li]
            sums[_C, i] = tab[2, li]
            sums[_H, i] = tab[3, li]
            sums[_F, i] = tab[4, li]
            sums[_SW, i] = L
        else:
            sa = sb = sc = dy = ey = dp = ep = sh = sf = sw = swy = 0.0
            hm = 0.0
            for t in range(st, en):
                k = t - st
                hk = h[k]
                fk = g2 * hm
                hm = hk
                wt = w[t]
                yw = wt * (y[t] - bb)
                at = _frame_penalty(t, T, g1, g2)
                whk = wt * hk
                wfk = wt * fk
                sa += whk * hk
                sb += whk * fk
                sc += wfk * fk
                dy += yw * hk
                ey += yw * fk
                dp += at * hk
                ep += at * fk
                sh += whk
                sf += wfk
                sw += wt
                swy += yw
            sums[_A, i] = sa
            sums[_B, i] = sb
            sums[_C, i] = sc
            sums[_H, i] = sh
            sums[_F, i] = sf
            sums[_SW, i] = sw
        sums[_DY, i] = dy
        sums[_EY, i] = ey
        sums[_DP, i] = dp
        sums[_EP, i] = ep
        sums[_SWY, i] = swy


@njit(cache=True)
def _pools_solve(T, g1, g2, h, starts, n, free0, fit_b, shift, lam, sums, dp, pv, pp, pv1, pp1, affine, tiny):
    r"""Exact minimiser with the spikes restricted to the pool starts.

    Pool i (start t_i, length L_i) has calcium c = v h_k + p g2 h_{k-1}, with
    v its first value and p = c_{t_i - 1}; its cost is a quadratic in
    (v, p, b') given by ``sums`` (see _pool_sums; a fixed baseline is
    ``shift`` above the sums' level).  The next pool's p is linear in
    (v, p).  A backward recursion over the pools carries the optimal
    cost-to-go as a quadratic in (p, b'); a forward pass recovers each
    pool's (v, p) into ``pv``, ``pp`` (the calcium itself is filled by _fill).

    With ``affine`` the optimum is returned as a function of the penalty,
    (v, p, b') = x0 - lam x1: the penalty only enters the linear terms, so
    the same recursion carries a second right-hand side; x0 goes to pv, pp,
    x1 to pv1, pp1 (``lam`` is not used).

    Returns (b' (free baseline, relative to the sums' level; else shift),
    b'1 (affine), status, index of a singular pool).
    """
    P11 = 0.0
    P12 = 0.0
    P22 = 0.0
    r1 = 0.0
    r2 = 0.0
    q1 = 0.0
    q2 = 0.0
    k_v = 0.0
    k_p = 0.0
    rate = 0.0 if affine else lam  # the penalty inside the first right-hand side
    for i in range(n - 1, -1, -1):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        L = en - st
        al = h[L - 1]
        be = g2 * h[L - 2] if L >= 2 else 0.0
        Mvv = sums[_A, i] + P11 * al * al
        Mvp = sums[_B, i] + P11 * al * be
        Mpp = sums[_C, i] + P11 * be * be
        l_v = sums[_DY, i] - rate * sums[_DP, i] + r1 * al
        l_p = sums[_EY, i] - rate * sums[_EP, i] + r1 * be
        if fit_b:
            Mvb = sums[_H, i] + P12 * al
            Mpb = sums[_F, i] + P12 * be
            Mbb = sums[_SW, i] + P22
            l_b = sums[_SWY, i] + r2
        else:
            l_v -= shift * sums[_H, i]
            l_p -= shift * sums[_F, i]
            Mvb = Mpb = Mbb = l_b = 0.0
        if affine:
            k_v = sums[_DP, i] + q1 * al
            k_p = sums[_EP, i] + q1 * be
        if i > 0 or free0:
            if not Mvv > tiny:
                # the data cannot see v_i apart from the later spikes; the cost is linear in it: with
                # l_v > 0 it grows until the next pool's spike reaches 0, else its own spike does
                if l_v > 0.0 and i + 1 < n:
                    return shift, 0.0, _SINGULAR_POOL, i + 1
                return shift, 0.0, _SINGULAR_POOL, i
            inv = 1.0 / Mvv
            dp[0, i] = inv
            dp[1, i] = Mvp
            dp[2, i] = Mvb
            dp[3, i] = l_v
            P11 = Mpp - Mvp * Mvp * inv
            P12 = Mpb - Mvp * Mvb * inv
            P22 = Mbb - Mvb * Mvb * inv
            r1 = l_p - Mvp * l_v * inv
            r2 = l_b - Mvb * l_v * inv
            if affine:
                pv1[i] = k_v  # (kept here until the forward pass)
                q1 = k_p - Mvp * k_v * inv
                q2 = q2 - Mvb * k_v * inv
        else:
            P11 = Mpp
            P12 = Mpb
            P22 = Mbb
            r1 = l_p
            r2 = l_b
            if affine:
                q1 = k_p
    bp = shift
    bp1 = 0.0
    if fit_b:
        if not P22 > tiny:
            return shift, 0.0, _NO_BASELINE, -1
        bp = r2 / P22
        bp1 = q2 / P22
    # forward: each pool's (v, p)
    p = 0.0
    p1 = 0.0
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        L = en - st
        f = g2 * h[L - 2] if L >= 2 else 0.0
        v = 0.0
        if i > 0 or free0:
            v = (dp[3, i] - dp[1, i] * p - (dp[2, i] * bp if fit_b else 0.0)) * dp[0, i]
        pv[i] = v
        pp[i] = p
        p = v * h[L - 1] + p * f
        if affine:
            v1 = 0.0
            if i > 0 or free0:
                v1 = (pv1[i] - dp[1, i] * p1 - (dp[2, i] * bp1 if fit_b else 0.0)) * dp[0, i]
            pv1[i] = v1
            pp1[i] = p1
            p1 = v1 * h[L - 1] + p1 * f
    return bp, bp1, _OK, -1


@njit(cache=True)
def _starts_from_support(on, starts):
    """Pool starts of a support: frame 0, then every frame with a spike."""
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


@njit(cache=True, fastmath=_FMA)
def _fill(T, g1, g2, h, starts, n, pv, pp, c, s):
    """Calcium of every pool from its (v, p): c = v h_k + p g2 h_{k-1}; spikes at the pool starts."""
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        v = pv[i]
        pg = pp[i] * g2
        c1 = c[st - 1] if st >= 1 else 0.0
        c2 = c[st - 2] if st >= 2 else 0.0
        s[st] = v - g1 * c1 - g2 * c2
        c[st] = v
        for k in range(1, en - st):
            c[st + k] = v * h[k] + pg * h[k - 1]
            s[st + k] = 0.0


@njit(cache=True, fastmath=_FMA)
def _check_pools(y, w, unit, g1, g2, h, lam, b, starts, n, free0, pv, pp, allowed, use_allowed, tol_s, tol_g, bad,
                 bad_on, bad_grad):
    """Check the KKT conditions of the pools' (v, p) in one backward pass (the calcium is computed on the fly;
    _fill stores it once the check passes).

    The gradient lam - z_t, z_t = sum_{tau >= t} h_{tau - t} w_tau (y_tau - b - c_tau),
    is the backward AR recursion of the residual.  The violators (a negative
    spike on the support, ``bad_on`` True; a negative gradient off it) go
    into ``bad`` in decreasing frame order, their gradients into
    ``bad_grad``; returns their number.
    """
    T = y.shape[0]
    z1 = 0.0
    z2 = 0.0
    n_bad = 0
    limit = lam + tol_g  # gradient lam - z < -tol_g  <=>  z > lam + tol_g
    en = T
    for i in range(n - 1, -1, -1):
        st = starts[i]
        v = pv[i]
        pg = pp[i] * g2
        # (the frames of the pool are read through views indexed by k, the frame within the pool: that loop
        # compiles to noticeably faster code than one indexed by t)
        yp = y[st:en]
        if unit and not use_allowed:  # the common case, without the per-frame tests of the others
            for k in range(en - st - 1, 0, -1):
                x = v * h[k] + pg * h[k - 1]
                z = g1 * z1 + ((yp[k] - b - x) + g2 * z2)  # one fused step on the chain through z1
                z2 = z1
                z1 = z
                if z > limit:
                    bad[n_bad] = st + k
                    bad_on[n_bad] = False
                    bad_grad[n_bad] = lam - z
                    n_bad += 1
        else:
            wp = yp if unit else w[st:en]
            ap = allowed[st:en] if use_allowed else allowed
            for k in range(en - st - 1, 0, -1):
                x = v * h[k] + pg * h[k - 1]
                r = (yp[k] - b - x) if unit else wp[k] * (yp[k] - b - x)
                z = g1 * z1 + (r + g2 * z2)
                z2 = z1
                z1 = z
                # (allowed first: with a restricted support most frames are not, and that test predicts well)
                if (not use_allowed or ap[k]) and z > limit:
                    bad[n_bad] = st + k
                    bad_on[n_bad] = False
                    bad_grad[n_bad] = lam - z
                    n_bad += 1
        t = st
        r = (y[t] - b - v) if unit else w[t] * (y[t] - b - v)
        z = g1 * z1 + (r + g2 * z2)
        z2 = z1
        z1 = z
        if i > 0 or free0:
            # c one and two frames before: the end of the previous pool
            if i > 0:
                L = st - starts[i - 1]
                vq = pv[i - 1]
                pq = pp[i - 1]
                c1 = vq * h[L - 1] + (pq * g2 * h[L - 2] if L >= 2 else 0.0)
                c2 = (vq * h[L - 2] + (pq * g2 * h[L - 3] if L >= 3 else 0.0)) if L >= 2 else pq
            else:
                c1 = 0.0
                c2 = 0.0
            x = v - g1 * c1 - g2 * c2
            if x < -tol_s:
                bad[n_bad] = t
                bad_on[n_bad] = True
                bad_grad[n_bad] = lam - z
                n_bad += 1
        elif z > limit and (not use_allowed or allowed[t]):
            bad[n_bad] = t
            bad_on[n_bad] = False
            bad_grad[n_bad] = lam - z
            n_bad += 1
        en = st
    return n_bad


@njit(cache=True)
def _check_optimality(y, w, unit, g1, g2, lam, b, c, on, allowed, use_allowed, tol_s, tol_g, s, grad, bad):
    """KKT check of a given calcium ``c`` (one backward pass; used by the active-set fallback).

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
def _solve_pools(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, starts, n, free0, sums, dp, pv, pp, tiny,
                 fresh):
    """Exact optimum with spikes only at the pool starts (and frame 0 if ``free0``): (v, p) into pv, pp.

    ``sums`` are recomputed unless ``fresh`` is False (they already describe
    these pools).  Spikes the data cannot determine (singular pools, see
    _pools_solve) are taken out of the support.  Returns (baseline, number
    of pools, free0).
    """
    T = y.shape[0]
    while True:
        if fresh:
            _pool_sums(y, w, unit, g1, g2, h, tab, zy, tail, bb, fit_b, starts, n, sums)
        fresh = True
        bp, _, status, bad = _pools_solve(T, g1, g2, h, starts, n, free0, fit_b, b - bb, lam, sums, dp, pv, pp, pv,
                                          pp, False, tiny)
        if status == _NO_BASELINE:
            # the support explains any constant: keep b fixed for this step
            bp, _, status, bad = _pools_solve(T, g1, g2, h, starts, n, free0, False, b - bb, lam, sums, dp, pv, pp,
                                              pv, pp, False, tiny)
        if status == _SINGULAR_POOL:
            if bad == 0:
                free0 = False
            else:
                for i in range(bad, n - 1):
                    starts[i] = starts[i + 1]
                n -= 1
            continue
        break
    return bb + bp, n, free0


@njit(cache=True)
def _solve_on_support(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, on, starts, sums, dp, pv, pp, tiny):
    """_solve_pools on a support given as a boolean array (updated for dropped spikes); returns (b, n)."""
    n = _starts_from_support(on, starts)
    b_new, n2, free0 = _solve_pools(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, starts, n, on[0],
                                    sums, dp, pv, pp, tiny, True)
    if n2 != n or free0 != on[0]:
        on[:] = False
        for i in range(1, n2):
            on[starts[i]] = True
        on[0] = free0
    return b_new, n2


@njit(cache=True)
def _pivot(starts, n, free0, bad, bad_on, bad_grad, n_bad, full, toggles, out):
    """Block principal pivoting step (Judice & Pires 1994): the new pool starts into ``out``.

    ``full``: remove every negative spike and, of each run of adjacent
    frames that want a spike, add only the most wanting one (adding whole
    runs overshoots); otherwise exchange only the last violator (the backup
    rule that ends cycling).  Returns (number of starts, free0).
    """
    n_t = 0
    if not full:
        toggles[0] = bad[0]
        n_t = 1
    else:
        run_best = -1
        best_grad = 0.0
        prev = -2
        for i in range(n_bad - 1, -1, -1):  # increasing frames
            t = bad[i]
            if bad_on[i]:
                if run_best >= 0:
                    toggles[n_t] = run_best
                    n_t += 1
                    run_best = -1
                toggles[n_t] = t
                n_t += 1
                prev = -2
                continue
            if run_best >= 0 and t != prev + 1:
                toggles[n_t] = run_best
                n_t += 1
                run_best = -1
            if run_best < 0 or bad_grad[i] < best_grad:
                run_best = t
                best_grad = bad_grad[i]
            prev = t
        if run_best >= 0:
            toggles[n_t] = run_best
            n_t += 1
    # merge the (increasing) toggles into the starts: a toggled start goes, a toggled other frame comes in
    j = 0
    if n_t > 0 and toggles[0] == 0:
        free0 = not free0
        j = 1
    out[0] = 0
    m = 1
    i = 1
    while i < n or j < n_t:
        if j >= n_t or (i < n and starts[i] < toggles[j]):
            out[m] = starts[i]
            m += 1
            i += 1
        elif i >= n or toggles[j] < starts[i]:
            out[m] = toggles[j]
            m += 1
            j += 1
        else:  # the same frame: a spike leaves the support
            i += 1
            j += 1
    return m, free0


@njit(cache=True)
def _match_penalty(T, g1, g2, h, starts, n, free0, fit_b, shift, lam, sums, dp, pv, pp, pv1, pp1, syy, sy, target,
                   tiny):
    """The penalty at which the optimum on the current pools leaves the residual ``target``.

    On a fixed support the optimum is affine in the penalty, (v, p, b') =
    x0 - lam x1 (_pools_solve with ``affine``; x0 is left in pv, pp and x1
    in pv1, pp1: apply a penalty with _at_penalty), so the residual is a
    quadratic in it, whose coefficients come from the pool sums (_pools_rss_quadratic), and
    solved exactly (the root where it grows with the penalty).  Returns
    (penalty or NaN when there is none, b'0, b'1, solved: False when the
    pools could not be solved at all).
    """
    b0, b1, status, _ = _pools_solve(T, g1, g2, h, starts, n, free0, fit_b, shift, lam, sums, dp, pv, pp, pv1, pp1,
                                     True, tiny)
    if status != _OK:
        return math.nan, 0.0, 0.0, False
    r0, a1, a2 = _pools_rss_quadratic(n, pv, pp, pv1, pp1, b0, b1, sums, syy, sy)
    disc = a1 * a1 - 4.0 * a2 * (r0 - target)
    if not (a2 > 0.0 and disc >= 0.0):
        return math.nan, b0, b1, True
    new = (-a1 + math.sqrt(disc)) / (2.0 * a2)
    return (new if new >= 0.0 else math.nan), b0, b1, True


@njit(cache=True)
def _at_penalty(n, pv, pp, pv1, pp1, lam):
    """Pools (v, p) = x0 - lam x1 (x0 in pv, pp; x1 in pv1, pp1), in place."""
    for i in range(n):
        pv[i] -= lam * pv1[i]
        pp[i] -= lam * pp1[i]


@njit(cache=True, fastmath={"contract", "reassoc"})
def _pools_rss_quadratic(n, pv0, pp0, pv1, pp1, b0, b1, sums, syy, sy):
    """Coefficients (c0, c1, c2) of the residual c0 + c1 lam + c2 lam^2 of the affine pools
    (v, p, b') = x0 - lam x1 (the terms of _pools_rss expanded in lam), in one pass over the pools."""
    cross0 = cross1 = 0.0
    level0 = level1 = 0.0
    square0 = square01 = square1 = 0.0
    weight = 0.0
    for i in range(n):
        dy = sums[_DY, i]
        ey = sums[_EY, i]
        sa = sums[_A, i]
        sb = sums[_B, i]
        sc = sums[_C, i]
        weight += sums[_SW, i]
        v0 = pv0[i]
        v1 = pv1[i]
        p0 = pp0[i]
        p1 = pp1[i]
        cross0 += v0 * dy + p0 * ey
        cross1 += v1 * dy + p1 * ey
        level0 += v0 * sums[_H, i] + p0 * sums[_F, i]
        level1 += v1 * sums[_H, i] + p1 * sums[_F, i]
        square0 += v0 * v0 * sa + 2.0 * v0 * p0 * sb + p0 * p0 * sc
        square01 += v0 * v1 * sa + (v0 * p1 + v1 * p0) * sb + p0 * p1 * sc
        square1 += v1 * v1 * sa + 2.0 * v1 * p1 * sb + p1 * p1 * sc
    c0 = syy - 2.0 * b0 * sy + b0 * b0 * weight - 2.0 * cross0 + 2.0 * b0 * level0 + square0
    c1 = 2.0 * (b1 * sy - b0 * b1 * weight + cross1 - b0 * level1 - b1 * level0 - square01)
    c2 = b1 * b1 * weight + 2.0 * b1 * level1 + square1
    return c0, c1, c2


@njit(cache=True)
def _exact_finish(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, starts, n, free0, allowed, use_allowed,
                  tol_s, tol_base, max_iter, presolved, c, s, starts2, bad, bad_on, bad_grad, toggles, sums, dp, pv,
                  pp, pv1, pp1, tiny, target, syy, sy, max_match):
    """Block principal pivoting on the support (pool starts) until the KKT conditions hold.

    With ``presolved`` the pools' (v, p) in pv, pp are already the exact
    optimum on the support at baseline ``b`` (and ``sums`` describe them),
    and the first solve is skipped.  The pool starts alternate between
    ``starts`` and ``starts2``.  The gradient tolerance is _TOL_GRADIENT
    (lam + tol_base).

    With ``target`` > 0 the penalty is not fixed: for up to ``max_match``
    rounds it is moved, after each solve, to where the residual on the
    current support equals ``target`` (_match_penalty), so that the
    noise-matched penalty and its support are found together.

    The calcium and spikes (rounding-level negatives cleared) are stored in
    ``c``, ``s`` once the conditions hold (not when it fails to converge).  Returns (baseline, penalty,
    solves, converged, n, free0, whether the final starts are in starts2).
    """
    T = y.shape[0]
    best = T + 2
    tries = 3
    b_cur = b
    solves = 0
    cur = starts
    other = starts2
    swapped = False
    for it in range(max_iter):
        moved = False
        if target > 0.0 and it < max_match:
            # the solve that matches the penalty also gives the optimum at any penalty (the affine form): no
            # separate solve at the current one, unless the pools cannot be solved as they are
            if not (it == 0 and presolved):
                solves += 1
                _pool_sums(y, w, unit, g1, g2, h, tab, zy, tail, bb, fit_b, cur, n, sums)
            lam_new, b0, b1, solved = _match_penalty(T, g1, g2, h, cur, n, free0, fit_b, b_cur - bb, lam, sums, dp,
                                                     pv, pp, pv1, pp1, syy, sy, target, tiny)
            if not solved:
                # spikes the data cannot determine: taken out of the support by the plain solve (sums current)
                b_cur, n, free0 = _solve_pools(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b_cur, cur, n,
                                               free0, sums, dp, pv, pp, tiny, False)
                lam_new, b0, b1, solved = _match_penalty(T, g1, g2, h, cur, n, free0, fit_b, b_cur - bb, lam, sums,
                                                         dp, pv, pp, pv1, pp1, syy, sy, target, tiny)
            if solved:
                if lam_new == lam_new:
                    moved = lam_new != lam
                    lam = lam_new
                _at_penalty(n, pv, pp, pv1, pp1, lam)
                if fit_b:
                    b_cur = bb + b0 - lam * b1
            else:
                b_cur, n, free0 = _solve_pools(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b_cur, cur, n,
                                               free0, sums, dp, pv, pp, tiny, True)
        elif not (it == 0 and presolved):
            solves += 1
            b_cur, n, free0 = _solve_pools(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b_cur, cur, n, free0,
                                           sums, dp, pv, pp, tiny, True)
        n_bad = _check_pools(y, w, unit, g1, g2, h, lam, b_cur, cur, n, free0, pv, pp, allowed, use_allowed,
                             tol_s, _TOL_GRADIENT * (lam + tol_base), bad, bad_on, bad_grad)
        if n_bad == 0:
            _fill(T, g1, g2, h, cur, n, pv, pp, c, s)
            for i in range(n):  # rounding-level negatives (|s| <= tol) on the support are cleared
                if s[cur[i]] < 0.0:
                    s[cur[i]] = 0.0
            return b_cur, lam, solves, True, n, free0, swapped
        if moved or n_bad < best:
            # (a moved penalty is a new problem: the count of violators starts afresh)
            best = n_bad
            tries = 3
            full = True
        elif tries > 0:
            tries -= 1
            full = True
        else:
            full = False
        n, free0 = _pivot(cur, n, free0, bad, bad_on, bad_grad, n_bad, full, toggles, other)
        cur, other = other, cur
        swapped = not swapped
    return b_cur, lam, solves, False, n, free0, swapped


@njit(cache=True)
def _active_set(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, on, allowed, use_allowed, tol_s, tol_g,
                max_iter, c, s, grad, starts, bad, c_new, s_new, s_old, sums, dp, pv, pp, tiny):
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
            b_new, n = _solve_on_support(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, on, starts, sums, dp,
                                         pv, pp, tiny)
            _fill(T, g1, g2, h, starts, n, pv, pp, c_new, s_new)
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


@njit(cache=True, fastmath={"contract", "reassoc"})
def _objective(y, w, unit, g1, g2, lam, b, c, s):
    T = y.shape[0]
    fit = 0.0
    total = 0.0
    for t in range(T):
        r = y[t] - b - c[t]
        fit += r * r if unit else w[t] * r * r
        total += s[t]
    return 0.5 * fit + lam * total


@njit(cache=True, fastmath={"contract", "reassoc"})
def _data_scale(y, w, unit):
    """(max |y| over weighted frames, sqrt(sum w y^2), max w) in one pass (no BLAS)."""
    scale = 0.0
    energy = 0.0
    if unit:
        for t in range(y.shape[0]):
            scale = max(scale, abs(y[t]))
            energy += y[t] * y[t]
        return scale, math.sqrt(energy), 1.0
    wmax = 0.0
    for t in range(y.shape[0]):
        wt = w[t]
        if wt > 0.0:
            scale = max(scale, abs(y[t]))
            energy += wt * y[t] * y[t]
            wmax = max(wmax, wt)
    return scale, math.sqrt(energy), wmax


# --------------------------------------------------------------------------- driver
_KERNEL_CACHE: dict = {}
_KERNEL_CACHE_SIZE = 8


def _kernel_tables(g1: float, g2: float, T: int):
    """(h, n_nonzero, tab) for coefficients (g1, g2) and T frames; the last few are kept (read-only)."""
    key = (g1, g2, T)
    found = _KERNEL_CACHE.get(key)
    if found is not None:
        return found
    found = _tables_from_shorter(g1, g2, T)
    if found is None:
        h, n_nonzero = _impulse_and_length(g1, g2, T + 1)
        length = min(T, n_nonzero + 1)
        tab = np.empty((5, length + 1))
        _response_tables(g2, h, n_nonzero, length, tab)
        h.flags.writeable = False
        found = (h, n_nonzero, tab)
    if len(_KERNEL_CACHE) >= _KERNEL_CACHE_SIZE:
        _KERNEL_CACHE.pop(next(iter(_KERNEL_CACHE)))
    _KERNEL_CACHE[key] = found
    return found


def _tables_from_shorter(g1: float, g2: float, T: int):
    """The tables for T frames from those of fewer frames, when the kernel had decayed to 0 within them (the
    kernel's estimate on a block, then the whole trace): the same impulse response padded with zeros and the
    same prefix sums (they stop growing where it is 0).  None when no such entry is kept."""
    for (k1, k2, shorter), (h, n_nonzero, tab) in _KERNEL_CACHE.items():
        # (flushed to 0 at n_nonzero < shorter: the recursion for T frames stops at the same frame, and the
        # table length min(T, n_nonzero + 1) is the same)
        if k1 == g1 and k2 == g2 and shorter < T and n_nonzero < shorter:
            padded = np.zeros(max(T + 1, 2))
            padded[:h.size] = h
            padded.flags.writeable = False
            return padded, n_nonzero, tab
    return None


class _Work:
    """Scratch arrays for the numba kernels of one trace (allocated on first use), plus cached
    per-trace quantities: the data scale and the backward-filtered trace."""

    _FLOAT = ("c", "s", "grad", "bad_grad", "pv", "pp", "pe", "pq", "pv1", "pp1", "pA", "pB", "pC", "pD", "pE")
    _INT = ("starts", "starts2", "bad", "toggles")

    def __init__(self, T: int):
        self.T = T
        self.busy = False
        self.reset()

    def reset(self):
        """Forget everything about the last trace (the arrays stay)."""
        self.n_pools = 0  # pools of the last solution (in self.starts), valid after _solve
        self.free0 = False
        self.lam = 0.0
        self._scale = None
        self._filtered_key = None
        self._mean = None

    def __getattr__(self, name):  # called only for attributes not set yet: the scratch arrays
        if name in _Work._FLOAT:
            arr = np.empty(self.T)
        elif name in _Work._INT:
            arr = np.empty(self.T, np.int64)
        elif name == "bad_on":
            arr = np.empty(self.T, np.bool_)
        else:
            raise AttributeError(name)
        setattr(self, name, arr)
        return arr

    @property
    def sums(self):
        if getattr(self, "_sums", None) is None:
            self._sums = np.empty((_N_SUMS, self.T))
        return self._sums

    @property
    def dp(self):
        if getattr(self, "_dp", None) is None:
            self._dp = np.empty((4, self.T))
        return self._dp

    def level(self, y, w, unit, fit_b: bool, b: float) -> float:
        """The level the pool sums are taken from: the baseline when fixed, the weighted mean when fitted
        (centred data keep the sums well conditioned; a free baseline does not depend on it)."""
        if not fit_b:
            return b
        if self._mean is None:
            self._mean = float(np.sum(y)) / y.size if unit else float(np.dot(w, y) / np.sum(w))
        return self._mean

    def kernel(self, g1: float, g2: float):
        return _kernel_tables(g1, g2, self.T)

    def filtered(self, y, w, unit, bb: float, g1: float, g2: float):
        """(The trace minus ``bb`` run backwards through the AR filter, its tail sums): unit weights only
        (see _pool_sums)."""
        if not unit:
            return self.c, self.c  # not used with weights
        key = (bb, g1, g2)
        if self._filtered_key != key:
            if getattr(self, "_zy", None) is None:
                self._zy = np.empty(self.T + 2)
                self._tail = np.empty(self.T + 1)
            top, energy = _backward_filter(y, bb, g1, g2, self._zy, self._tail)
            if self._scale is None:
                self._scale = (top, math.sqrt(energy), 1.0)
            self._filtered_key = key
        return self._zy, self._tail

    def tolerances(self, y, w, unit, lam):
        """(spike tolerance, gradient tolerance at penalty lam, smallest pivot) of _tolerances, from the
        cached data scale."""
        tol_s, base, tiny = self.tolerance_parts(y, w, unit)
        return tol_s, _TOL_GRADIENT * (lam + base), tiny

    def tolerance_parts(self, y, w, unit):
        """(spike tolerance, gradient tolerance / _TOL_GRADIENT - penalty, smallest pivot)."""
        if self._scale is None:
            self._scale = _data_scale(y, w, unit)
        scale, energy, wmax = self._scale
        scale = max(scale, 1e-300)
        return _TOL_SPIKE * scale, energy + scale, 1e-13 * wmax


_SCRATCH = threading.local()


@contextlib.contextmanager
def _scratch(T: int):
    """A scratch space for T frames, reused by later calls in the same thread.

    Reusing it keeps its pages mapped: on some systems the page faults of
    fresh large arrays cost more than the solver itself.  One space per
    thread is kept (the last size used).
    """
    work = getattr(_SCRATCH, "work", None)
    if work is None or work.T != T or work.busy:
        work = _Work(T)
        if getattr(_SCRATCH, "work", None) is None or not _SCRATCH.work.busy:
            _SCRATCH.work = work
    else:
        work.reset()
    work.busy = True
    try:
        yield work
    finally:
        work.busy = False


def _tolerances(y, w, unit, lam):
    scale, energy, wmax = _data_scale(y, w, unit)
    scale = max(scale, 1e-300)
    return _TOL_SPIKE * scale, _TOL_GRADIENT * (lam + energy + scale), 1e-13 * wmax


def _pool_pass(y, w, unit, g1, g2, lam, b, thr, work: _Work):
    """One pool pass at a fixed baseline into work.c / work.s / work.starts; returns (pools, pool 0 pinned, exact)."""
    h, _, _ = work.kernel(g1, g2)
    if g2 == 0.0 and g1 > 0.0:
        n, pinned0 = _pass_ar1(y, w, unit, g1, h, lam, b, thr, work.c, work.s, work.starts, work.pA, work.pD, work.pC,
                               work.pE)
        return n, pinned0, True
    if unit and thr == 0.0:
        n, pinned0 = _pass_ar2_unit(y, g1, g2, h, lam, b, work.c, work.s, work.starts, work.pv, work.pp, work.pA,
                                    work.pB, work.pC, work.pD, work.pE, work.pe, work.pq)
    else:
        n, pinned0 = _pass_ar2(y, w, unit, g1, g2, h, lam, b, thr, work.c, work.s, work.starts, work.pv, work.pp,
                               work.pA, work.pB, work.pC, work.pD, work.pE, work.pe, work.pq)
    return n, pinned0, False


#: ``support=PREVIOUS`` in _solve: start from the support of the last solution held by the work.
PREVIOUS = object()


def _solve(y, w, unit, g, lam, baseline, min_spike, *, b0=None, support=None, allowed=None, work=None,
           presolved=False, match=None, copy=None):
    """Core solver shared by the public functions (inputs already validated).

    ``support`` starts the exact finish from a given support (a boolean
    array, or PREVIOUS: the last solution's, kept by ``work``) instead of a
    pool pass; with ``presolved`` the work's pools (starts, pv, pp,
    n_pools, free0) already hold the exact optimum on that support at
    baseline ``b0``.  ``match`` = (target, syy, sy): the penalty is moved
    during the first rounds to where the residual equals target (see
    _exact_finish; syy, sy the sums of w (y - level)^2 and w (y - level));
    the final penalty is left in work.lam.  Returns (c, s, b, iterations,
    converged); c and s are fresh arrays unless ``copy`` is False (then
    they are the work's, valid until its next use; default: copies when
    ``work`` is given).  The work keeps the support
    (work.starts[:work.n_pools], work.free0).
    """
    T = y.shape[0]
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    # a private scratch space can hand its arrays out; a shared one (warm starts) must copy them
    shared = (work is not None) if copy is None else bool(copy)
    work = work or _Work(T)
    fit_b = isinstance(baseline, str)
    b = float(baseline) if not fit_b else (float(b0) if b0 is not None else _initial_baseline(y, w, unit))
    thr = float(min_spike)
    iterations = 0
    work.lam = lam
    h, _, tab = work.kernel(g1, g2)
    use_allowed = allowed is not None
    allowed_arr = np.asarray(allowed, dtype=bool) if use_allowed else np.zeros(1, dtype=bool)
    if support is None:
        # one pool pass at the current baseline; a free baseline is then fitted jointly by the exact finish
        n, pinned0, exact = _pool_pass(y, w, unit, g1, g2, lam, b, thr, work)
        iterations += 1
        work.n_pools, work.free0 = n, not pinned0
        if thr > 0.0 or (exact and not fit_b and match is None):
            if thr > 0.0:
                np.maximum(work.s, 0.0, out=work.s)  # rounding-level negatives
            if shared:
                return work.c.copy(), work.s.copy(), b, iterations, True
            return work.c, work.s, b, iterations, True
        free0 = not pinned0
        presolved = False
        if use_allowed:
            on = _support_of(work.starts, n, free0, T) & allowed_arr
            n = _starts_from_support(on, work.starts)
            free0 = bool(on[0])
    elif support is PREVIOUS:
        n, free0 = work.n_pools, work.free0
        if presolved:
            b = float(b0)
    else:
        on = np.asarray(support, dtype=bool)
        if use_allowed and allowed is not support:
            presolved = presolved and not np.any(on & ~allowed_arr)
            on = on & allowed_arr
        if presolved:
            n, free0 = work.n_pools, work.free0
            b = float(b0)
        else:
            n = _starts_from_support(on, work.starts)
            free0 = bool(on[0])
    bb = work.level(y, w, unit, fit_b, b)
    zy, tail = work.filtered(y, w, unit, bb, g1, g2)
    tol_s, tol_base, tiny = work.tolerance_parts(y, w, unit)
    target, syy, sy = match if match is not None else (0.0, 0.0, 0.0)
    b_start = b
    b, lam, its, converged, n, free0, swapped = _exact_finish(
        y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, work.starts, n, free0, allowed_arr, use_allowed, tol_s,
        tol_base, _MAX_PIVOTS, presolved, work.c, work.s, work.starts2, work.bad, work.bad_on, work.bad_grad,
        work.toggles, work.sums, work.dp, work.pv, work.pp, work.pv1, work.pp1, tiny, target, syy, sy, _MATCH_ROUNDS)
    work.lam = lam
    tol_g = _TOL_GRADIENT * (lam + tol_base)
    if swapped:
        work.starts, work.starts2 = work.starts2, work.starts
    iterations += its
    work.n_pools, work.free0 = n, free0
    if not converged:
        # pivoting cycled (a degenerate problem): restart from a feasible point with the monotone method
        b = b_start
        if support is None:
            n, pinned0, _ = _pool_pass(y, w, unit, g1, g2, lam, b, thr, work)
            on = _support_of(work.starts, n, not pinned0, T)
            if use_allowed:
                on &= allowed_arr
            np.maximum(work.s, 0.0, out=work.s)  # the pass's calcium is feasible (every spike >= 0)
        else:  # start from no spike at all (feasible), on the allowed frames
            on = np.zeros(T, dtype=bool)
            work.c[:] = 0.0
            if fit_b:
                b = float(np.mean(y)) if unit else float(np.sum(w * y) / np.sum(w))
        b, its, converged = _active_set(y, w, unit, g1, g2, h, tab, zy, tail, bb, lam, fit_b, b, on, allowed_arr,
                                        use_allowed, tol_s, tol_g, 20 * T + 100, work.c, work.s, work.grad,
                                        work.starts, work.bad, np.empty(T), np.empty(T), np.empty(T), work.sums,
                                        work.dp, work.pv, work.pp, tiny)
        iterations += its
        work.n_pools = _starts_from_support(on, work.starts)
        work.free0 = bool(on[0])
        np.maximum(work.s, 0.0, out=work.s)  # clears rounding-level negatives (|s| <= tol) on the support
    if shared:
        return work.c.copy(), work.s.copy(), b, iterations, converged
    return work.c, work.s, b, iterations, converged


def _support_of(starts, n, free0, T):
    on = np.zeros(T, dtype=bool)
    on[starts[1:n]] = True
    on[0] = free0
    return on


def _initial_baseline(y, w, unit):
    """Starting baseline for the joint fit: the median of the weighted frames (of a subsample: a starting point)."""
    obs = y if unit else y[w > 0]
    sample = obs[::max(1, obs.size // 2000)].copy()
    k = sample.size // 2
    return float(np.partition(sample, k)[k])  # (the upper median: a starting point needs no more)


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
    with _scratch(y.size) as work:
        # the outputs are fresh arrays; the rest of the scratch space is reused by the next call
        work.c = np.empty(y.size)
        work.s = np.empty(y.size)
        c, s, b, iterations, converged = _solve(y, w, unit, g, lam, baseline, min_spike, work=work, copy=False)
        del work.c, work.s
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    objective = float(_objective(y, w, unit, g1, g2, lam, b, c, s))
    return ARDeconvolution(calcium=c, spikes=s, baseline=float(b), penalty=lam, objective=objective,
                           iterations=int(iterations), converged=bool(converged), coefficients=g.copy())


# --------------------------------------------------------------------------- plain-Python reference
def reference_deconvolve_ar(y, coefficients, *, penalty, baseline=0.0, weights=None, min_spike=0.0):
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

    b = float(baseline) if not fit_b else _initial_baseline(y, w, False)
    starts, pinned0, c = greedy(b)
    on = support_of(starts, pinned0)
    if thr > 0 or (g2 == 0.0 and g1 > 0 and not fit_b):
        # the pass's own solution (exact for AR(1) with thr = 0)
        return c, np.maximum(np.where(on, spikes_of(c), 0.0), 0.0), b
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
