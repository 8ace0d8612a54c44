"""The driver of the exact AR solver, and the named interface the rest of ``calcium.infer`` uses.

:func:`solve` runs a pool pass (:mod:`calcium.infer._passes`) and, where
the pass alone is not exact, the exact finish on its support
(:mod:`calcium.infer._repair`), with the active-set fallback should the
pivoting cycle.  A :class:`Workspace` holds the arrays of one trace length
and what is cached about the trace being solved (its data scale, its
backward-filtered copy); one per thread is reused between calls
(:func:`reused_workspace`).

The interface (everything the other modules of ``calcium.infer`` import
from the solver's rooms):

- :func:`prepare_weights`, :func:`check_penalty`, :func:`check_baseline`:
  inputs as the solver takes them;
- :func:`solve`, :data:`PREVIOUS`, :class:`Workspace`,
  :func:`reused_workspace`: solving, warm starts and scratch space;
- :meth:`Workspace.penalty_on_support`, :meth:`Workspace.project_out`,
  :meth:`Workspace.response_energy`, :meth:`Workspace.support`: what the
  penalty search and the kinetics estimate need of a solution;
- :func:`objective`, :func:`backward_filter`, :func:`response_energy`:
  kernels over a trace.
"""
from __future__ import annotations

import contextlib
import math
import numbers
import threading

import numpy as np

from .._checks import check_nonnegative
from ._passes import pass_ar1, pass_ar2, pass_ar2_unit
from ._repair import active_set, data_scale, exact_finish, starts_from_support
from ._response import response_energy, response_for
from ._state import (MATCH_ROUNDS, MAX_PIVOTS, N_STACK, N_SUMS, NO_MATCH, TOL_GRADIENT, TOL_SPIKE, Limits, Match,
                     Pools, Scratch, Trace, Violations)
from ._support import at_penalty, backward_filter, match_penalty, objective, pool_sums, project_out

__all__ = ["PREVIOUS", "Workspace", "backward_filter", "check_baseline", "check_penalty", "objective",
           "prepare_weights", "response_energy", "reused_workspace", "solve", "tolerances"]


# --------------------------------------------------------------------------- inputs
def prepare_weights(y: np.ndarray, weights, name: str = "weights"):
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


def check_penalty(penalty) -> float:
    return check_nonnegative(penalty, "penalty")


def check_baseline(baseline):
    if isinstance(baseline, str):
        if baseline != "fit":
            raise ValueError(f"baseline must be a finite number or 'fit', got {baseline!r}")
        return baseline
    if not isinstance(baseline, numbers.Real) or isinstance(baseline, bool) or not np.isfinite(baseline):
        raise ValueError(f"baseline must be a finite number or 'fit', got {baseline!r}")
    return float(baseline)


def tolerances(y, w, unit, lam):
    """(spike tolerance, gradient tolerance at penalty lam, smallest pivot) of the optimality check."""
    scale, energy, wmax = data_scale(y, w, unit)
    scale = max(scale, 1e-300)
    return TOL_SPIKE * scale, TOL_GRADIENT * (lam + energy + scale), 1e-13 * wmax


