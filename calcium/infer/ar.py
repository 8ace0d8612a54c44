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
a backward recursion over the pools solves (``_support.pools_solve``; with
unit weights its sums come from prefix tables of the impulse response and
from the trace run once backwards through the AR filter, so a solve costs
O(number of pools)); one backward pass fills the calcium and checks the
Karush-Kuhn-Tucker conditions on every frame; frames that violate them are
exchanged by block principal pivoting [3]_ until none do.  Should the
pivoting cycle (degenerate problems: many frames of weight 0, a near-zero
penalty), a primal active-set method [4]_ restarts from a feasible point; it
lowers the objective at every step.

This module holds the public entry points; the compiled kernels live in
private rooms by role: the passes (``_passes``), the solve on a support
(``_support``), the optimality check and repair (``_repair``), the driver
and its workspace (``_driver``, the only one the other modules import), the
plain-Python references (``_reference``); ``_state`` describes the structures
they share.

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
from dataclasses import dataclass

import numpy as np

from .._checks import as_traces, check_nonnegative
from ._driver import check_baseline, check_penalty, objective, prepare_weights, reused_workspace, solve

__all__ = ["ARDeconvolution", "deconvolve_ar", "check_ar_coefficients", "ar_objective"]


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


def ar_objective(y, calcium, coefficients, *, penalty, baseline=0.0, weights=None) -> float:
    """Objective of :func:`deconvolve_ar` at a given calcium trace (spikes taken from it)."""
    y = np.asarray(y, dtype=np.float64)
    c = np.asarray(calcium, dtype=np.float64)
    g = np.asarray(coefficients, dtype=np.float64).ravel()
    y, w, unit, _ = prepare_weights(y, weights)
    s = c.copy()
    for i, gi in enumerate(g, start=1):
        s[i:] -= gi * c[:-i]
    r = y - baseline - c
    fit = 0.5 * float(np.dot(r, r) if unit else np.dot(w * r, r))
    return fit + float(penalty) * float(s.sum())


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
    lam = check_penalty(penalty)
    baseline = check_baseline(baseline)
    min_spike = check_nonnegative(min_spike, "min_spike")
    y, w, unit, _ = prepare_weights(y, weights)
    if g.size == 2 and g[1] == 0.0:
        g = g[:1]
    with reused_workspace(y.size) as work:
        # the outputs are fresh arrays; the rest of the scratch space is reused by the next call
        work.c = np.empty(y.size)
        work.s = np.empty(y.size)
        c, s, b, iterations, converged = solve(y, w, unit, g, lam, baseline, min_spike, work=work, copy=False)
        del work.c, work.s
    return ARDeconvolution(calcium=c, spikes=s, baseline=float(b), penalty=lam,
                           objective=float(objective(y, w, unit, lam, b, c, s)),
                           iterations=int(iterations), converged=bool(converged), coefficients=g.copy())
