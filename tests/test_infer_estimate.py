"""Tests of the automatic parameters (calcium.infer.estimate).

References used below:
- the forward model (calcium.forward.simulate_recording) with known
  kinetics and noise: the estimates must recover them;
- the Yule-Walker equations of an AR(2) process and its exact
  autocovariance (Box & Jenkins 1976, Time Series Analysis, ch. 3);
- the noise-constrained problem of Pnevmatikakis et al. (2016), Neuron 89,
  285-299: the residual equals sigma^2 N.
"""
import math

import numpy as np
import pytest

from calcium.forward import simulate_recording
from calcium.infer._driver import prepare_weights, solve
from calcium.infer.estimate import (_coefficient_derivative, _coefficients_from_times,
                                    _event_support, _least_squares, _solve_small,
                                    _times_from_coefficients, _yule_walker,
                                    estimate_ar_coefficients, estimate_noise_sd, penalty_for_noise,
                                    signal_detected)
from calcium.kernel import Kernel
from calcium.signal.noise import estimate_noise


def test_yule_walker_on_lags_from_one_recovers_exact_ar2_coefficients_despite_white_noise():
    # reference: exact autocovariance of an AR(2) process, gamma(k) = sum_j h_j h_{j+k} (Box & Jenkins 1976),
    # plus white noise of variance 0.3 on lag 0 only
    g = np.array([1.5, -0.56])
    h = np.zeros(3000)
    h[0], h[1] = 1.0, g[0]
    for k in range(2, h.size):
        h[k] = g[0] * h[k - 1] + g[1] * h[k - 2]
    gamma = np.array([np.dot(h[:h.size - k], h[k:]) for k in range(8)])
    gamma[0] += 0.3
    np.testing.assert_allclose(_yule_walker(gamma, 2, 0.3), g, atol=1e-10)


@pytest.mark.parametrize("indicator,frame_rate", [("GCaMP6s", 30.0), ("GCaMP6f", 60.0)])
def test_noise_and_decay_are_recovered_from_simulated_recordings(indicator, frame_rate):
    # reference: forward model with known kinetics and noise; targets: decay within 10 %, noise within 5 %
    kernel = Kernel.from_indicator(indicator)
    noise = kernel.amplitude / 5.0
    rec = simulate_recording(1, 300.0, frame_rate, indicator=indicator, rate_hz=0.5, noise_sd=noise, seed=11)
    y = rec.dff[0]
    sd = estimate_noise_sd(y, frame_rate)
    assert sd == pytest.approx(noise, rel=0.05)
    g = estimate_ar_coefficients(y, frame_rate, order=2, noise_sd=sd)
    rise_s, decay_s = _times_from_coefficients(g, frame_rate)
    assert decay_s == pytest.approx(kernel.decay_s, rel=0.10)
    assert 0 < rise_s < decay_s


def test_ar1_estimate_of_a_single_exponential_kernel():
    # reference: forward model of an instantaneous-rise kernel (exactly AR(1) when sampled)
    kernel = Kernel(0.0, 0.4, 0.3)
    rec = simulate_recording(1, 200.0, 30.0, kernel=kernel, rate_hz=0.5, noise_sd=0.05, seed=2)
    g = estimate_ar_coefficients(rec.dff[0], 30.0, order=1, noise_sd=0.05)
    assert g.size == 1
    assert -1.0 / (30.0 * math.log(g[0])) == pytest.approx(0.4, rel=0.10)


@pytest.mark.parametrize("baseline", [0.0, "fit"])
def test_penalty_makes_the_residual_match_the_noise(baseline):
    # reference: noise-constrained deconvolution (Pnevmatikakis et al. 2016): |y - b - c|^2 = sigma^2 N
    rec = simulate_recording(1, 60.0, 30.0, indicator="GCaMP6f", rate_hz=1.0, noise_sd=0.04, seed=3)
    y = rec.dff[0]
    y[100:110] = np.nan
    g = Kernel.from_indicator("GCaMP6f").ar_coefficients(30.0)
    found = penalty_for_noise(y, g, 0.04, baseline=baseline)
    n_obs = np.count_nonzero(np.isfinite(y))
    assert found.target == pytest.approx(0.04 ** 2 * n_obs)
    assert found.residual == pytest.approx(found.target, rel=5e-3)
    r = y - found.deconvolution.baseline - found.deconvolution.calcium
    assert np.nansum(r ** 2) == pytest.approx(found.residual, rel=1e-9)
    assert found.penalty > 0 and found.deconvolution.converged


def test_trace_within_the_noise_gets_no_spike():
    # reference: worked by hand: if a constant already fits within sigma^2 N, no spike is needed
    rng = np.random.default_rng(5)
    y = rng.normal(0.0, 0.1, 600) * 0.9  # residual of the mean is below 0.1^2 N
    found = penalty_for_noise(y, [0.95], 0.1, baseline="fit")
    assert np.count_nonzero(found.deconvolution.spikes) == 0


