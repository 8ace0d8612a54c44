"""Every compiled kernel of calcium.infer beside its plain reference: the registry, and each pair compared.

Convention: the plain-Python (numpy, scipy) reference of a compiled kernel ``name`` (or ``_name``) is
``calcium.infer._reference.name_reference``.  A kernel that is one step of a larger compiled algorithm
answers to that algorithm's reference; the steps of the exact AR solver (the pool passes, the solve on a
support, the optimality check and its repair) answer to ``deconvolve_ar_reference``, compared with the
solver here and, at length, in tests/test_infer_ar.py.

References used below: the plain references named in the registry, which are themselves written the
obvious way (scipy.signal.lfilter for AR recursions, numpy.linalg.lstsq for least squares,
scipy.optimize.isotonic_regression for pool-adjacent violators, numpy for sums and order statistics).
"""
import importlib
import math

import numpy as np
import pytest
import scipy.signal

from numba.core.dispatcher import Dispatcher

from calcium.infer import _reference as ref
from calcium.infer import _response, _repair, _state, _support, api, counts, estimate, quantal
from calcium.infer._driver import Workspace
from calcium.infer.ar import deconvolve_ar

SOLVER = "deconvolve_ar_reference"
SOLVER_STEPS = {
    "_passes": ["_ar1_merge_down", "_ar1_step", "_close_pass", "_merge_down", "_merge_into", "_store_top",
                "_top_value", "pass_ar1", "pass_ar2", "pass_ar2_unit"],
    "_support": ["at_penalty", "fill", "match_penalty", "pool_sums", "pools_solve"],
    "_repair": ["active_set", "check_optimality", "check_pools", "exact_finish", "pivot", "solve_on_support",
                "solve_pools", "spike_at", "starts_from_support"],
}
#: compiled kernel (module.name) -> its plain reference in calcium.infer._reference
REGISTRY = {
    "_response.impulse_and_length": "response_tables_reference",  # (the tables' first step)
    "_response.response_tables": "response_tables_reference",
    "_response.impulse_energy": "response_tables_reference",  # (their last prefix sum of h^2)
    "_response.frame_penalty": "frame_penalty_reference",
    "_support.backward_filter": "backward_filter_reference",
    "_support.objective": "objective_reference",
    "_support.pools_rss_quadratic": "pools_rss_quadratic_reference",
    "_support.project_out": "project_out_reference",
    "_repair.data_scale": "data_scale_reference",
    "api._shift_in_place": "shift_in_place_reference",
    "counts._event_bounds": "event_bounds_reference",
    "counts._place_spikes": "place_spikes_reference",
    "estimate._autocovariance": "autocovariance_reference",
    "estimate._autocovariance_observed": "autocovariance_reference",  # (its path without missing frames)
    "estimate._weighted_rss": "weighted_rss_reference",
    "estimate._level_stats": "level_stats_reference",
    "estimate._coefficient_derivative": "coefficient_derivative_reference",
    "quantal._pava_non_increasing": "pava_non_increasing_reference",
    "quantal._em_fit": "em_fit_reference",
    "quantal._profile": "profile_reference",
    **{f"{room}.{name}": SOLVER for room, names in SOLVER_STEPS.items() for name in names},
}
MODULES = ["_response", "_passes", "_support", "_repair", "_driver", "_state", "_reference", "ar", "api", "convex",
           "counts", "estimate", "quantal"]


def compiled_kernels():
    found = set()
    for room in MODULES:
        module = importlib.import_module(f"calcium.infer.{room}")
        found |= {f"{room}.{name}" for name, obj in vars(module).items()
                  if isinstance(obj, Dispatcher) and obj.py_func.__module__ == module.__name__}
    return found


def test_every_compiled_kernel_of_infer_is_in_the_registry():
    # reference: the registry above (a new kernel needs a plain reference, or the solver step it belongs to)
    found = compiled_kernels()
    assert found - set(REGISTRY) == set(), "compiled kernels without a registered reference"
    assert set(REGISTRY) - found == set(), "registered kernels that no longer exist"


