r"""The exact solve on a support (see :mod:`calcium.infer.ar`).

Restricted to a support (the frames that may carry a spike: the pool
starts), the deconvolution is an equality-constrained quadratic programme.
Pool i (start t_i, length L_i) has calcium c = v h_k + p g2 h_{k-1}, v its
first value and p the calcium just before it; its cost is a quadratic in
(v, p, baseline) whose coefficients are the pool sums (:func:`pool_sums`:
O(1) per pool with unit weights, from the prefix tables of the impulse
response and the trace run backwards through the AR filter).  A backward
recursion over the pools (:func:`pools_solve`) gives the optimum in
O(number of pools); :func:`fill` writes the calcium.  On a fixed support the
optimum is affine in the penalty, which :func:`match_penalty` uses to find
the penalty at which the residual meets a target.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit

from ._response import frame_penalty
from ._state import (DP, DY, EP, EY, FMA, NO_BASELINE, OK, SINGULAR_POOL, SW, SWY, A, B, C, F, H, Trace)


@njit(cache=True, fastmath=FMA)
def backward_filter(y, bb, g1, g2, z, tail):
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
def pool_sums(trace, response, starts, n, sums):
    """Per-pool sums of the quadratic cost (see pools_solve), relative to the level ``trace.level``.

    Pool i (frames st..en-1, k = t - st) has c = v h_k + p f_k with
    f_k = g2 h_{k-1}.  With y' = y - level, its cost
    1/2 sum w (y' - b' - c)^2 + lam sum a_t c_t is, up to a constant,
    1/2 A v^2 + B v p + 1/2 C p^2 - (DY - lam DP) v - (EY - lam EP) p
    + b' (H v + F p) + 1/2 SW b'^2 - SWY b', with DY = sum w y' h_k,
    EY = sum w y' f_k, DP = sum a_t h_k, EP = sum a_t f_k, H = sum w h_k,
    F = sum w f_k, SW = sum w, SWY = sum w y' (only read for a free baseline).
    With unit weights A, B, C, H, F, SW come from the prefix tables
    and DY, EY from the backward-filtered trace ``trace.filtered``
    (z_t = sum_{tau >= t} h_{tau-t} y'_tau): since h_{L+j} = h_L h_j + h_{L-1} f_j,
    sum_{k < L} h_k y'_{st+k} = z_st - h_L z_en - g2 h_{L-1} z_{en+1}, O(1) per
    pool.  With weights the sums run over the frames.
    """
    y, w, bb, zy, tail = trace.y, trace.w, trace.level, trace.filtered, trace.tail
    g1, g2, h, tab = response.g1, response.g2, response.h, response.tables
    T = y.shape[0]
    amid = 1.0 - g1 - g2
    top = tab.shape[1] - 1
    for i in range(n):
        st = starts[i]
        en = starts[i + 1] if i + 1 < n else T
        L = en - st
        if trace.unit:
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
            sums[A, i] = tab[0, li]
            sums[B, i] = tab[1, li]
            sums[C, i] = tab[2, li]
            sums[H, i] = tab[3, li]
            sums[F, i] = tab[4, li]
            sums[SW, i] = L
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
                at = frame_penalty(t, T, g1, g2)
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
            sums[A, i] = sa
            sums[B, i] = sb
            sums[C, i] = sc
            sums[H, i] = sh
            sums[F, i] = sf
            sums[SW, i] = sw
        sums[DY, i] = dy
        sums[EY, i] = ey
        sums[DP, i] = dp
        sums[EP, i] = ep
        sums[SWY, i] = swy


@njit(cache=True)
def pools_solve(response, T, starts, n, free0, fit_b, shift, lam, pools, affine, tiny):
    r"""Exact minimiser with the spikes restricted to the pool starts.

    Pool i (start t_i, length L_i) has calcium c = v h_k + p g2 h_{k-1}, with
    v its first value and p = c_{t_i - 1}; its cost is a quadratic in
    (v, p, b') given by ``pools.sums`` (see pool_sums; a fixed baseline is
    ``shift`` above the sums' level).  The next pool's p is linear in
    (v, p).  A backward recursion over the pools carries the optimal
    cost-to-go as a quadratic in (p, b'); a forward pass recovers each
    pool's (v, p) into ``pools.value``, ``pools.start_value`` (the calcium
    itself is filled by fill).

    With ``affine`` the optimum is returned as a function of the penalty,
    (v, p, b') = x0 - lam x1: the penalty only enters the linear terms, so
    the same recursion carries a second right-hand side; x0 goes to
    value, start_value, x1 to value_slope, start_value_slope (``lam`` is
    not used).

    Returns (b' (free baseline, relative to the sums' level; else shift),
    b'1 (affine), status, index of a singular pool).
    """
    g2 = response.g2
    h = response.h
    sums = pools.sums
    dp = pools.recursion
    pv = pools.value
    pp = pools.start_value
    pv1 = pools.value_slope
    pp1 = pools.start_value_slope
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
        Mvv = sums[A, i] + P11 * al * al
        Mvp = sums[B, i] + P11 * al * be
        Mpp = sums[C, i] + P11 * be * be
        l_v = sums[DY, i] - rate * sums[DP, i] + r1 * al
        l_p = sums[EY, i] - rate * sums[EP, i] + r1 * be
        if fit_b:
            Mvb = sums[H, i] + P12 * al
            Mpb = sums[F, i] + P12 * be
            Mbb = sums[SW, i] + P22
            l_b = sums[SWY, i] + r2
        else:
            l_v -= shift * sums[H, i]
            l_p -= shift * sums[F, i]
            Mvb = Mpb = Mbb = l_b = 0.0
        if affine:
            k_v = sums[DP, i] + q1 * al
            k_p = sums[EP, i] + q1 * be
        if i > 0 or free0:
            if not Mvv > tiny:
                # the data cannot see v_i apart from the later spikes; the cost is linear in it: with
                # l_v > 0 it grows until the next pool's spike reaches 0, else its own spike does
                if l_v > 0.0 and i + 1 < n:
                    return shift, 0.0, SINGULAR_POOL, i + 1
                return shift, 0.0, SINGULAR_POOL, i
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
            return shift, 0.0, NO_BASELINE, -1
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
    return bp, bp1, OK, -1


@njit(cache=True, fastmath=FMA)
def fill(response, T, starts, n, pv, pp, c, s):
    """Calcium of every pool from its (v, p) = (pv, pp): c = v h_k + p g2 h_{k-1}; spikes at the pool starts."""
    g1 = response.g1
    g2 = response.g2
    h = response.h
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


@njit(cache=True)
def match_penalty(response, T, starts, n, free0, fit_b, shift, lam, pools, match, tiny):
    """The penalty at which the optimum on the current pools leaves the residual ``match.target``.

    On a fixed support the optimum is affine in the penalty, (v, p, b') =
    x0 - lam x1 (pools_solve with ``affine``; x0 is left in the pools'
    value and start_value, x1 in their slopes: apply a penalty with
    at_penalty), so the residual is a quadratic in it, whose coefficients
    come from the pool sums (pools_rss_quadratic), and solved exactly (the
    root where it grows with the penalty).  Returns (penalty or NaN when
    there is none, b'0, b'1, solved: False when the pools could not be
    solved at all).
    """
    b0, b1, status, _ = pools_solve(response, T, starts, n, free0, fit_b, shift, lam, pools, True, tiny)
    if status != OK:
        return math.nan, 0.0, 0.0, False
    r0, a1, a2 = pools_rss_quadratic(n, pools, b0, b1, match.syy, match.sy)
    disc = a1 * a1 - 4.0 * a2 * (r0 - match.target)
    if not (a2 > 0.0 and disc >= 0.0):
        return math.nan, b0, b1, True
    new = (-a1 + math.sqrt(disc)) / (2.0 * a2)
    return (new if new >= 0.0 else math.nan), b0, b1, True


@njit(cache=True)
def at_penalty(n, pools, lam):
    """Pools (v, p) = x0 - lam x1 (x0 in value, start_value; x1 in the slopes), in place."""
    pv = pools.value
    pp = pools.start_value
    pv1 = pools.value_slope
    pp1 = pools.start_value_slope
    for i in range(n):
        pv[i] -= lam * pv1[i]
        pp[i] -= lam * pp1[i]


@njit(cache=True, fastmath={"contract", "reassoc"})
def pools_rss_quadratic(n, pools, b0, b1, syy, sy):
    """Coefficients (c0, c1, c2) of the residual c0 + c1 lam + c2 lam^2 of the affine pools
    (v, p, b') = x0 - lam x1 (the residual sum w (y - b' - c)^2 expanded in lam), in one pass over the pools."""
    sums = pools.sums
    pv0 = pools.value
    pp0 = pools.start_value
    pv1 = pools.value_slope
    pp1 = pools.start_value_slope
    cross0 = cross1 = 0.0
    level0 = level1 = 0.0
    square0 = square01 = square1 = 0.0
    weight = 0.0
    for i in range(n):
        dy = sums[DY, i]
        ey = sums[EY, i]
        sa = sums[A, i]
        sb = sums[B, i]
        sc = sums[C, i]
        weight += sums[SW, i]
        v0 = pv0[i]
        v1 = pv1[i]
        p0 = pp0[i]
        p1 = pp1[i]
        cross0 += v0 * dy + p0 * ey
        cross1 += v1 * dy + p1 * ey
        level0 += v0 * sums[H, i] + p0 * sums[F, i]
        level1 += v1 * sums[H, i] + p1 * sums[F, i]
        square0 += v0 * v0 * sa + 2.0 * v0 * p0 * sb + p0 * p0 * sc
        square01 += v0 * v1 * sa + (v0 * p1 + v1 * p0) * sb + p0 * p1 * sc
        square1 += v1 * v1 * sa + 2.0 * v1 * p1 * sb + p1 * p1 * sc
    c0 = syy - 2.0 * b0 * sy + b0 * b0 * weight - 2.0 * cross0 + 2.0 * b0 * level0 + square0
    c1 = 2.0 * (b1 * sy - b0 * b1 * weight + cross1 - b0 * level1 - b1 * level0 - square01)
    c2 = b1 * b1 * weight + 2.0 * b1 * level1 + square1
    return c0, c1, c2


@njit(cache=True)
def project_out(x, w, unit, response, starts, n, free0, tiny, pools, out, spare):
    """x minus its (weighted) least-squares fit by a constant and spikes at the pool ``starts`` (any sign),
    into ``out`` (``spare`` is overwritten)."""
    T = x.shape[0]
    zx = np.empty(T + 2)
    tail = np.empty(T + 1)
    if unit:
        acc = 0.0
        for t in range(T):
            acc += x[t]
        bb = acc / T
        backward_filter(x, bb, response.g1, response.g2, zx, tail)
    else:
        acc = 0.0
        sw = 0.0
        for t in range(T):
            acc += w[t] * x[t]
            sw += w[t]
        bb = acc / sw
    pool_sums(Trace(x, w, unit, bb, zx, tail), response, starts, n, pools.sums)
    bp, _, status, _ = pools_solve(response, T, starts, n, free0, True, 0.0, 0.0, pools, False, tiny)
    if status != OK:
        for t in range(T):
            out[t] = x[t] - bb
        return
    fill(response, T, starts, n, pools.value, pools.start_value, out, spare)
    level = bb + bp
    for t in range(T):
        out[t] = x[t] - level - out[t]


@njit(cache=True, fastmath={"contract", "reassoc"})
def objective(y, w, unit, lam, b, c, s):
    """1/2 sum w (y - b - c)^2 + lam sum s."""
    T = y.shape[0]
    fit = 0.0
    total = 0.0
    for t in range(T):
        r = y[t] - b - c[t]
        fit += r * r if unit else w[t] * r * r
        total += s[t]
    return 0.5 * fit + lam * total
