"""The pool passes: one sweep over the trace that groups frames into pools (see :mod:`calcium.infer.ar`).

A pool starts with a spike and then follows the AR impulse response.  Each
pass keeps the pools in a stack (``Scratch.stack``, one row per quantity;
the newest pool in registers) with a handful of running sums, so that a
merge costs O(1).  For AR(1), 0 < g < 1, a fixed baseline and no threshold
the pass is exact; otherwise it gives the starting support of the exact
finish (:mod:`calcium.infer._repair`).
"""
from __future__ import annotations

from numba import njit

from ._response import frame_penalty
from ._state import (FLUSH, STACK_A, STACK_B, STACK_BAR, STACK_BEFORE_END, STACK_C, STACK_D, STACK_DECAY, STACK_E,
                     STACK_END, STACK_START_VALUE, STACK_VALUE)
from ._support import fill


# --------------------------------------------------------------------------- AR(1)
@njit(cache=True, inline="always")
def _ar1_step(m, g, thr, tA, tD, tG, tst, n, t, starts, stack, zero_thr):
    """One frame (unit weight, D = m) of the AR(1) pool pass; returns the new top (A, D, G, start) and n."""
    if zero_thr:
        tN = (tD if (n > 0 or tD > 0.0) else 0.0) * tG
    else:
        tN = (tD if (n > 0 or (tD > 0.0 and tD >= thr * tA)) else 0.0) * tG + thr * tA
    if m * tA >= tN:
        starts[n] = tst
        stack[STACK_A, n] = tA
        stack[STACK_D, n] = tD
        stack[STACK_DECAY, n] = tG
        stack[STACK_BAR, n] = tN
        return 1.0, m, g, t, n + 1
    # the frame's spike would be below thr: it joins the top pool, which is then checked against the pool
    # below it (and merged into it, and so on)
    tA += tG * tG
    tD += tG * m
    tG *= g
    if tG < FLUSH:
        tG = 0.0
    while n > 0 and tD * stack[STACK_A, n - 1] < tA * stack[STACK_BAR, n - 1]:
        tA, tD, tG, tst, n = _ar1_merge_down(tA, tD, tG, n, starts, stack)
    return tA, tD, tG, tst, n


@njit(cache=True, inline="always")
def _ar1_merge_down(tA, tD, tG, n, starts, stack):
    """The top pool merged into pool n - 1 (AR(1): its frames are g^{L_j} times further on)."""
    j = n - 1
    gj = stack[STACK_DECAY, j]
    tG *= gj
    if tG < FLUSH:
        tG = 0.0
    return stack[STACK_A, j] + gj * gj * tA, stack[STACK_D, j] + gj * tD, tG, starts[j], j


