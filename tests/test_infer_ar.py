"""Tests of the exact AR(1)/AR(2) deconvolution (calcium.infer.ar).

References used below:
- cvxpy with the CLARABEL solver (general convex QP solver) for the optimum;
- the Karush-Kuhn-Tucker conditions of a convex QP with bound constraints
  (Boyd & Vandenberghe 2004, Convex Optimization, section 5.5.3);
- scipy.signal.lfilter for the AR recursion c_t = s_t + sum_i g_i c_{t-i};
- Friedrich, Zhou & Paninski (2017), PLoS Comput. Biol. 13(3) e1005423 for
  the hard-threshold variant (every non-zero spike >= s_min).
"""
import cvxpy as cp
import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings, strategies as st

from calcium.infer._reference import deconvolve_ar_reference
from calcium.infer.ar import ar_objective, deconvolve_ar


def ar_calcium(spikes, g):
    """c = AR filter of s (reference: scipy.signal.lfilter)."""
    return scipy.signal.lfilter([1.0], np.concatenate([[1.0], -np.asarray(g)]), spikes)


def random_problem(seed, order, T=None):
    rng = np.random.default_rng(seed)
    T = T or int(rng.integers(150, 300))
    if order == 1:
        g = [float(rng.uniform(0.6, 0.97))]
    else:
        d, r = rng.uniform(0.8, 0.97), rng.uniform(0.1, 0.6)
        g = [d + r, -d * r]
    spikes = (rng.random(T) < 0.04) * rng.exponential(1.0, T)
    y = 0.2 + ar_calcium(spikes, g) + rng.normal(0, 0.15, T)
    return rng, y, g


def cvxpy_solution(y, g, penalty, baseline, weights):
    """The same problem written directly in cvxpy and solved by CLARABEL."""
    T = y.size
    c = cp.Variable(T)
    s = c - g[0] * cp.hstack([0.0, c[:-1]])
    if len(g) == 2:
        s = s - g[1] * cp.hstack([0.0, 0.0, c[:-2]])
    b = cp.Variable() if baseline == "fit" else baseline
    w = np.ones(T) if weights is None else weights
    objective = 0.5 * cp.sum(cp.multiply(w, cp.square(y - b - c))) + penalty * cp.sum(s)
    problem = cp.Problem(cp.Minimize(objective), [s >= 0])
    problem.solve(solver=cp.CLARABEL, tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10)
    assert problem.status == "optimal"
    return np.asarray(c.value), (float(b.value) if baseline == "fit" else baseline), float(problem.value)


CASES = [(order, weighted, baseline) for order in (1, 2) for weighted in (False, True) for baseline in (0.2, "fit")]


@pytest.mark.parametrize("order,weighted,baseline", CASES)
def test_fast_solver_reaches_the_cvxpy_optimum(order, weighted, baseline):
    # reference: cvxpy + CLARABEL on the identical problem
    for seed in range(2):
        rng, y, g = random_problem(100 * order + 10 * weighted + seed, order)
        weights = None
        if weighted:
            weights = rng.uniform(0.3, 2.0, y.size)
            weights[rng.random(y.size) < 0.08] = 0.0
        penalty = float(rng.uniform(0.05, 0.8))
        result = deconvolve_ar(y, g, penalty=penalty, baseline=baseline, weights=weights)
        c_ref, b_ref, value = cvxpy_solution(y, g, penalty, baseline, weights)
        assert result.converged
        assert abs(result.objective - value) <= 1e-7 * abs(value)
        assert np.max(np.abs(result.calcium - c_ref)) <= 1e-5
        assert abs(result.baseline - b_ref) <= 1e-5


@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("baseline", [0.2, "fit"])
def test_leading_frames_of_weight_zero_still_give_the_cvxpy_optimum(order, baseline):
    # reference: cvxpy + CLARABEL on the identical problem; the first pool then has no weight at all (A = 0)
    rng, y, g = random_problem(70 + order, order, T=120)
    y[3:8] -= 0.6  # the first weighted frames lie below the baseline: no spike may start there
    weights = rng.uniform(0.3, 2.0, y.size)
    weights[:3] = 0.0
    result = deconvolve_ar(y, g, penalty=0.4, baseline=baseline, weights=weights)
    _, _, value = cvxpy_solution(y, g, 0.4, baseline, weights)
    assert result.converged
    assert abs(result.objective - value) <= 1e-7 * abs(value)


