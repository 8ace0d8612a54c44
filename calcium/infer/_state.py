"""The structured state the compiled kernels of the exact AR solver share, and their shared constants.

The kernels of :mod:`calcium.infer.ar` are spread over rooms by role:

``_response``  the AR impulse response and its prefix tables (cached per coefficients and length)
``_passes``    the pool passes (a first support in one sweep; exact on their own for AR(1))
``_support``   the exact solve on a support: pool sums, the backward recursion, the calcium of the pools,
               the penalty that matches a residual, the projection used by the kinetics estimate
``_repair``    the optimality check and repair: KKT check, block principal pivoting, the active-set fallback
``_driver``    the Python driver (:func:`solve`), the reusable workspace and the named interface the other
               modules of ``calcium.infer`` use (nothing else of these rooms is imported outside them)
``_reference`` the plain-Python references: of the whole solver, and of every other compiled kernel of
               ``calcium.infer`` (``name_reference``; tests/test_infer_references.py keeps the registry)

Instead of long lists of positional arrays the kernels pass a few named tuples (numba compiles them to
structures; a field is read as ``scratch.calcium``):

- :class:`Response`: the coefficients, the impulse response and its prefix tables (read-only);
- :class:`Trace`: the prepared trace, its weights, and what the support solves read from it;
- :class:`Scratch`: every array the kernels of one trace write into, grouped into :class:`Pools` (per-pool
  arrays of a support solve), a stack (the pools of a pass, one row per quantity) and :class:`Violations`
  (the frames that break the optimality conditions);
- :class:`Limits`: tolerances, the frames allowed a spike and the pivoting budget;
- :class:`Match`: a residual target the penalty follows (the noise-matched penalty).

The hot loops of the passes read rows of one 2-D array rather than fields of a tuple, and their helpers
take their arrays last: handed a tuple of arrays (or, measured, arrays first) numba kept reference counting
calls in the loop, which cost the AR(2) pass up to a factor of ten.

Scalars that change as a solve goes on (the penalty, the baseline, the number of pools ``n`` and whether
frame 0 carries a spike, ``free0``) stay plain arguments and return values.

numba's on-disk cache is keyed by the source file of the function compiled, not by the files it calls into,
and its index names the classes of these tuples: after editing a kernel or a constant used from another of
these files, or renaming one of the classes below, delete ``calcium/infer/__pycache__/*.nb[ic]`` (a stale
index that names a class no longer there fails to load with an AttributeError; a fresh clone, as in CI, has
no cache).
"""
from __future__ import annotations

from typing import NamedTuple

import numpy as np

# Values below this are set to 0 in the decaying recursions: far below any meaningful calcium level, and it
# keeps the arithmetic out of the (very slow) subnormal range.
FLUSH = 1e-150
# Kernels that only accumulate sums or run a linear recursion may fuse a multiply and an add into one
# rounding (FMA): that changes results by about one unit in the last place, far inside the 1e-11
# tolerances of the optimality check.  Nothing else is relaxed.
FMA = {"contract"}
# Relative tolerances of the optimality check (scaled by the data; see Workspace.tolerance_parts).
TOL_SPIKE = 1e-11
TOL_GRADIENT = 1e-11
MAX_PIVOTS = 500
# Rounds of the exact finish during which a noise-matched penalty follows the support (see
# _repair.exact_finish); then it is held, and the pivoting's own rule against cycling applies.
MATCH_ROUNDS = 20
# Outcomes of the support solve.
OK, SINGULAR_POOL, NO_BASELINE = 0, 1, 2
# Rows of Pools.sums (see _support.pool_sums).
A, B, C, DY, EY, DP, EP, H, F, SW, SWY = range(11)
N_SUMS = 11
# Rows of Scratch.stack, the pools below the top one during a pass (see _passes): their sums (AR(2): A ... E;
# AR(1): A, D), the calcium at their last frame and the one before, their value v and start value p; AR(1): g to
# their length and the value the next pool must reach.
(STACK_A, STACK_B, STACK_C, STACK_D, STACK_E, STACK_END, STACK_BEFORE_END, STACK_VALUE, STACK_START_VALUE,
 STACK_DECAY, STACK_BAR) = range(11)