def test_signal_detection_tells_noise_from_transients():
    # reference: Bartlett (1946): autocovariances of white noise are ~ N(0, sigma^4 / N) at lags >= 1
    rng = np.random.default_rng(6)
    assert not signal_detected(rng.normal(0, 0.1, 3000), 0.1)
    rec = simulate_recording(1, 100.0, 30.0, indicator="GCaMP6s", rate_hz=0.5, noise_sd=0.1, seed=6)
    assert signal_detected(rec.dff[0], 0.1)


def test_noise_of_a_long_trace_agrees_with_one_spectrum_of_the_same_frames():
    # reference: calcium.signal.estimate_noise on the whole central block (one Welch average); the long block is
    # handed over in rows, which drops only the few segments that would straddle two rows
    rec = simulate_recording(1, 1200.0, 30.0, indicator="GCaMP6f", rate_hz=0.5, noise_sd=0.05, seed=8)
    y = rec.dff[0]
    start = (y.size - 16384) // 2
    assert estimate_noise_sd(y, 30.0) == pytest.approx(estimate_noise(y[start:start + 16384], 30.0), rel=0.01)


def test_kinetics_gradient_matches_finite_differences():
    # reference: central finite differences (common practice) of the refinement's criterion, the residual of
    # the non-negative fit on a fixed support, against the gradient -2 r' dc/dtheta used by the Gauss-Newton
    # steps (spikes held: the optimal spikes and baseline need no derivative)
    rec = simulate_recording(1, 60.0, 30.0, indicator="GCaMP6f", rate_hz=1.0, noise_sd=0.03, seed=9)
    y, w, unit, _ = prepare_weights(rec.dff[0], None)
    support = np.zeros(y.size, dtype=bool)
    support[np.round(rec.spike_times[0] * 30.0).astype(int)] = True
    support[0] = True

    def fit(theta):
        g = _coefficients_from_times(math.exp(theta[0]), math.exp(theta[1]), 30.0, 2)
        c, _, b, _, _ = solve(y, w, unit, g, 0.0, "fit", 0.0, support=support, allowed=support)
        return float(np.sum((y - b - c) ** 2)), c, b, g

    theta = np.log([0.03, 0.25])
    _, c, b, g = fit(theta)
    u = np.empty(y.size)
    _coefficient_derivative(c, g[0], g[1], u)
    u_prev = np.concatenate([[0.0], u[:-1]])
    d, q = math.exp(-1 / (0.25 * 30.0)), math.exp(-1 / (0.03 * 30.0))
    jac = np.array([(u - d * u_prev) * (-q * math.log(q)), (u - q * u_prev) * (-d * math.log(d))])
    gradient = -2.0 * jac @ (y - b - c)
    step = 1e-5
    numeric = [(fit(theta + step * e)[0] - fit(theta - step * e)[0]) / (2 * step) for e in np.eye(2)]
    np.testing.assert_allclose(gradient, numeric, rtol=1e-3)


def test_event_support_marks_the_runs_whose_total_reaches_the_size():
    # reference: the definition, written out run by run
    s = np.array([0.0, 0.5, 0.6, 0.0, 0.2, 0.0, 0.0, 1.5, 0.0, 0.3, 0.3, 0.5])
    expected = np.zeros(s.size, dtype=bool)
    expected[[1, 2]] = True  # 1.1
    expected[7] = True  # 1.5
    expected[[9, 10, 11]] = True  # 1.1 (at the end of the trace)
    np.testing.assert_array_equal(_event_support(s, 1.0), expected)
    assert not _event_support(np.zeros(5), 1.0).any()


def test_small_solvers_match_numpy_linalg():
    # reference: numpy.linalg.lstsq and numpy.linalg.solve (LAPACK)
    rng = np.random.default_rng(5)
    for cols in (1, 2):
        for _ in range(50):
            M = rng.normal(size=(6, cols))
            rhs = rng.normal(size=6)
            np.testing.assert_allclose(_least_squares(M, rhs), np.linalg.lstsq(M, rhs, rcond=None)[0],
                                       rtol=1e-9, atol=1e-12)
            A = M.T @ M + 0.1 * np.eye(cols)
            np.testing.assert_allclose(_solve_small(A, rhs[:cols]), np.linalg.solve(A, rhs[:cols]), rtol=1e-10)
    # rank-deficient: the minimum-norm least-squares solution, as lstsq gives
    M = np.array([[1.0, 2.0], [2.0, 4.0], [3.0, 6.0]])
    np.testing.assert_allclose(_least_squares(M, np.array([1.0, 2.0, 3.0])), [0.2, 0.4])


def test_estimation_arguments_are_checked():
    with pytest.raises(ValueError, match="noise_sd"):
        estimate_noise_sd(np.zeros(8), 30.0)
    with pytest.raises(ValueError, match="order"):
        estimate_ar_coefficients(np.random.default_rng(0).normal(size=100), 30.0, order=3, noise_sd=1.0)
    with pytest.raises(ValueError, match="frame_rate"):
        estimate_ar_coefficients(np.zeros(100), -1.0)
    with pytest.raises(ValueError, match="noise_sd"):
        penalty_for_noise(np.zeros(100), [0.9], 0.0)