@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("baseline", [0.2, "fit"])
def test_kkt_conditions_hold_at_the_solution(order, baseline):
    # reference: KKT conditions (Boyd & Vandenberghe 2004, 5.5.3) for
    # min 1/2 |W^1/2 (y - b - K s)|^2 + lam 1's, s >= 0:
    #   grad_t = lam - [K' W (y - b - K s)]_t >= 0, s_t >= 0, s_t grad_t = 0, (free b) sum W r = 0
    rng, y, g = random_problem(7 + order, order, T=200)
    weights = rng.uniform(0.5, 1.5, y.size)
    lam = 0.3
    result = deconvolve_ar(y, g, penalty=lam, baseline=baseline, weights=weights)
    T = y.size
    K = np.column_stack([ar_calcium(np.eye(T)[j], g) for j in range(T)])  # dense convolution matrix
    np.testing.assert_allclose(K @ result.spikes, result.calcium, atol=1e-9)
    r = y - result.baseline - result.calcium
    grad = lam - K.T @ (weights * r)
    scale = lam + np.abs(K.T @ (weights * y)).max()
    assert np.all(result.spikes >= 0)
    assert grad.min() >= -1e-8 * scale
    assert np.max(np.abs(grad[result.spikes > 0])) <= 1e-8 * scale
    if baseline == "fit":
        assert abs(np.sum(weights * r)) <= 1e-8 * np.sum(weights * np.abs(y))


@pytest.mark.parametrize("order", [1, 2])
@pytest.mark.parametrize("baseline", [0.0, "fit"])
@pytest.mark.parametrize("min_spike", [0.0, 0.4])
@pytest.mark.parametrize("weighted", [True, False])
def test_plain_python_reference_agrees_with_numba(order, baseline, min_spike, weighted):
    # reference: the same algorithm written in plain Python (calcium.infer._reference.deconvolve_ar_reference); unit
    # weights take the numba kernels' unit-weight paths (pool sums from tables, a specialised AR(2) pass)
    rng, y, g = random_problem(40 + order, order, T=70)
    weights = None
    if weighted:
        weights = rng.uniform(0.5, 1.5, y.size)
        weights[[10, 33]] = 0.0
    fast = deconvolve_ar(y, g, penalty=0.25, baseline=baseline, weights=weights, min_spike=min_spike)
    c, s, b = deconvolve_ar_reference(y, g, penalty=0.25, baseline=baseline, weights=weights, min_spike=min_spike)
    np.testing.assert_allclose(fast.calcium, c, atol=1e-9)
    np.testing.assert_allclose(fast.spikes, s, atol=1e-9)
    assert abs(fast.baseline - b) <= 1e-9


@pytest.mark.parametrize("g", [[0.9], [1.5, -0.56]])
def test_noiseless_isolated_spike_is_recovered_exactly_as_penalty_goes_to_zero(g):
    # reference: the forward AR model (lfilter) of one spike of size 1.7 at frame 20
    spikes = np.zeros(120)
    spikes[20] = 1.7
    y = ar_calcium(spikes, g)
    for penalty in (1e-6, 1e-9):
        result = deconvolve_ar(y, g, penalty=penalty)
        np.testing.assert_allclose(result.spikes, spikes, atol=1e-4 * penalty / 1e-6 + 1e-12)
        np.testing.assert_allclose(result.calcium, y, atol=1e-4 * penalty / 1e-6 + 1e-12)


@pytest.mark.parametrize("g", [[0.9], [1.5, -0.56]])
def test_zero_input_gives_zero_output(g):
    # reference: c = 0 satisfies the KKT conditions of a zero trace for any penalty >= 0 (worked by hand)
    for penalty in (0.0, 1.0):
        result = deconvolve_ar(np.zeros(50), g, penalty=penalty)
        assert np.all(result.spikes == 0) and np.all(result.calcium == 0)
        assert result.objective == 0.0


@settings(max_examples=6, deadline=None)
@given(k=st.floats(0.1, 20.0), seed=st.integers(0, 1000), order=st.sampled_from([1, 2]))
def test_scaling_trace_and_penalty_scales_the_solution(k, seed, order):
    # reference: homogeneity of the problem (worked by hand): (k y, k lam) -> (k c, k s, k b)
    _, y, g = random_problem(seed, order, T=120)
    a = deconvolve_ar(y, g, penalty=0.3, baseline="fit")
    b = deconvolve_ar(k * y, g, penalty=0.3 * k, baseline="fit")
    np.testing.assert_allclose(b.calcium, k * a.calcium, atol=1e-8 * k * np.abs(y).max())
    assert abs(b.baseline - k * a.baseline) <= 1e-8 * k * np.abs(y).max()


def test_missing_frames_cost_nothing_and_equal_zero_weights():
    # reference: definition of the weighted objective (a weight-0 frame does not enter it)
    _, y, g = random_problem(5, 2, T=150)
    y_nan = y.copy()
    y_nan[[30, 31, 90]] = np.nan
    weights = np.ones(y.size)
    weights[[30, 31, 90]] = 0.0
    a = deconvolve_ar(y_nan, g, penalty=0.2, baseline="fit")
    y_other = y.copy()
    y_other[[30, 31, 90]] = 1e3  # any value: it is not looked at
    b = deconvolve_ar(y_other, g, penalty=0.2, baseline="fit", weights=weights)
    np.testing.assert_allclose(a.calcium, b.calcium, atol=1e-10)
    assert abs(a.objective - b.objective) <= 1e-10 * abs(a.objective)
    assert abs(a.objective - ar_objective(y_nan, a.calcium, g, penalty=0.2, baseline=a.baseline)) <= 1e-9