@njit(cache=True)
def pass_ar1(y, w, unit, response, lam, b, thr, scratch, expand):
    """Pool pass for AR(1), 0 < g < 1: exact (pool-adjacent violators) when thr == 0.

    Pool j holds the sums A = sum w h_k^2, D = sum m_t h_k (m_t = w_t (y_t - b)
    - lam a_t) and G = g^length; its value is v = D / A (pool 0: 0 when that
    is below thr or <= 0).  With unit weights (A >= 1) the tests compare
    without dividing: a new frame (A = 1, D = m) opens a pool when
    m A_top >= N_top with N = D G + thr A; the top pool stays above pool j
    when D_top A_j >= A_top N_j.  With ``expand`` fills ``scratch.calcium``
    and ``scratch.spikes``; returns (number of pools, pool 0 pinned at 0).
    """
    T = y.shape[0]
    g, h = response.g1, response.h
    starts, stack, c, s = scratch.starts, scratch.stack, scratch.calcium, scratch.spikes
    lam_mid = lam * (1.0 - g)
    # the newest pool (top) lives in registers; pools 0..n-1 below it in the stack
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
                tA, tD, tG, tst, n = _ar1_step(y[t] - bl, g, 0.0, tA, tD, tG, tst, n, t, starts, stack, True)
        else:
            for t in range(1, T - 1):
                tA, tD, tG, tst, n = _ar1_step(y[t] - bl, g, thr, tA, tD, tG, tst, n, t, starts, stack, False)
        if T > 1:
            tA, tD, tG, tst, n = _ar1_step(y[T - 1] - b - lam, g, thr, tA, tD, tG, tst, n, T - 1, starts, stack,
                                           False)
    else:
        # with weights a pool can have A = 0 (pool 0 over frames of weight 0): the tests compare values,
        # v = D / A, and the stack's row STACK_BAR holds the value a following pool must reach, v G + thr
        tv = tD / tA if tA > 0.0 else 0.0
        if not (tv > 0.0 and tv >= thr):
            tv = 0.0
        for t in range(1, T):
            A = w[t]
            D = A * (y[t] - b) - (lam_mid if t < T - 1 else lam)
            tN = tv * tG + thr
            if A > 0.0 and D - A * tN >= 0.0:
                starts[n] = tst
                stack[STACK_A, n] = tA
                stack[STACK_D, n] = tD
                stack[STACK_DECAY, n] = tG
                stack[STACK_BAR, n] = tN
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
            if tG < FLUSH:
                tG = 0.0
            while n > 0 and not (tA > 0.0 and tD - tA * stack[STACK_BAR, n - 1] >= 0.0):
                tA, tD, tG, tst, n = _ar1_merge_down(tA, tD, tG, n, starts, stack)
            tv = tD / tA if tA > 0.0 else 0.0
            if n == 0 and not (tv > 0.0 and tv >= thr):
                tv = 0.0
    starts[n] = tst
    stack[STACK_A, n] = tA
    stack[STACK_D, n] = tD
    n += 1
    pA = stack[STACK_A]
    pD = stack[STACK_D]
    pinned0 = not (pA[0] > 0.0 and pD[0] > 0.0 and pD[0] >= thr * pA[0])
    if not expand:
        return n, pinned0
    # expand the pools: c = v g^k within a pool (g^k = h[k], zero once decayed)
    prev = 0.0
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        v = 0.0 if (i == 0 and pinned0) else pD[i] / pA[i]
        x = v - g * prev
        s[st] = x if x > 0.0 else 0.0  # clears rounding-level negatives
        c[st] = v
        for k in range(1, en - st):
            c[st + k] = v * h[k]
            s[st + k] = 0.0
        prev = c[en - 1]
    return n, pinned0


# --------------------------------------------------------------------------- AR(2)
@njit(cache=True, inline="always")
def _merge_into(j, Lj, g2, h, top, stack):
    """Sums of pool j after the top pool (starting Lj frames after it, sums ``top`` = (A, B, C, D, E)) is
    merged into it.

    On the top's frames c = alpha h_i + beta g2 h_{i-1}, where (alpha, beta)
    = (c_{t0+Lj}, c_{t0+Lj-1}) are linear in pool j's (v, p): the top's
    quadratic sums are carried over through that map.
    """
    tA, tB, tC, tD, tE = top
    a1 = h[Lj]
    a2 = g2 * h[Lj - 1]
    b1 = h[Lj - 1]
    b2 = g2 * h[Lj - 2] if Lj >= 2 else 0.0
    return (stack[STACK_A, j] + a1 * a1 * tA + 2.0 * a1 * b1 * tB + b1 * b1 * tC,
            stack[STACK_B, j] + a1 * a2 * tA + (a1 * b2 + a2 * b1) * tB + b1 * b2 * tC,
            stack[STACK_C, j] + a2 * a2 * tA + 2.0 * a2 * b2 * tB + b2 * b2 * tC,
            stack[STACK_D, j] + a1 * tD + b1 * tE,
            stack[STACK_E, j] + a2 * tD + b2 * tE)


@njit(cache=True, inline="always")
def _store_top(n, tst, L, v, p, g2, h, top, starts, stack):
    """Store the top pool (length L, value v, start value p, sums ``top``) as pool n; returns its end values
    (c at its last frame and the frame before), which start the next pool."""
    starts[n] = tst
    stack[STACK_A, n], stack[STACK_B, n], stack[STACK_C, n], stack[STACK_D, n], stack[STACK_E, n] = top
    stack[STACK_VALUE, n] = v
    stack[STACK_START_VALUE, n] = p
    e1 = v * h[L - 1] + (p * g2 * h[L - 2] if L >= 2 else 0.0)
    if L >= 2:
        e2 = v * h[L - 2] + (p * g2 * h[L - 3] if L >= 3 else 0.0)
    else:
        e2 = p
    stack[STACK_END, n] = e1
    stack[STACK_BEFORE_END, n] = e2
    return e1, e2


