"""The optimality check and its repair (see :mod:`calcium.infer.ar`).

After a solve on a support (:mod:`calcium.infer._support`) one backward pass
checks the Karush-Kuhn-Tucker conditions on every frame
(:func:`check_pools`); frames that violate them are exchanged by block
principal pivoting (Júdice & Pires 1994, :func:`pivot`) until none do
(:func:`exact_finish`).  Should the pivoting cycle (degenerate problems),
a primal active-set method (Lawson & Hanson 1974, :func:`active_set`)
restarts from a feasible point; it lowers the objective at every step.
"""
from __future__ import annotations

import math

from numba import njit

from ._state import FMA, NO_BASELINE, SINGULAR_POOL, TOL_GRADIENT
from ._support import at_penalty, fill, match_penalty, pool_sums, pools_solve


@njit(cache=True, inline="always")
def spike_at(c, t, g1, g2):
    """s_t = c_t - g1 c_{t-1} - g2 c_{t-2} (c = 0 before the first frame)."""
    x = c[t]
    if t >= 1:
        x -= g1 * c[t - 1]
    if t >= 2:
        x -= g2 * c[t - 2]
    return x


@njit(cache=True)
def starts_from_support(on, starts):
    """Pool starts of a support: frame 0, then every frame with a spike."""
    n = 1
    starts[0] = 0
    for t in range(1, on.shape[0]):
        if on[t]:
            starts[n] = t
            n += 1
    return n


@njit(cache=True, fastmath=FMA)
def check_pools(trace, response, lam, b, starts, n, free0, pools, limits, tol_g, violations):
    """Check the KKT conditions of the pools' (v, p) in one backward pass (the calcium is computed on the fly;
    fill stores it once the check passes).

    The gradient lam - z_t, z_t = sum_{tau >= t} h_{tau - t} w_tau (y_tau - b - c_tau),
    is the backward AR recursion of the residual.  The violators (a negative
    spike on the support, ``on_support`` True; a negative gradient off it)
    go into ``violations`` in decreasing frame order; returns their number.
    """
    y, w, unit = trace.y, trace.w, trace.unit
    g1, g2, h = response.g1, response.g2, response.h
    pv, pp = pools.value, pools.start_value
    allowed, use_allowed, tol_s = limits.allowed, limits.use_allowed, limits.spike_tol
    bad, bad_on, bad_grad = violations.frames, violations.on_support, violations.gradient
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
        if unit and not use_allowed:  # the common case, without the per-frame tests of the others
            for k in range(en - st - 1, 0, -1):
                x = v * h[k] + pg * h[k - 1]
                z = g1 * z1 + ((y[st + k] - b - x) + g2 * z2)  # one fused step on the chain through z1
                z2 = z1
                z1 = z
                if z > limit:
                    bad[n_bad] = st + k
                    bad_on[n_bad] = False
                    bad_grad[n_bad] = lam - z
                    n_bad += 1
        else:
            for k in range(en - st - 1, 0, -1):
                x = v * h[k] + pg * h[k - 1]
                r = (y[st + k] - b - x) if unit else w[st + k] * (y[st + k] - b - x)
                z = g1 * z1 + (r + g2 * z2)
                z2 = z1
                z1 = z
                # (allowed first: with a restricted support most frames are not, and that test predicts well)
                if (not use_allowed or allowed[st + k]) and z > limit:
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
def check_optimality(trace, response, lam, b, c, on, limits, tol_g, s, grad, bad):
    """KKT check of a given calcium ``c`` (one backward pass; used by the active-set fallback).

    The violators go into ``bad`` in decreasing frame order; returns their number.
    """
    y, w, unit = trace.y, trace.w, trace.unit
    g1, g2 = response.g1, response.g2
    allowed, use_allowed, tol_s = limits.allowed, limits.use_allowed, limits.spike_tol
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
            x = spike_at(c, t, g1, g2)
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
def solve_pools(trace, response, lam, fit_b, b, starts, n, free0, pools, tiny, fresh):
    """Exact optimum with spikes only at the pool starts (and frame 0 if ``free0``): (v, p) into the pools.

    The pool sums are recomputed unless ``fresh`` is False (they already
    describe these pools).  Spikes the data cannot determine (singular
    pools, see pools_solve) are taken out of the support.  Returns
    (baseline, number of pools, free0).
    """
    T = trace.y.shape[0]
    bb = trace.level
    while True:
        if fresh:
            pool_sums(trace, response, starts, n, pools.sums)
        fresh = True
        bp, _, status, bad = pools_solve(response, T, starts, n, free0, fit_b, b - bb, lam, pools, False, tiny)
        if status == NO_BASELINE:
            # the support explains any constant: keep b fixed for this step
            bp, _, status, bad = pools_solve(response, T, starts, n, free0, False, b - bb, lam, pools, False, tiny)
        if status == SINGULAR_POOL:
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
def solve_on_support(trace, response, lam, fit_b, b, on, starts, pools, tiny):
    """solve_pools on a support given as a boolean array (updated for dropped spikes); returns (b, n)."""
    n = starts_from_support(on, starts)
    b_new, n2, free0 = solve_pools(trace, response, lam, fit_b, b, starts, n, on[0], pools, tiny, True)
    if n2 != n or free0 != on[0]:
        on[:] = False
        for i in range(1, n2):
            on[starts[i]] = True
        on[0] = free0
    return b_new, n2