@pytest.mark.parametrize("g", [[0.92], [1.6, -0.63]])
def test_hard_threshold_variant_has_no_spike_below_the_threshold(g):
    # reference: Friedrich et al. (2017): with s_min, every non-zero spike is >= s_min
    _, y, _ = random_problem(11, len(g), T=250)
    result = deconvolve_ar(y, g, penalty=0.0, baseline="fit", min_spike=0.5)
    nonzero = result.spikes[1:][result.spikes[1:] > 0]
    assert nonzero.size > 0 and nonzero.min() >= 0.5 - 1e-12
    np.testing.assert_allclose(ar_calcium(result.spikes, g), result.calcium, atol=1e-9)


def test_a_call_does_not_depend_on_the_calls_before_it():
    # reference: determinism (common practice): scratch space reused between calls must not carry anything over
    _, y1, g = random_problem(61, 2, T=300)
    _, y2, _ = random_problem(62, 2, T=300)
    fresh = deconvolve_ar(y2, g, penalty=0.3, baseline="fit")
    deconvolve_ar(y1, g, penalty=0.1, baseline=0.0)
    again = deconvolve_ar(y2, g, penalty=0.3, baseline="fit")
    np.testing.assert_array_equal(fresh.calcium, again.calcium)
    np.testing.assert_array_equal(fresh.spikes, again.spikes)
    assert fresh.baseline == again.baseline and fresh.objective == again.objective


@pytest.mark.parametrize("coefficients", [[1.0], [1.2], [-1.0], [1.0, 0.1], [2.0, -1.0], [0.5, 0.6], [np.nan]])
def test_coefficients_with_a_root_on_or_outside_the_unit_circle_are_rejected(coefficients):
    # reference: stability of an AR recursion (roots of z^p - g1 z^{p-1} - ... inside the unit circle)
    with pytest.raises(ValueError, match="coefficients"):
        deconvolve_ar(np.zeros(10), coefficients, penalty=0.1)


def test_bad_arguments_raise_value_errors():
    y = np.ones(10)
    with pytest.raises(ValueError, match="penalty"):
        deconvolve_ar(y, [0.9], penalty=-1.0)
    with pytest.raises(ValueError, match="weights"):
        deconvolve_ar(y, [0.9], penalty=1.0, weights=np.ones(9))
    with pytest.raises(ValueError, match="at least 3"):
        deconvolve_ar(np.ones(2), [0.9], penalty=1.0)
    with pytest.raises(ValueError, match="baseline"):
        deconvolve_ar(y, [0.9], penalty=1.0, baseline="median")
    with pytest.raises(ValueError, match="no frame"):
        deconvolve_ar(np.full(10, np.nan), [0.9], penalty=1.0)
    with pytest.raises(ValueError, match="3 real|1 or 2"):
        deconvolve_ar(y, [0.5, 0.1, 0.1], penalty=1.0)


@pytest.mark.parametrize("g", [(1.7, -0.72), (0.9, 0.0), (1.2, -0.3)])
def test_kernel_tables_of_a_longer_trace_from_a_shorter_one(g):
    # Reference: the AR(2) impulse response h_k = g1 h_{k-1} + g2 h_{k-2} (Box & Jenkins 1976) written out in
    # plain Python, and its prefix sums of h_k^2 with numpy; the tables for 36000 frames taken from those of
    # an 8192-frame block (the kernel has decayed to 0 within it) must equal the ones computed afresh.
    from calcium.infer import _response

    g1, g2 = g
    saved = dict(_response._CACHE)
    try:
        _response._CACHE.clear()
        _response.response_for(g1, g2, 8192)
        _, _, h, n_nonzero, tab = _response.response_for(g1, g2, 36000)
        _response._CACHE.clear()
        _, _, h_new, n_new, tab_new = _response.response_for(g1, g2, 36000)
    finally:
        _response._CACHE.clear()
        _response._CACHE.update(saved)
    assert n_nonzero == n_new < 8192
    assert h.shape == h_new.shape == (36001,) and not h.flags.writeable
    np.testing.assert_array_equal(h, h_new)
    np.testing.assert_array_equal(tab, tab_new)
    plain = [1.0, g1]
    for _ in range(200):
        plain.append(g1 * plain[-1] + g2 * plain[-2])
    np.testing.assert_allclose(h[:202], plain, rtol=1e-12, atol=0)
    np.testing.assert_allclose(tab[0, 1:203], np.cumsum(np.square(plain)), rtol=1e-12)
    assert np.all(h[n_nonzero:] == 0.0)