N_STACK = 11


class Response(NamedTuple):
    """The AR model :math:`c_t = g_1 c_{t-1} + g_2 c_{t-2} + s_t` as the kernels use it (read-only)."""

    g1: float
    g2: float
    #: impulse response h_0, h_1, ... (at least T + 1 entries), exactly 0 once it has decayed below FLUSH
    h: np.ndarray
    #: number of leading entries of ``h`` that can be non-zero
    n_nonzero: int
    #: (5, L + 1) prefix sums over k < L of h_k^2, h_k f_k, f_k^2, h_k, f_k with f_k = g2 h_{k-1}
    tables: np.ndarray


class Trace(NamedTuple):
    """A prepared trace as the support solves read it."""

    y: np.ndarray  #: the trace, missing frames set to 0
    w: np.ndarray  #: frame weights (not read when ``unit``)
    unit: bool  #: every weight is 1
    level: float  #: the level the pool sums are taken from (fixed baseline, or the weighted mean)
    #: (unit weights) z_t = sum_{tau >= t} h_{tau - t} (y_tau - level), T + 2 entries
    filtered: np.ndarray
    #: (unit weights) tail sums of y - level, T + 1 entries
    tail: np.ndarray


class Pools(NamedTuple):
    """Per-pool arrays of a support solve (index i < number of pools)."""

    sums: np.ndarray  #: (N_SUMS, pools): the quadratic cost of each pool (rows A ... SWY)
    recursion: np.ndarray  #: (4, pools): 1 / Mvv, Mvp, Mvb and l_v of the backward recursion
    value: np.ndarray  #: v, the pool's first calcium value
    start_value: np.ndarray  #: p, the calcium just before the pool
    value_slope: np.ndarray  #: dv / d(penalty) of an affine solve (negated)
    start_value_slope: np.ndarray  #: dp / d(penalty) of an affine solve (negated)


class Violations(NamedTuple):
    """Frames that break the optimality conditions, in decreasing frame order, and the pivoting's toggles."""

    frames: np.ndarray
    on_support: np.ndarray  #: True: a negative spike on the support; False: a frame that wants a spike
    gradient: np.ndarray
    toggles: np.ndarray


class Scratch(NamedTuple):
    """Every array the kernels of one trace write into (T entries each)."""

    calcium: np.ndarray
    spikes: np.ndarray
    gradient: np.ndarray  #: the active-set fallback's gradient
    starts: np.ndarray  #: pool starts of the current support (frame 0 first)
    other_starts: np.ndarray  #: the pivoting writes the next support here, then the two are swapped
    pools: Pools
    stack: np.ndarray  #: (N_STACK, T): the pools of a pass (rows STACK_A ... STACK_BAR)
    violations: Violations
    trial_calcium: np.ndarray  #: the active-set fallback's trial point and previous spikes
    trial_spikes: np.ndarray
    old_spikes: np.ndarray


class Limits(NamedTuple):
    """Tolerances and restrictions of the optimality check and its repair."""

    spike_tol: float  #: a spike on the support below -spike_tol is a violation
    gradient_base: float  #: gradient tolerance = TOL_GRADIENT * (penalty + gradient_base)
    tiny: float  #: smallest pivot of the support solve
    allowed: np.ndarray  #: frames that may carry a spike (read when ``use_allowed``)
    use_allowed: bool
    max_pivots: int


class Match(NamedTuple):
    """A residual the penalty is moved to meet during the first ``rounds`` of the exact finish."""

    target: float  #: 0: the penalty is held
    syy: float  #: sum w (y - level)^2
    sy: float  #: sum w (y - level)
    rounds: int


NO_MATCH = Match(0.0, 0.0, 0.0, MATCH_ROUNDS)