@njit(cache=True)
def pivot(starts, n, free0, violations, n_bad, full, out):
    """Block principal pivoting step (Judice & Pires 1994): the new pool starts into ``out``.

    ``full``: remove every negative spike and, of each run of adjacent
    frames that want a spike, add only the most wanting one (adding whole
    runs overshoots); otherwise exchange only the last violator (the backup
    rule that ends cycling).  Returns (number of starts, free0).
    """
    bad = violations.frames
    bad_on = violations.on_support
    bad_grad = violations.gradient
    toggles = violations.toggles
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
def exact_finish(trace, response, scratch, limits, fit_b, lam, b, n, free0, presolved, match):
    """Block principal pivoting on the support (pool starts) until the KKT conditions hold.

    With ``presolved`` the pools' (v, p) are already the exact optimum on
    the support at baseline ``b`` (and their sums describe them), and the
    first solve is skipped.  The pool starts alternate between
    ``scratch.starts`` and ``scratch.other_starts``.  The gradient
    tolerance is TOL_GRADIENT (lam + limits.gradient_base).

    With ``match.target`` > 0 the penalty is not fixed: for up to
    ``match.rounds`` rounds it is moved, after each solve, to where the
    residual on the current support equals the target (match_penalty), so
    that the noise-matched penalty and its support are found together.

    The calcium and spikes (rounding-level negatives cleared) are stored in
    the scratch once the conditions hold (not when it fails to converge).
    Returns (baseline, penalty, solves, converged, n, free0, whether the
    final starts are in other_starts).
    """
    T = trace.y.shape[0]
    bb = trace.level
    pools = scratch.pools
    violations = scratch.violations
    tiny = limits.tiny
    best = T + 2
    tries = 3
    b_cur = b
    solves = 0
    cur = scratch.starts
    other = scratch.other_starts
    swapped = False
    for it in range(limits.max_pivots):
        moved = False
        if match.target > 0.0 and it < match.rounds:
            # the solve that matches the penalty also gives the optimum at any penalty (the affine form): no
            # separate solve at the current one, unless the pools cannot be solved as they are
            if not (it == 0 and presolved):
                solves += 1
                pool_sums(trace, response, cur, n, pools.sums)
            lam_new, b0, b1, solved = match_penalty(response, T, cur, n, free0, fit_b, b_cur - bb, lam, pools,
                                                    match, tiny)
            if not solved:
                # spikes the data cannot determine: taken out of the support by the plain solve (sums current)
                b_cur, n, free0 = solve_pools(trace, response, lam, fit_b, b_cur, cur, n, free0, pools, tiny, False)
                lam_new, b0, b1, solved = match_penalty(response, T, cur, n, free0, fit_b, b_cur - bb, lam, pools,
                                                        match, tiny)
            if solved:
                if lam_new == lam_new:
                    moved = lam_new != lam
                    lam = lam_new
                at_penalty(n, pools, lam)
                if fit_b:
                    b_cur = bb + b0 - lam * b1
            else:
                b_cur, n, free0 = solve_pools(trace, response, lam, fit_b, b_cur, cur, n, free0, pools, tiny, True)
        elif not (it == 0 and presolved):
            solves += 1
            b_cur, n, free0 = solve_pools(trace, response, lam, fit_b, b_cur, cur, n, free0, pools, tiny, True)
        n_bad = check_pools(trace, response, lam, b_cur, cur, n, free0, pools, limits,
                            TOL_GRADIENT * (lam + limits.gradient_base), violations)
        if n_bad == 0:
            fill(response, T, cur, n, pools.value, pools.start_value, scratch.calcium, scratch.spikes)
            s = scratch.spikes
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
        n, free0 = pivot(cur, n, free0, violations, n_bad, full, other)
        cur, other = other, cur
        swapped = not swapped
    return b_cur, lam, solves, False, n, free0, swapped


@njit(cache=True)
def active_set(trace, response, scratch, limits, fit_b, lam, b, on, max_iter):
    """Primal active-set method (Lawson & Hanson 1974) from a feasible point (scratch.calcium, spikes >= 0, b).

    The fallback when block pivoting cycles (degenerate problems: frames of
    weight 0 that make spikes indistinguishable, oscillating kernels): every
    step lowers the objective, so it terminates.  One frame enters the
    support per outer step.  Returns (baseline, solves, converged).
    """
    T = trace.y.shape[0]
    g1 = response.g1
    g2 = response.g2
    c = scratch.calcium
    c_new = scratch.trial_calcium
    s_new = scratch.trial_spikes
    s_old = scratch.old_spikes
    grad = scratch.gradient
    starts = scratch.starts
    pools = scratch.pools
    allowed = limits.allowed
    use_allowed = limits.use_allowed
    tol_s = limits.spike_tol
    tol_g = TOL_GRADIENT * (lam + limits.gradient_base)
    solves = 0
    for it in range(max_iter):
        # optimum on the current support (the baseline too), stepping back to stay feasible
        for inner in range(T + 1):
            for t in range(T):
                s_old[t] = spike_at(c, t, g1, g2) if on[t] else 0.0
            solves += 1
            b_new, n = solve_on_support(trace, response, lam, fit_b, b, on, starts, pools, limits.tiny)
            fill(response, T, starts, n, pools.value, pools.start_value, c_new, s_new)
            alpha = 1.0
            for t in range(T):
                if on[t]:
                    z = spike_at(c_new, t, g1, g2)
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
                if on[t] and spike_at(c, t, g1, g2) <= tol_s:
                    on[t] = False
        check_optimality(trace, response, lam, b, c, on, limits, tol_g, scratch.spikes, grad,
                         scratch.violations.frames)
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
def data_scale(y, w, unit):
    """(max |y| over weighted frames, sqrt(sum w y^2), max w) in one pass (no BLAS): the scale of the
    tolerances."""
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