@pytest.mark.parametrize("kernel", sorted(REGISTRY))
def test_each_reference_exists_and_follows_the_naming_convention(kernel):
    # reference: the convention in this module's docstring
    name = REGISTRY[kernel]
    assert callable(getattr(ref, name, None)), f"{name} is not in calcium.infer._reference"
    stems = {k.split(".")[1].lstrip("_") for k in REGISTRY} | {"deconvolve_ar", "response_tables"}
    assert name.endswith("_reference") and name[:-len("_reference")] in stems


# --------------------------------------------------------------------------- the AR model
COEFFICIENTS = [(0.9, 0.0), (1.7, -0.72), (1.2, -0.9), (1.9, -0.9025)]  # AR(1), real roots, complex, double


@pytest.mark.parametrize("g1, g2", COEFFICIENTS)
def test_impulse_response_and_its_tables_equal_the_plain_recursion(g1, g2):
    n = 3000
    h_ref, tables_ref = ref.response_tables_reference(g1, g2, n)
    h, n_nonzero = _response.impulse_and_length(g1, g2, n)
    # (the compiled response is set to 0 once it falls below 1e-150: the reference's are below that there)
    np.testing.assert_allclose(h[:n_nonzero], h_ref[:n_nonzero], rtol=1e-12, atol=1e-300)
    assert np.all(np.abs(h_ref[n_nonzero:]) < 1e-149) and np.all(h[n_nonzero:] == 0.0)
    length = min(n, n_nonzero + 1)
    tables = np.empty((5, length + 1))
    _response.response_tables(g2, h, n_nonzero, length, tables)
    np.testing.assert_allclose(tables, tables_ref[:, :length + 1], rtol=1e-12, atol=1e-12)
    assert _response.impulse_energy(g1, g2, n) == pytest.approx(tables_ref[0, -1], rel=1e-13)


@pytest.mark.parametrize("g1, g2", COEFFICIENTS)
def test_frame_penalty_factors_equal_the_reference(g1, g2):
    T = 7
    expected = ref.frame_penalty_reference(T, [g1, g2])
    assert [_response.frame_penalty(t, T, g1, g2) for t in range(T)] == pytest.approx(expected, rel=1e-15)


