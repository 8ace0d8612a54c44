"""Tests of the general convex deconvolution (calcium.infer.convex).

References used below:
- cvxpy/CLARABEL is itself the solver; its answers are checked against the
  exact AR solver on AR problems and against the optimality conditions;
- scipy.signal.lfilter for a recursion's impulse response;
- Lagrange duality (Boyd & Vandenberghe 2004, section 5.2): the
  noise-constrained problem min sum s s.t. |r|^2 <= sigma^2 N has the
  solution of the penalised problem with lambda = 1 / (2 mu), mu the
  constraint's multiplier.
"""
import numpy as np
import pytest
import scipy.signal

from calcium.infer.ar import deconvolve_ar
from calcium.infer.convex import deconvolve_convex, kernel_operator
from calcium.kernel import Kernel


def simulated(T=200, seed=0, g=(0.9,)):
    rng = np.random.default_rng(seed)
    spikes = (rng.random(T) < 0.05) * rng.exponential(1.0, T)
    c = scipy.signal.lfilter([1.0], np.concatenate([[1.0], -np.asarray(g)]), spikes)
    return c + rng.normal(0, 0.15, T)


@pytest.mark.parametrize("g", [(0.9,), (1.55, -0.6)])
@pytest.mark.parametrize("baseline", [0.0, "fit"])
def test_convex_solver_agrees_with_the_exact_ar_solver(g, baseline):
    # reference: two independent solvers of the same problem (active-set pool pass vs interior point)
    y = simulated(g=g, seed=3)
    y[[20, 21]] = np.nan
    fast = deconvolve_ar(y, g, penalty=0.4, baseline=baseline)
    slow = deconvolve_convex(y, np.asarray(g), penalty=0.4, baseline=baseline)
    assert slow.converged
    assert abs(slow.objective - fast.objective) <= 1e-7 * abs(fast.objective)
    assert np.max(np.abs(slow.calcium - fast.calcium)) <= 1e-5


def test_noise_constrained_form_matches_the_penalised_form_at_the_dual_penalty():
    # reference: Lagrange duality (Boyd & Vandenberghe 2004, 5.2); residual on the constraint boundary
    y = simulated(seed=4)
    sigma = 0.15
    constrained = deconvolve_convex(y, [0.9], noise_sd=sigma, baseline="fit")
    assert constrained.noise_constrained and constrained.converged
    residual = np.sum((y - constrained.baseline - constrained.calcium) ** 2)
    assert residual == pytest.approx(sigma ** 2 * y.size, rel=1e-5)
    penalised = deconvolve_ar(y, [0.9], penalty=constrained.penalty, baseline="fit")
    assert np.max(np.abs(penalised.calcium - constrained.calcium)) <= 1e-4


def test_kernel_recursion_reproduces_the_sampled_kernel():
    # reference: Kernel.impulse_response (closed form) vs scipy.signal.lfilter of the found recursion
    kernel = Kernel(0.05, 0.5, 0.3, slow_decay_s=2.0, slow_fraction=0.25)
    kind, den, num = kernel_operator(kernel, 400, 30.0)
    assert kind == "ar" and den.size == 4  # three exponentials: third-order recursion
    impulse = np.zeros(400)
    impulse[0] = 1.0
    np.testing.assert_allclose(scipy.signal.lfilter(num, den, impulse), kernel.impulse_response(30.0, 400),
                               atol=1e-10 * kernel.amplitude)


def test_kernel_and_its_impulse_response_give_the_same_solution():
    # reference: the sparse-matrix path (impulse response array) and the recursion path (Kernel)
    kernel = Kernel(0.05, 0.4, 0.5, slow_decay_s=1.5, slow_fraction=0.3)
    y = simulated(T=150, seed=5)
    by_kernel = deconvolve_convex(y, kernel, frame_rate=30.0, penalty=0.2)
    h = kernel.impulse_response(30.0, y.size - 1)  # one sample short of the trace: the Toeplitz path is used
    assert kernel_operator(h, y.size)[0] == "matrix"
    by_array = deconvolve_convex(y, h, penalty=0.2)
    assert by_array.objective == pytest.approx(by_kernel.objective, rel=1e-6)
    np.testing.assert_allclose(by_array.calcium, by_kernel.calcium, atol=1e-5)


def test_truncated_impulse_response_is_used_as_given():
    # reference: c = K s with K the Toeplitz matrix of the given samples (checked with numpy.convolve)
    h = 0.8 ** np.arange(6)
    y = simulated(T=80, seed=6)
    result = deconvolve_convex(y, h, penalty=0.1)
    np.testing.assert_allclose(np.convolve(result.spikes, h)[:y.size], result.calcium, atol=1e-6)


def test_convex_arguments_are_checked():
    y = np.zeros(20)
    with pytest.raises(ValueError, match="penalty.*noise_sd"):
        deconvolve_convex(y, [0.9])
    with pytest.raises(ValueError, match="only one"):
        deconvolve_convex(y, [0.9], penalty=1.0, noise_sd=1.0)
    with pytest.raises(ValueError, match="frame_rate"):
        deconvolve_convex(y, Kernel(0.0, 0.5), penalty=1.0)
    with pytest.raises(ValueError, match="coefficients"):
        deconvolve_convex(y, [1.1], penalty=1.0)
    with pytest.raises(ValueError, match="noise_sd"):
        deconvolve_convex(y, [0.9], noise_sd=-1.0)