@njit(cache=True, inline="always")
def _merge_down(n, tst, g2, h, tA, tB, tC, tD, tE, starts, stack):
    """The top pool (sums tA ... tE) merged into pool n - 1, which becomes the top: its sums, start, start
    values (p, q) = (c_{t0-1}, c_{t0-2}) and the new pool count."""
    j = n - 1
    tA, tB, tC, tD, tE = _merge_into(j, tst - starts[j], g2, h, (tA, tB, tC, tD, tE), stack)
    return (tA, tB, tC, tD, tE, starts[j], stack[STACK_START_VALUE, j],
            (stack[STACK_BEFORE_END, j - 1] if j >= 1 else 0.0), j)


@njit(cache=True, inline="always")
def _top_value(n, v0, tA, tB, tD, p):
    """The top pool's value: v0 for pool 0 (pinned or free), else the 1-D least squares (D - B p) / A."""
    return v0 if n == 0 else (tD - tB * p) / tA


@njit(cache=True, inline="always")
def _close_pass(scratch, response, T, n, tst, v, p, expand):
    """End of a pool pass: the top pool stored as pool n, the pools expanded into the calcium and spikes
    (with ``expand``: the exact finish that follows a pass does not need them); returns the number of
    pools."""
    starts = scratch.starts
    stack = scratch.stack
    starts[n] = tst
    stack[STACK_VALUE, n] = v
    stack[STACK_START_VALUE, n] = p
    n += 1
    if expand:
        fill(response, T, starts, n, stack[STACK_VALUE], stack[STACK_START_VALUE], scratch.calcium, scratch.spikes)
    return n


@njit(cache=True)
def pass_ar2_unit(y, response, lam, b, scratch, expand):
    """pass_ar2 for unit weights and thr = 0 (the common case), with the pass's constants hoisted.

    Same rule and same results as pass_ar2; p g2 and g1 p + g2 q are kept
    per top pool, and the tests need no weight.
    """
    T = y.shape[0]
    g1, g2, h = response.g1, response.g2, response.h
    starts, stack = scratch.starts, scratch.stack
    amid = 1.0 - g1 - g2
    tA = 1.0
    tB = 0.0
    tC = 0.0
    tD = (y[0] - b) - lam * frame_penalty(0, T, g1, g2)
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
        m = (y[t] - bl) if t < T - 2 else (y[t] - b) - lam * frame_penalty(t, T, g1, g2)
        if m * pred_d >= pred_n:  # the frame opens a pool
            L = t - tst
            e1, e2 = _store_top(n, tst, L, _top_value(n, v0, tA, tB, tD, p), p, g2, h, (tA, tB, tC, tD, tE),
                                starts, stack)
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
            tA, tB, tC, tD, tE, tst, p, q, n = _merge_down(n, tst, g2, h, tA, tB, tC, tD, tE, starts, stack)
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
    return _close_pass(scratch, response, T, n, tst, _top_value(n, v0, tA, tB, tD, p), p, expand), pinned0


@njit(cache=True)
def pass_ar2(y, w, unit, response, lam, b, thr, scratch, expand):
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
    g1, g2, h = response.g1, response.g2, response.h
    starts, stack = scratch.starts, scratch.stack
    wt = 1.0 if unit else w[0]
    tA = wt
    tB = 0.0
    tC = 0.0
    tD = wt * (y[0] - b) - lam * frame_penalty(0, T, g1, g2)
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
        m = wt * (y[t] - b) - lam * frame_penalty(t, T, g1, g2)
        if wt > 0.0 and m * pred_d >= wt * (pred_n + thr * pred_d):
            # the frame opens a pool; the top is stored with its value and end values (c_{t-1}, c_{t-2})
            L = t - tst
            e1, e2 = _store_top(n, tst, L, _top_value(n, v0, tA, tB, tD, p), p, g2, h, (tA, tB, tC, tD, tE),
                                starts, stack)
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
            tA, tB, tC, tD, tE, tst, p, q, n = _merge_down(n, tst, g2, h, tA, tB, tC, tD, tE, starts, stack)
        L = t + 1 - tst
        if n == 0:
            pinned0 = not (tA > 0.0 and tD > 0.0 and tD >= thr * tA)
            v0 = 0.0 if pinned0 else tD / tA
            pred_n = v0 * h[L]
            pred_d = 1.0
        else:
            pred_n = (tD - tB * p) * h[L] + tA * p * g2 * h[L - 1]
            pred_d = tA
    return _close_pass(scratch, response, T, n, tst, _top_value(n, v0, tA, tB, tD, p), p, expand), pinned0