def test_backward_filter_equals_lfilter_over_the_reversed_trace():
    y = np.random.default_rng(1).normal(size=500)
    z, tail = np.empty(502), np.empty(501)
    top, energy = _support.backward_filter(y, 0.3, 1.7, -0.72, z, tail)
    z_ref, tail_ref, top_ref, energy_ref = ref.backward_filter_reference(y, 0.3, 1.7, -0.72)
    np.testing.assert_allclose(z, z_ref, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(tail, tail_ref, rtol=1e-10, atol=1e-10)
    assert (top, energy) == pytest.approx((top_ref, energy_ref), rel=1e-12)


@pytest.mark.parametrize("unit", [True, False])
def test_objective_and_data_scale_equal_numpy(unit):
    rng = np.random.default_rng(2)
    y, c, s = rng.normal(size=(3, 300))
    w = np.ones(0) if unit else rng.uniform(0.0, 2.0, 300) * (rng.random(300) > 0.1)
    assert _support.objective(y, w, unit, 0.7, 0.1, c, s) == pytest.approx(
        ref.objective_reference(y, w, unit, 0.7, 0.1, c, s), rel=1e-12)
    assert _repair.data_scale(y, w, unit) == pytest.approx(ref.data_scale_reference(y, w, unit), rel=1e-12)


# --------------------------------------------------------------------------- solves on a support
def test_the_residual_of_the_affine_pools_is_the_quadratic_the_reference_writes_out():
    rng = np.random.default_rng(4)
    n = 7
    pools = _state.Pools(rng.normal(size=(_state.N_SUMS, n)), np.empty((4, n)), *rng.normal(size=(4, n)))
    b0, b1, syy, sy = rng.normal(size=4)
    got = _support.pools_rss_quadratic(n, pools, b0, b1, syy, sy)
    assert got == pytest.approx(ref.pools_rss_quadratic_reference(n, pools, b0, b1, syy, sy), rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("weighted", [False, True])
def test_projection_removes_the_least_squares_fit_by_a_constant_and_the_pool_responses(weighted):
    rng = np.random.default_rng(3)
    T, (g1, g2) = 300, (1.6, -0.63)
    x = rng.normal(size=T)
    starts = np.array([0, 17, 40, 41, 120, 250])
    w = rng.uniform(0.2, 2.0, size=T) if weighted else np.ones(0)
    for free0 in (True, False):
        got = Workspace(T).project_out(x, w, not weighted, g1, g2, starts, free0, 1e-13)
        np.testing.assert_allclose(got, ref.project_out_reference(x, w, not weighted, g1, g2, starts, free0),
                                   atol=1e-10)


@pytest.mark.parametrize("order, baseline", [(1, "fit"), (2, 0.2), (2, "fit")])
def test_the_solver_and_its_steps_agree_with_the_plain_reference(order, baseline):
    # (at length, weights and the hard threshold included: tests/test_infer_ar.py)
    rng = np.random.default_rng(40 + order)
    g = [0.9] if order == 1 else [1.6, -0.63]
    y = 0.2 + scipy.signal.lfilter([1.0], np.concatenate([[1.0], -np.asarray(g)]),
                                   (rng.random(80) < 0.05) * rng.exponential(1.0, 80)) + rng.normal(0, 0.15, 80)
    fast = deconvolve_ar(y, g, penalty=0.25, baseline=baseline)
    c, s, b = ref.deconvolve_ar_reference(y, g, penalty=0.25, baseline=baseline)
    np.testing.assert_allclose(fast.calcium, c, atol=1e-9)
    np.testing.assert_allclose(fast.spikes, s, atol=1e-9)
    assert abs(fast.baseline - b) <= 1e-9


# --------------------------------------------------------------------------- kinetics, counts, sizes
@pytest.mark.parametrize("missing", [False, True])
@pytest.mark.parametrize("size", [7, 501, 4096])
def test_autocovariance_equals_the_mean_of_products_over_observed_pairs(missing, size):
    rng = np.random.default_rng(size)
    y = rng.normal(size=size).cumsum() * 0.1 + 2.0
    observed = rng.random(size) > 0.2 if missing else np.ones(size, dtype=bool)
    observed[0] = True
    expected = ref.autocovariance_reference(y, observed, 5)
    np.testing.assert_allclose(estimate._autocovariance(y, observed, 5), expected, rtol=1e-10, atol=1e-13)
    if not missing:  # (the path without missing frames, summed in any order)
        np.testing.assert_allclose(estimate._autocovariance_observed(y, 5), expected, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("unit", [True, False])
def test_residual_and_level_sums_equal_numpy(unit):
    rng = np.random.default_rng(5)
    y, c = rng.normal(size=(2, 250))
    w = np.ones(0) if unit else rng.uniform(0.0, 2.0, 250)
    assert estimate._weighted_rss(y, w, unit, 0.2, c) == pytest.approx(
        ref.weighted_rss_reference(y, w, unit, 0.2, c), rel=1e-12)
    assert estimate._level_stats(y, w, unit, 0.2) == pytest.approx(ref.level_stats_reference(y, w, unit, 0.2),
                                                                   rel=1e-12)


def test_coefficient_derivative_equals_lfilter():
    c = np.random.default_rng(6).normal(size=300)
    u = np.empty(300)
    estimate._coefficient_derivative(c, 1.6, -0.63, u)
    np.testing.assert_allclose(u, ref.coefficient_derivative_reference(c, 1.6, -0.63), rtol=1e-10, atol=1e-10)


def test_shift_equals_the_reference():
    x = np.arange(10.0)
    for lag in (0, 3, 10, 12):
        got = x.copy()
        api._shift_in_place(got, lag)
        np.testing.assert_array_equal(got, ref.shift_in_place_reference(x, lag))


@pytest.mark.parametrize("seed", range(4))
def test_events_and_spike_positions_equal_the_references(seed):
    rng = np.random.default_rng(seed)
    activity = np.where(rng.random(300) < 0.15, rng.exponential(0.8, 300), 0.0)
    for gap in (0, 1, 3):
        starts, stops, totals = np.empty(300, np.int64), np.empty(300, np.int64), np.empty(300)
        n = counts._event_bounds(activity, gap, starts, stops, totals)
        ref_starts, ref_stops, ref_totals = ref.event_bounds_reference(activity, gap)
        np.testing.assert_array_equal(starts[:n], ref_starts)
        np.testing.assert_array_equal(stops[:n], ref_stops)
        np.testing.assert_allclose(totals[:n], ref_totals, rtol=1e-12)
        for threshold in (0.3, 0.5, 1.2):
            np.testing.assert_allclose(counts._place_spikes(activity, gap, threshold),
                                       ref.place_spikes_reference(activity, gap, threshold), rtol=1e-12,
                                       atol=1e-12)


def test_pool_adjacent_violators_equal_scipy():
    values = np.random.default_rng(7).normal(size=40).cumsum()
    out = np.empty(40)
    quantal._pava_non_increasing(values, out)
    np.testing.assert_allclose(out, ref.pava_non_increasing_reference(values), rtol=1e-12, atol=1e-12)


def quantal_sizes(seed):
    rng = np.random.default_rng(seed)
    n = rng.poisson(1.2, 300)
    x = np.where(n > 0, 0.2 * n + rng.normal(0, 0.03, 300) * np.sqrt(np.maximum(n, 1)), rng.gamma(4.0, 0.01, 300))
    return np.sort(x[x > 0.01])


@pytest.mark.parametrize("seed", range(3))
def test_em_at_a_fixed_quantum_and_its_profile_equal_the_numpy_reference(seed):
    # (every step taken: tolerance -inf, so that both stop at the same step; the compiled E step skips the
    # components more than 8 s.d. from an event, which changes sums by about exp(-32) of them)
    x = quantal_sizes(seed)
    weight = np.ones(x.size)
    grid = np.exp(np.linspace(math.log(0.1), math.log(0.35), 6))
    loglik, share, v, props = (np.empty(6), np.empty(6), np.empty(6), np.zeros((6, quantal._MAX_COMPONENTS)))
    quantal._profile(x, weight, grid, 0.03, 25, -np.inf, loglik, share, v, props)
    ref_loglik, ref_share, ref_v, ref_props = ref.profile_reference(x, weight, grid, 0.03, 25, -np.inf)
    np.testing.assert_allclose(loglik, ref_loglik, rtol=1e-9)
    np.testing.assert_allclose(share, ref_share, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(v, ref_v, rtol=1e-8)
    np.testing.assert_allclose(props, ref_props, rtol=1e-8, atol=1e-12)
    state, p = np.empty(6), np.zeros(quantal._MAX_COMPONENTS)
    ref_state, ref_p = np.empty(6), np.zeros(quantal._MAX_COMPONENTS)
    for q, fresh in ((0.15, True), (0.2, False)):  # (a start from the parameters left by another quantum)
        got = quantal._em_fit(x, weight, q, 0.03, 25, -np.inf, state, p, fresh)
        expected = ref.em_fit_reference(x, weight, q, 0.03, 25, -np.inf, ref_state, ref_p, fresh)
        assert got == pytest.approx(expected, rel=1e-9)
        np.testing.assert_allclose(state[:5], ref_state[:5], rtol=1e-8)
        np.testing.assert_allclose(p, ref_p, rtol=1e-8, atol=1e-12)
