r"""Non-negative deconvolution for any kernel, with a general convex solver.

This is the reference the fast AR solver (:mod:`calcium.infer.ar`) is tested
against, and the path for kernels an AR(1)/AR(2) recursion cannot express
(a slow decay component, a measured impulse response).  The problem is the
same non-negative sparse deconvolution model [1]_,

.. math::

    \min_{s \ge 0,\, b}\; \tfrac12 \sum_t w_t (y_t - b - c_t)^2 + \lambda \sum_t s_t,
    \qquad c = K s,

with :math:`K` the convolution with the kernel's impulse response, or its
noise-constrained form [2]_

.. math::

    \min_{s \ge 0,\, b}\; \sum_t s_t \quad\text{s.t.}\quad
    \sum_t w_t (y_t - b - c_t)^2 \le \sigma^2 N,

with :math:`N` the number of weighted frames.  It is handed to cvxpy [3]_
with the CLARABEL interior-point solver [4]_.

References
----------
.. [1] Vogelstein, J. T. et al. (2010). Fast nonnegative deconvolution for
   spike train inference from population calcium imaging. J. Neurophysiol.
   104, 3691-3704.
.. [2] Pnevmatikakis, E. A. et al. (2016). Simultaneous denoising,
   deconvolution, and demixing of calcium imaging data. Neuron 89, 285-299.
.. [3] Diamond, S. & Boyd, S. (2016). CVXPY: A Python-embedded modeling
   language for convex optimization. J. Mach. Learn. Res. 17(83), 1-5.
.. [4] Goulart, P. J. & Chen, Y. (2024). Clarabel: An interior-point solver for
   conic programs with quadratic objectives. arXiv:2405.12762.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy  # scipy.sparse loads on first use (the AR path never needs it)

from .._checks import as_traces, check_frame_rate, check_positive
from ._driver import check_baseline, check_penalty, prepare_weights
from .ar import check_ar_coefficients

__all__ = ["ConvexDeconvolution", "deconvolve_convex", "kernel_operator"]

# Interior-point tolerances: tight enough that the optimum agrees with the
# exact AR solver to ~1e-9 relative, loose enough that CLARABEL converges.
_TIGHT = dict(tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10, max_iter=400)
# An impulse response is cut where it has fallen below this fraction of its peak.
_CUT = 1e-12


@dataclass(frozen=True)
class ConvexDeconvolution:
    """Result of :func:`deconvolve_convex`.

    Attributes
    ----------
    calcium : ndarray, shape (T,)
        Fitted calcium :math:`c = K s` (trace units, baseline removed).
    spikes : ndarray, shape (T,)
        Spikes :math:`s \\ge 0` (rounding-level negatives set to 0).
    baseline : float
        Given or fitted baseline.
    penalty : float
        :math:`\\lambda`; for the noise-constrained form the equivalent
        penalty :math:`1/(2\\mu)` from the constraint's multiplier
        :math:`\\mu` (the penalised problem with this value has the same
        solution).
    objective : float
        ½ Σ w (y − b − c)² + penalty · Σ s at the solution.
    status : str
        Solver status reported by cvxpy.
    converged : bool
        True when the solver reported an optimal solution.
    noise_constrained : bool
        True for the noise-constrained form.
    """

    calcium: np.ndarray
    spikes: np.ndarray
    baseline: float
    penalty: float
    objective: float
    status: str
    converged: bool
    noise_constrained: bool


def _rational_form(h: np.ndarray, max_order: int = 4):
    """Exact ARMA form (den, num) of an impulse response that is a sum of <= 4 exponentials.

    Returns None if no low-order recursion reproduces ``h`` to rounding.
    """
    n = h.size
    scale = np.max(np.abs(h))
    for p in range(1, max_order + 1):
        if n < 3 * p + 4:
            break
        # h[k] = sum_i a_i h[k-i] for k >= p (least squares on the whole response)
        rows = np.column_stack([h[p - i:n - i] for i in range(1, p + 1)])
        a, *_ = np.linalg.lstsq(rows, h[p:], rcond=None)
        if np.max(np.abs(rows @ a - h[p:])) <= 1e-10 * scale:
            den = np.concatenate([[1.0], -a])
            num = np.convolve(den, h)[:p]  # exact numerator for the first p samples
            if np.max(np.abs(np.roots(den))) < 1.0:
                return den, num
    return None


def kernel_operator(kernel_or_impulse_response, n_frames: int, frame_rate=None):
    """Describe the convolution ``c = K s`` for cvxpy.

    Returns ``("ar", den, num)`` when the kernel obeys a short recursion
    ``den * c = num * s`` (exact for AR coefficients and for every
    :class:`~calcium.kernel.Kernel`, a sum of exponentials), otherwise
    ``("matrix", K)`` with ``K`` a sparse lower-triangular Toeplitz matrix of
    the impulse response (cut where it falls below 1e-12 of its peak).
    """
    from ..kernel import Kernel

    if isinstance(kernel_or_impulse_response, Kernel):
        if frame_rate is None:
            raise ValueError("frame_rate is needed to sample a Kernel")
        frame_rate = check_frame_rate(frame_rate)
        kernel = kernel_or_impulse_response
        # sample long enough to cover the slowest decay down to the cut
        slowest = max(tau for _, tau in kernel.exponential_terms())
        length = int(min(n_frames, math.ceil(-math.log(_CUT) * slowest * frame_rate) + 2))
        h = kernel.impulse_response(frame_rate, max(length, 8))[:max(length, 8)]
    else:
        arr = np.asarray(kernel_or_impulse_response, dtype=np.float64).ravel()
        if arr.size in (1, 2):
            g = check_ar_coefficients(arr, "kernel_or_impulse_response (AR coefficients)")
            return "ar", np.concatenate([[1.0], -g]), np.array([1.0])
        if arr.size < 3 or not np.all(np.isfinite(arr)):
            raise ValueError("kernel_or_impulse_response must be a Kernel, 1-2 AR coefficients or an impulse "
                             f"response of >= 3 finite samples; got {kernel_or_impulse_response!r}")
        h = arr
    if not np.any(h):
        raise ValueError("the impulse response is all zeros")
    peak = np.max(np.abs(h))
    # the recursion continues the response for ever: use it only where the given response does not end early
    whole = h.size >= n_frames or abs(h[-1]) <= _CUT * peak
    form = _rational_form(h) if h.size >= 10 and whole else None
    if form is not None:
        den, num = form
        return "ar", den, num
    keep = np.flatnonzero(np.abs(h) > _CUT * peak)
    h = h[:min(keep[-1] + 1, n_frames)]
    diags = [np.full(n_frames - k, h[k]) for k in range(h.size) if h[k] != 0.0]
    offsets = [-k for k in range(h.size) if h[k] != 0.0]
    return "matrix", scipy.sparse.diags(diags, offsets, shape=(n_frames, n_frames), format="csc")


def _banded(coeffs: np.ndarray, n: int) -> "scipy.sparse.csc_matrix":
    """Lower-triangular banded Toeplitz matrix with first column ``coeffs``."""
    coeffs = coeffs[:n]
    return scipy.sparse.diags([np.full(n - k, coeffs[k]) for k in range(coeffs.size)], [-k for k in range(coeffs.size)],
                    shape=(n, n), format="csc")


def deconvolve_convex(y, kernel_or_impulse_response, *, frame_rate=None, penalty=None, noise_sd=None,
                      baseline=0.0, weights=None) -> ConvexDeconvolution:
    r"""Non-negative deconvolution with any kernel, solved by cvxpy (CLARABEL).

    Parameters
    ----------
    y : array_like, shape (T,)
        The trace, T >= 3; NaN/inf frames are missing (weight 0).
    kernel_or_impulse_response : Kernel or array_like
        A :class:`~calcium.kernel.Kernel` (needs ``frame_rate``; its linear
        part is used), 1 or 2 AR coefficients (``[g]`` or ``[g1, g2]``; the
        same model as :func:`~calcium.infer.ar.deconvolve_ar`, impulse
        response 1 at the spike frame), or an impulse response of >= 3
        samples (sample 0 at the spike's frame).
    frame_rate : float, optional
        Sampling rate in Hz; needed for a Kernel.
    penalty : float, optional
        :math:`\lambda \ge 0` for the penalised form.
    noise_sd : float, optional
        :math:`\sigma > 0` for the noise-constrained form (used when
        ``penalty`` is None).
    baseline : float or "fit", default 0.0
    weights : array_like, optional
        Frame weights >= 0 (default 1 for finite frames, 0 for NaN/inf).

    Returns
    -------
    ConvexDeconvolution

    Raises
    ------
    ValueError
        For bad arguments, or neither/both of ``penalty`` and ``noise_sd``.

    Notes
    -----
    A kernel that is a sum of exponentials obeys a short recursion
    :math:`\sum_i a_i c_{t-i} = \sum_j n_j s_{t-j}` (an ARMA form, found and
    checked to rounding by least squares on the impulse response), so the
    problem keeps a sparse, banded constraint.  Other impulse responses use
    a sparse Toeplitz matrix.  The spikes at frames before the first frame
    are taken to be zero, as in the AR solver.

    References
    ----------
    .. [1] Vogelstein, J. T. et al. (2010). J. Neurophysiol. 104, 3691-3704.
    .. [2] Pnevmatikakis, E. A. et al. (2016). Neuron 89, 285-299.
    .. [3] Diamond, S. & Boyd, S. (2016). J. Mach. Learn. Res. 17(83), 1-5.

    Examples
    --------
    >>> import numpy as np
    >>> y = np.zeros(30); y[5:] = 0.9 ** np.arange(25)
    >>> result = deconvolve_convex(y, [0.9], penalty=1e-6)
    >>> int(np.argmax(result.spikes)), round(float(result.spikes.max()), 3)
    (5, 1.0)
    """
    import cvxpy as cp

    y = as_traces(y, "y")
    if y.ndim != 1:
        raise ValueError(f"y must be one trace of shape (frames,), got shape {y.shape}")
    if y.size < 3:
        raise ValueError(f"y must have at least 3 frames, got {y.size}")
    if frame_rate is not None:
        frame_rate = check_frame_rate(frame_rate)
    if penalty is None and noise_sd is None:
        raise ValueError("give penalty (penalised form) or noise_sd (noise-constrained form)")
    if penalty is not None and noise_sd is not None:
        raise ValueError("give only one of penalty and noise_sd")
    lam = check_penalty(penalty) if penalty is not None else None
    sigma = check_positive(noise_sd, "noise_sd") if noise_sd is not None else None
    baseline = check_baseline(baseline)
    y, w, unit, n_obs = prepare_weights(y, weights)
    T = y.size
    if unit:
        w = np.ones(T)
    form = kernel_operator(kernel_or_impulse_response, T, frame_rate)

    s = cp.Variable(T, nonneg=True)
    constraints = []
    if form[0] == "ar":
        _, den, num = form
        c = cp.Variable(T)
        constraints.append(_banded(den, T) @ c == (_banded(num, T) @ s if num.size > 1 or num[0] != 1.0 else s))
    else:
        c = form[1] @ s
    b = cp.Variable() if baseline == "fit" else baseline
    observed = w > 0
    sqrt_w = np.sqrt(w[observed])
    resid = cp.multiply(sqrt_w, y[observed] - b - c[observed]) if not observed.all() else \
        cp.multiply(sqrt_w, y - b - c)
    if lam is not None:
        objective = cp.Minimize(0.5 * cp.sum_squares(resid) + lam * cp.sum(s))
    else:
        budget = cp.Constant(sigma ** 2 * n_obs)
        noise_con = cp.sum_squares(resid) <= budget
        constraints.append(noise_con)
        objective = cp.Minimize(cp.sum(s))
    problem = cp.Problem(objective, constraints)
    status = _solve(problem, cp)
    s_val = np.asarray(s.value, dtype=np.float64) if s.value is not None else np.full(T, np.nan)
    c_val = np.asarray(c.value, dtype=np.float64).ravel() if c.value is not None else np.full(T, np.nan)
    b_val = float(b.value) if baseline == "fit" and b.value is not None else \
        (float(baseline) if baseline != "fit" else float("nan"))
    if lam is None:
        mult = noise_con.dual_value
        mult = float(np.ravel(mult)[0]) if mult is not None else None
        # d/d(budget): min sum s + mu (|r|^2 - budget)  <=>  penalised with lambda = 1 / (2 mu)
        lam = float(1.0 / (2.0 * mult)) if mult is not None and mult > 0 else float("inf")
    r = y - b_val - c_val
    fit = 0.5 * float(np.sum(w * r * r))
    total = float(np.sum(s_val))
    obj = fit + (lam * total if np.isfinite(lam) else 0.0)
    return ConvexDeconvolution(calcium=c_val, spikes=np.maximum(s_val, 0.0), baseline=b_val, penalty=float(lam),
                               objective=float(obj), status=str(status), converged=status == "optimal",
                               noise_constrained=noise_sd is not None and penalty is None)


def _solve(problem, cp) -> str:
    try:
        problem.solve(solver=cp.CLARABEL, **_TIGHT)
    except cp.error.SolverError:
        problem.solve(solver=cp.CLARABEL)  # default tolerances if the tight ones fail
    if problem.status not in ("optimal",):
        try:
            problem.solve(solver=cp.CLARABEL)
        except cp.error.SolverError:
            pass
    return problem.status