def initial_baseline(y, w, unit):
    """Starting baseline for the joint fit: the median of the weighted frames (of a subsample: a starting point)."""
    obs = y if unit else y[w > 0]
    sample = obs[::max(1, obs.size // 2000)].copy()
    k = sample.size // 2
    return float(np.partition(sample, k)[k])  # (the upper median: a starting point needs no more)


# --------------------------------------------------------------------------- workspace
class Workspace:
    """Scratch arrays for the kernels of one trace length (allocated on first use), plus cached
    per-trace quantities: the data scale and the backward-filtered trace.

    It also keeps the support of the last solution (``starts[:n_pools]``, ``free0``) and its penalty
    (``lam``), from which a later solve can start (``support=PREVIOUS``).
    """

    _FLOAT = ("c", "s", "grad", "bad_grad", "pv", "pp", "pv1", "pp1", "c_new", "s_new", "s_old")
    _INT = ("starts", "starts2", "bad", "toggles")

    def __init__(self, T: int):
        self.T = T
        self.busy = False
        self.reset()

    def reset(self):
        """Forget everything about the last trace (the arrays stay)."""
        self.n_pools = 0  # pools of the last solution (in self.starts), valid after solve
        self.free0 = False
        self.lam = 0.0
        self._scale = None
        self._filtered_key = None
        self._mean = None

    def __getattr__(self, name):  # called only for attributes not set yet: the scratch arrays
        if name in Workspace._FLOAT:
            arr = np.empty(self.T)
        elif name in Workspace._INT:
            arr = np.empty(self.T, np.int64)
        elif name == "bad_on":
            arr = np.empty(self.T, np.bool_)
        elif name == "sums":
            arr = np.empty((N_SUMS, self.T))
        elif name == "dp":
            arr = np.empty((4, self.T))
        elif name == "stack":
            arr = np.empty((N_STACK, self.T))
        else:
            raise AttributeError(name)
        setattr(self, name, arr)
        return arr

    def pools(self) -> Pools:
        return Pools(self.sums, self.dp, self.pv, self.pp, self.pv1, self.pp1)

    def scratch(self) -> Scratch:
        """The arrays as the kernels take them (built afresh: ``starts`` and ``starts2`` swap, and a caller
        may hand in its own ``c`` and ``s``)."""
        return Scratch(self.c, self.s, self.grad, self.starts, self.starts2, self.pools(),
                       self.stack,
                       Violations(self.bad, self.bad_on, self.bad_grad, self.toggles),
                       self.c_new, self.s_new, self.s_old)

    def level(self, y, w, unit, fit_b: bool, b: float) -> float:
        """The level the pool sums are taken from: the baseline when fixed, the weighted mean when fitted
        (centred data keep the sums well conditioned; a free baseline does not depend on it)."""
        if not fit_b:
            return b
        if self._mean is None:
            self._mean = float(np.sum(y)) / y.size if unit else float(np.dot(w, y) / np.sum(w))
        return self._mean

    def response(self, g1: float, g2: float):
        return response_for(g1, g2, self.T)

    def response_energy(self, g1: float, g2: float) -> float:
        """sum_k h_k^2 over the trace's length."""
        return float(self.response(g1, g2).tables[0, -1])

    def trace(self, y, w, unit, bb: float, g1: float, g2: float) -> Trace:
        """The trace as the support solves read it, at level ``bb``: with unit weights its copy minus ``bb``
        run backwards through the AR filter and its tail sums (see _support.pool_sums), kept while
        (bb, g1, g2) stay the same."""
        if not unit:
            return Trace(y, w, unit, bb, self.c, self.c)  # (the filtered copy is not used with weights)
        key = (bb, g1, g2)
        if self._filtered_key != key:
            if getattr(self, "_zy", None) is None:
                self._zy = np.empty(self.T + 2)
                self._tail = np.empty(self.T + 1)
            top, energy = backward_filter(y, bb, g1, g2, self._zy, self._tail)
            if self._scale is None:
                self._scale = (top, math.sqrt(energy), 1.0)
            self._filtered_key = key
        return Trace(y, w, unit, bb, self._zy, self._tail)

    def tolerances(self, y, w, unit, lam):
        """(spike tolerance, gradient tolerance at penalty lam, smallest pivot) of :func:`tolerances`, from
        the cached data scale."""
        tol_s, base, tiny = self.tolerance_parts(y, w, unit)
        return tol_s, TOL_GRADIENT * (lam + base), tiny

    def tolerance_parts(self, y, w, unit):
        """(spike tolerance, gradient tolerance / TOL_GRADIENT - penalty, smallest pivot)."""
        if self._scale is None:
            self._scale = data_scale(y, w, unit)
        scale, energy, wmax = self._scale
        scale = max(scale, 1e-300)
        return TOL_SPIKE * scale, energy + scale, 1e-13 * wmax

    def support(self):
        """(pool starts, free0) of the last solution: frame 0 then every frame with a spike, and whether
        frame 0 carries one."""
        return self.starts[:self.n_pools].copy(), self.free0

    def penalty_on_support(self, y, w, unit, g1, g2, fit_b, b_fixed, target, syy, sy):
        """(penalty, baseline) at which the optimum on the last solution's support leaves the residual
        ``target``, or None when there is no such penalty.

        ``syy``, ``sy`` are the sums of w (y - level)^2 and w (y - level) at :meth:`level`.  The pools at
        that penalty are left in the workspace: a following :func:`solve` with ``support=PREVIOUS`` and
        ``presolved=True`` starts from them.
        """
        n, free0 = self.n_pools, self.free0
        response = self.response(g1, g2)
        bb = self.level(y, w, unit, fit_b, b_fixed)
        trace = self.trace(y, w, unit, bb, g1, g2)
        _, _, tiny = self.tolerance_parts(y, w, unit)
        pools = self.pools()
        pool_sums(trace, response, self.starts, n, pools.sums)
        lam, b0, b1, solved = match_penalty(response, self.T, self.starts, n, free0, fit_b, b_fixed - bb, 0.0,
                                            pools, Match(target, syy, sy, MATCH_ROUNDS), tiny)
        if not (solved and lam == lam):
            return None
        at_penalty(n, pools, lam)
        return lam, (bb + b0 - lam * b1 if fit_b else b_fixed)

    def project_out(self, x, w, unit, g1, g2, starts, free0, tiny, out=None):
        """x minus its (weighted) least-squares fit by a constant and spikes at the pool ``starts`` (any
        sign), into ``out``."""
        T = x.size
        n = starts.size
        out = np.empty(T) if out is None else out
        pools = Pools(np.empty((N_SUMS, n)), self.dp, self.pv1, self.pp1, self.pv1, self.pp1)
        project_out(x, w, unit, self.response(g1, g2), starts, n, free0, tiny, pools, out, self.s)
        return out


_THREAD = threading.local()


@contextlib.contextmanager
def reused_workspace(T: int):
    """A workspace for T frames, reused by later calls in the same thread.

    Reusing it keeps its pages mapped: on some systems the page faults of
    fresh large arrays cost more than the solver itself.  One workspace per
    thread is kept (the last size used).
    """
    work = getattr(_THREAD, "work", None)
    if work is None or work.T != T or work.busy:
        work = Workspace(T)
        if getattr(_THREAD, "work", None) is None or not _THREAD.work.busy:
            _THREAD.work = work
    else:
        work.reset()
    work.busy = True
    try:
        yield work
    finally:
        work.busy = False


# --------------------------------------------------------------------------- the solve
def _exact_pass(response) -> bool:
    """Whether the pool pass alone is exact (AR(1), 0 < g < 1; at a fixed baseline and penalty)."""
    return response.g2 == 0.0 and response.g1 > 0.0


def _pool_pass(y, w, unit, response, lam, b, thr, work: Workspace, expand=True):
    """One pool pass at a fixed baseline into the workspace (with ``expand``, its calcium and spikes into
    work.c and work.s); returns (pools, pool 0 pinned)."""
    scratch = work.scratch()
    if _exact_pass(response):
        return pass_ar1(y, w, unit, response, lam, b, thr, scratch, expand)
    if unit and thr == 0.0:
        return pass_ar2_unit(y, response, lam, b, scratch, expand)
    return pass_ar2(y, w, unit, response, lam, b, thr, scratch, expand)


#: ``support=PREVIOUS`` in solve: start from the support of the last solution held by the workspace.
PREVIOUS = object()


def solve(y, w, unit, g, lam, baseline, min_spike, *, b0=None, support=None, allowed=None, work=None,
          presolved=False, match=None, copy=None):
    """Core solver shared by the public functions (inputs already validated: see :func:`prepare_weights`).

    ``support`` starts the exact finish from a given support (a boolean
    array, or PREVIOUS: the last solution's, kept by ``work``) instead of a
    pool pass; with ``presolved`` the workspace's pools (starts, values,
    n_pools, free0) already hold the exact optimum on that support at
    baseline ``b0``.  ``match`` = (target, syy, sy): the penalty is moved
    during the first rounds to where the residual equals target (see
    _repair.exact_finish; syy, sy the sums of w (y - level)^2 and
    w (y - level)); the final penalty is left in work.lam.  Returns (c, s,
    b, iterations, converged); c and s are fresh arrays unless ``copy`` is
    False (then they are the workspace's, valid until its next use;
    default: copies when ``work`` is given).  The workspace keeps the
    support (work.support()).
    """
    T = y.shape[0]
    g1 = float(g[0])
    g2 = float(g[1]) if g.size > 1 else 0.0
    # a private workspace can hand its arrays out; a shared one (warm starts) must copy them
    shared = (work is not None) if copy is None else bool(copy)
    work = work or Workspace(T)
    fit_b = isinstance(baseline, str)
    b = float(baseline) if not fit_b else (float(b0) if b0 is not None else initial_baseline(y, w, unit))
    thr = float(min_spike)
    iterations = 0
    work.lam = lam
    response = work.response(g1, g2)
    use_allowed = allowed is not None
    allowed_arr = np.asarray(allowed, dtype=bool) if use_allowed else np.zeros(1, dtype=bool)
    if support is None:
        # one pool pass at the current baseline; a free baseline is then fitted jointly by the exact finish,
        # which computes the calcium itself: the pass expands its pools only when its solution is the answer
        final = thr > 0.0 or (_exact_pass(response) and not fit_b and match is None)
        n, pinned0 = _pool_pass(y, w, unit, response, lam, b, thr, work, expand=final)
        iterations += 1
        work.n_pools, work.free0 = n, not pinned0
        if final:
            if thr > 0.0:
                np.maximum(work.s, 0.0, out=work.s)  # rounding-level negatives
            if shared:
                return work.c.copy(), work.s.copy(), b, iterations, True
            return work.c, work.s, b, iterations, True
        free0 = not pinned0
        presolved = False
        if use_allowed:
            on = _support_of(work.starts, n, free0, T) & allowed_arr
            n = starts_from_support(on, work.starts)
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
            n = starts_from_support(on, work.starts)
            free0 = bool(on[0])
    bb = work.level(y, w, unit, fit_b, b)
    trace = work.trace(y, w, unit, bb, g1, g2)
    tol_s, tol_base, tiny = work.tolerance_parts(y, w, unit)
    limits = Limits(tol_s, tol_base, tiny, allowed_arr, use_allowed, MAX_PIVOTS)
    rule = Match(*match, MATCH_ROUNDS) if match is not None else NO_MATCH
    b_start = b
    b, lam, its, converged, n, free0, swapped = exact_finish(trace, response, work.scratch(), limits, fit_b, lam,
                                                             b, n, free0, presolved, rule)
    work.lam = lam
    if swapped:
        work.starts, work.starts2 = work.starts2, work.starts
    iterations += its
    work.n_pools, work.free0 = n, free0
    if not converged:
        # pivoting cycled (a degenerate problem): restart from a feasible point with the monotone method
        b = b_start
        if support is None:
            n, pinned0 = _pool_pass(y, w, unit, response, lam, b, thr, work)
            on = _support_of(work.starts, n, not pinned0, T)
            if use_allowed:
                on &= allowed_arr
            np.maximum(work.s, 0.0, out=work.s)  # the pass's calcium is feasible (every spike >= 0)
        else:  # start from no spike at all (feasible), on the allowed frames
            on = np.zeros(T, dtype=bool)
            work.c[:] = 0.0
            if fit_b:
                b = float(np.mean(y)) if unit else float(np.sum(w * y) / np.sum(w))
        b, its, converged = active_set(trace, response, work.scratch(), limits, fit_b, lam, b, on, 20 * T + 100)
        iterations += its
        work.n_pools = starts_from_support(on, work.starts)
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
