"""Tests of calcium.kernel: closed forms, AR coefficients, saturation, bad input."""
import math

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import minimize_scalar
from scipy.signal import lfilter

from calcium.kernel import DECAY_RANGE_S, Kernel, time_constants_from_half_times

KINETICS = [(0.01, 0.2), (0.05, 0.5), (0.18, 0.2), (1e-4, 2.0), (0.3, 1.7)]


def double_exponential(t, rise, decay):
    """The unnormalised kernel written out directly from the definition."""
    return np.exp(-t / decay) - np.exp(-t / rise)


# --------------------------------------------------------------- closed forms
@pytest.mark.parametrize("rise, decay", KINETICS)
def test_time_to_peak_matches_the_closed_form(rise, decay):
    # Handbook calculus: d/dt [exp(-t/d) - exp(-t/r)] = 0 at t* = ln(d/r) r d / (d - r).
    expected = math.log(decay / rise) * rise * decay / (decay - rise)
    assert Kernel(rise, decay, 0.3).time_to_peak_s == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("rise, decay", KINETICS)
def test_peak_of_the_response_equals_the_amplitude(rise, decay):
    kernel = Kernel(rise, decay, 0.37)
    # Reference: scipy.optimize.minimize_scalar on the negated response, bracketing the peak.
    best = minimize_scalar(lambda t: -float(kernel.evaluate(t)), bounds=(0, 5 * decay), method="bounded",
                           options={"xatol": 1e-12})
    assert -best.fun == pytest.approx(0.37, rel=1e-9)
    # and the shape is the definition, scaled: ratio to the plain double exponential is constant
    t = np.linspace(0.001, 3 * decay, 50)
    ratio = kernel.evaluate(t) / double_exponential(t, rise, decay)
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-11)


@pytest.mark.parametrize("decay", [0.05, 0.7, 3.0])
def test_single_exponential_half_decay_is_ln2_times_decay(decay):
    # Handbook: exp(-t/tau) = 1/2 at t = ln 2 tau.
    kernel = Kernel(0.0, decay, 0.2)
    assert kernel.half_decay_s == pytest.approx(math.log(2) * decay, rel=1e-12)
    assert kernel.time_to_peak_s == 0.0 and kernel.half_rise_s == 0.0
    assert kernel.evaluate(0.0) == pytest.approx(0.2, rel=1e-15)


@pytest.mark.parametrize("rise, decay", KINETICS)
def test_half_rise_and_half_decay_times_hit_half_the_peak(rise, decay):
    kernel = Kernel(rise, decay, 1.0)
    t_peak = math.log(decay / rise) * rise * decay / (decay - rise)
    peak = double_exponential(t_peak, rise, decay)
    # Definition: the response at the half-rise time (before the peak) and at peak + t½ is half the peak.
    assert double_exponential(kernel.half_rise_s, rise, decay) == pytest.approx(0.5 * peak, rel=1e-11)
    assert double_exponential(t_peak + kernel.half_decay_s, rise, decay) == pytest.approx(0.5 * peak, rel=1e-11)
    assert 0 < kernel.half_rise_s < t_peak


def test_slow_component_kernel_is_the_weighted_sum_normalised_to_the_amplitude():
    rise, decay, slow, fraction = 0.02, 0.25, 2.0, 0.35
    kernel = Kernel(rise, decay, 0.5, slow_decay_s=slow, slow_fraction=fraction)
    t = np.linspace(0, 6, 3001)
    shape = (1 - fraction) * double_exponential(t, rise, decay) + fraction * double_exponential(t, rise, slow)
    # Reference peak from scipy.optimize.minimize_scalar on the raw weighted sum.
    best = minimize_scalar(lambda x: -((1 - fraction) * double_exponential(x, rise, decay)
                                       + fraction * double_exponential(x, rise, slow)),
                           bounds=(0, 1), method="bounded", options={"xatol": 1e-12})
    np.testing.assert_allclose(kernel.evaluate(t), 0.5 * shape / -best.fun, rtol=1e-9, atol=1e-14)
    assert kernel.time_to_peak_s == pytest.approx(best.x, abs=1e-6)
    half = float(kernel.evaluate(kernel.time_to_peak_s + kernel.half_decay_s))
    assert half == pytest.approx(0.25, rel=1e-11)


def test_instantaneous_rise_with_slow_component_half_decay_solves_the_defining_equation():
    kernel = Kernel(0.0, 0.3, 1.0, slow_decay_s=3.0, slow_fraction=0.4)
    t_half = kernel.half_decay_s
    # Definition: 0.6 exp(-t/0.3) + 0.4 exp(-t/3) = 1/2.
    assert 0.6 * math.exp(-t_half / 0.3) + 0.4 * math.exp(-t_half / 3.0) == pytest.approx(0.5, rel=1e-12)


def test_kernel_integral_matches_quad():
    # The area under a normalised difference of exponentials is A (d - r) / N (calculus); check it with quad.
    kernel = Kernel(0.04, 0.6, 0.3)
    area, _ = quad(lambda t: float(kernel.evaluate(t)), 0, 60, limit=200)
    t_peak = kernel.time_to_peak_s
    expected = 0.3 * (0.6 - 0.04) / double_exponential(t_peak, 0.04, 0.6)
    assert area == pytest.approx(expected, rel=1e-9)


# ------------------------------------------------------------- AR recursion
@pytest.mark.parametrize("rise, decay", KINETICS)
@pytest.mark.parametrize("frame_rate", [7.5, 30.0, 500.0])
def test_sampled_kernel_equals_the_ar2_recursion_run_by_lfilter(rise, decay, frame_rate):
    kernel = Kernel(rise, decay, 0.25)
    n = 400
    g1, g2 = kernel.ar_coefficients(frame_rate)
    impulse = np.zeros(n)
    impulse[0] = 1.0
    # Reference: scipy.signal.lfilter with denominator [1, -g1, -g2] gives (d^(k+1) - r^(k+1)) / (d - r);
    # the sampled kernel is that sequence shifted by one frame and scaled by its second sample.
    recursion = lfilter([1.0], [1.0, -g1, -g2], impulse)
    sampled = kernel.impulse_response(frame_rate, n)
    assert sampled[0] == 0.0
    np.testing.assert_allclose(sampled[1:], sampled[1] * recursion[:-1], rtol=1e-12, atol=1e-12 * 0.25)


@pytest.mark.parametrize("frame_rate", [10.0, 60.0])
def test_single_exponential_sampled_kernel_is_ar1(frame_rate):
    kernel = Kernel(0.0, 0.8, 0.4)
    (g,) = kernel.ar_coefficients(frame_rate)
    impulse = np.zeros(200)
    impulse[0] = 1.0
    # Reference: lfilter with denominator [1, -g] (AR(1)), scaled by the amplitude.
    np.testing.assert_allclose(kernel.impulse_response(frame_rate, 200), 0.4 * lfilter([1.0], [1.0, -g], impulse),
                               rtol=1e-12)
    assert g == pytest.approx(math.exp(-1 / (0.8 * frame_rate)), rel=1e-15)


@pytest.mark.parametrize("rise, decay", KINETICS + [(0.0, 0.5)])
@pytest.mark.parametrize("frame_rate", [15.0, 100.0])
def test_from_ar_coefficients_inverts_ar_coefficients(rise, decay, frame_rate):
    kernel = Kernel(rise, decay, 0.7)
    back = Kernel.from_ar_coefficients(kernel.ar_coefficients(frame_rate), frame_rate, amplitude=0.7)
    assert back.rise_s == pytest.approx(rise, rel=1e-9, abs=1e-300)
    assert back.decay_s == pytest.approx(decay, rel=1e-12)
    assert back.amplitude == 0.7


def test_ar_coefficients_of_a_kernel_with_a_slow_component_are_refused():
    kernel = Kernel(0.01, 0.2, 1.0, slow_decay_s=1.0, slow_fraction=0.2)
    with pytest.raises(ValueError, match="slow"):
        kernel.ar_coefficients(30.0)


@pytest.mark.parametrize("coefficients, message", [
    ([1.0, -0.5], "complex"),          # g1^2 + 4 g2 = -1 < 0: oscillation
    ([1.2, -0.2], "roots"),            # roots 1.0 and 0.2: not decaying
    ([0.5, 0.3], "roots"),             # a negative root
    ([1.0, -0.25], "double root"),     # alpha function: rise == decay
    ([1.5], "roots"),
    ([0.1, 0.2, 0.3], "1 or 2"),
    ([np.nan, 0.1], "1 or 2"),
])
def test_from_ar_coefficients_rejects_coefficients_that_are_not_a_difference_of_exponentials(coefficients, message):
    with pytest.raises(ValueError, match=message):
        Kernel.from_ar_coefficients(coefficients, 30.0)


# ----------------------------------------------------------------- saturation
def hill_fraction(c, n, k):
    """Hill (1910) equation: fraction of indicator bound at calcium c."""
    return c ** n / (c ** n + k ** n)


@pytest.mark.parametrize("dff_max, n, k", [(2.0, 1.0, 1.0), (5.0, 2.5, 3.0), (1.0, 4.0, 0.5)])
def test_saturation_is_the_hill_equation_relative_to_rest(dff_max, n, k):
    kernel = Kernel(0.05, 0.5, 0.2, dff_max=dff_max, hill_n=n, hill_k=k)
    x = np.array([0.0, 0.01, 0.3, 1.0, 4.0, 30.0])
    # Reference: Hill (1910) fraction bound, ΔF/F relative to resting fluorescence (Grynkiewicz et al. 1985),
    # with calcium c = 1 + x (1 + k^n) / (n dff_max) (documented scale giving slope 1 at rest).
    c = 1 + x * (1 + k ** n) / (n * dff_max)
    expected = dff_max * (hill_fraction(c, n, k) - hill_fraction(1.0, n, k)) / (1 - hill_fraction(1.0, n, k))
    np.testing.assert_allclose(kernel.saturate(x), expected, rtol=1e-12, atol=1e-15)


def test_saturation_with_hill_coefficient_one_is_the_hyperbola():
    # Hill (1910) with n = 1 relative to rest reduces to dff_max x / (dff_max + x), whatever K (algebra).
    for k in (0.2, 1.0, 7.0):
        kernel = Kernel(0.05, 0.5, 0.2, dff_max=3.0, hill_k=k)
        x = np.linspace(0, 20, 11)
        np.testing.assert_allclose(kernel.saturate(x), 3.0 * x / (3.0 + x), rtol=1e-13)


@pytest.mark.parametrize("n, k", [(1.0, 1.0), (2.7, 2.0), (0.8, 5.0)])
def test_saturation_keeps_the_small_signal_slope_and_stays_below_dff_max(n, k):
    kernel = Kernel(0.05, 0.5, 0.2, dff_max=4.0, hill_n=n, hill_k=k)
    assert kernel.saturate(1e-9) / 1e-9 == pytest.approx(1.0, rel=1e-6)
    x = np.linspace(0, 1e4, 20001)
    y = kernel.saturate(x)
    assert np.all(y < 4.0) and np.all(np.diff(y) > 0)


@pytest.mark.parametrize("n, k", [(1.0, 1.0), (2.7, 2.0), (0.8, 5.0)])
def test_unsaturate_inverts_saturate(n, k):
    kernel = Kernel(0.05, 0.5, 0.2, dff_max=4.0, hill_n=n, hill_k=k)
    x = np.concatenate([np.linspace(kernel.saturate_domain_min * 0.999, 0, 7), np.geomspace(1e-8, 1e3, 40)])
    np.testing.assert_allclose(kernel.unsaturate(kernel.saturate(x)), x, rtol=1e-9, atol=1e-12)
    assert kernel.unsaturate(kernel.saturate(0.3)) == pytest.approx(0.3, rel=1e-12)


def test_unsaturate_refuses_or_clips_values_at_or_above_dff_max():
    kernel = Kernel(0.05, 0.5, 0.2, dff_max=2.0, hill_n=2.0, hill_k=2.0)
    with pytest.raises(ValueError, match="dff_max"):
        kernel.unsaturate(np.array([0.1, 2.0]))
    clipped = kernel.unsaturate(np.array([0.1, 2.0, 50.0]), clip=True)
    assert np.all(np.isfinite(clipped)) and clipped[1] == clipped[2] > clipped[0]
    with pytest.raises(ValueError, match="linear_dff"):
        kernel.saturate(-10.0)


def test_linear_kernel_saturate_and_unsaturate_are_identities():
    kernel = Kernel(0.05, 0.5, 0.2)
    x = np.array([-1.0, 0.0, 3.0, 1e6])
    assert kernel.is_linear
    np.testing.assert_array_equal(kernel.saturate(x), x)
    np.testing.assert_array_equal(kernel.unsaturate(x), x)
    assert not Kernel(0.05, 0.5, 0.2, dff_max=1.0).is_linear


# -------------------------------------------------------- half-time solving
@pytest.mark.parametrize("rise, decay", [(0.01, 0.2), (0.07, 0.7), (0.3, 0.31), (1e-5, 1.0)])
def test_time_constants_from_half_times_recover_the_kernel(rise, decay):
    kernel = Kernel(rise, decay)
    got = time_constants_from_half_times(kernel.half_decay_s, half_rise_s=kernel.half_rise_s)
    np.testing.assert_allclose(got, (rise, decay), rtol=1e-8)
    got = time_constants_from_half_times(kernel.half_decay_s, time_to_peak_s=kernel.time_to_peak_s)
    np.testing.assert_allclose(got, (rise, decay), rtol=1e-8)


def test_time_constants_from_half_times_refuse_a_rise_too_slow_for_any_double_exponential():
    # The alpha function t exp(-t) bounds half-rise / half-decay at 0.2319 / 1.6783 = 0.1382 (calculus).
    with pytest.raises(ValueError, match="outside"):
        time_constants_from_half_times(1.0, half_rise_s=0.14)
    assert time_constants_from_half_times(1.0, half_rise_s=0.0) == (0.0, pytest.approx(1 / math.log(2)))


# ------------------------------------------------------------ bad arguments
@pytest.mark.parametrize("args, kwargs, name", [
    ((-0.01, 0.5, 1.0), {}, "rise_s"),
    ((np.nan, 0.5, 1.0), {}, "rise_s"),
    ((0.01, 0.0, 1.0), {}, "decay_s"),
    ((0.01, np.inf, 1.0), {}, "decay_s"),
    ((0.01, 0.5, 0.0), {}, "amplitude"),
    ((0.01, 0.5, -1.0), {}, "amplitude"),
    ((0.5, 0.5, 1.0), {}, "rise_s must be smaller"),
    ((0.6, 0.5, 1.0), {}, "rise_s must be smaller"),
    ((0.01, 0.5, 1.0), {"slow_decay_s": 0.4, "slow_fraction": 0.2}, "slow_decay_s"),
    ((0.01, 0.5, 1.0), {"slow_decay_s": 2.0, "slow_fraction": 1.0}, "slow_fraction"),
    ((0.01, 0.5, 1.0), {"slow_decay_s": 2.0}, "slow_fraction is 0"),
    ((0.01, 0.5, 1.0), {"slow_fraction": 0.3}, "slow_decay_s"),
    ((0.01, 0.5, 1.0), {"dff_max": 0.0}, "dff_max"),
    ((0.01, 0.5, 1.0), {"dff_max": 1.0, "hill_n": -1.0}, "hill_n"),
    ((0.01, 0.5, 1.0), {"dff_max": 1.0, "hill_k": np.nan}, "hill_k"),
])
def test_bad_kernel_arguments_raise_value_error_naming_them(args, kwargs, name):
    with pytest.raises(ValueError, match=name):
        Kernel(*args, **kwargs)


@pytest.mark.parametrize("args, kwargs, fragment", [
    ((0.0, 1e-300), {}, r"decay_s=1e-300 s is outside the range of calcium indicator decays \(0.001 to 60 s"),
    ((0.05, 1e6), {}, r"decay_s=1000000.0 s is outside the range"),
    ((0.05, 500.0), {}, r"decay_s=500.0 s is outside.*if it is in milliseconds, give 0.5 s"),
    ((0.0, 0.5), {"slow_decay_s": 1e4, "slow_fraction": 0.2}, r"slow_decay_s=10000.0 s is outside the range"),
])
def test_absurd_decay_times_are_refused_with_the_accepted_range(args, kwargs, fragment):
    with pytest.raises(ValueError, match=fragment):
        Kernel(*args, **kwargs)


@pytest.mark.parametrize("decay_s", [DECAY_RANGE_S[0], DECAY_RANGE_S[1]])
def test_the_ends_of_the_decay_range_are_accepted(decay_s):
    # Handbook: a single exponential falls to half at ln 2 tau, at either end of the accepted range.
    assert Kernel(0.0, decay_s).half_decay_s == pytest.approx(math.log(2) * decay_s, rel=1e-12)


def test_ar_coefficients_of_an_absurdly_slow_decay_are_refused():
    # d = exp(-1 / (tau f)) with tau = 1e4 s at 30 Hz: from_ar_coefficients must not build that kernel.
    with pytest.raises(ValueError, match=r"decay_s=.* s is outside the range"):
        Kernel.from_ar_coefficients([math.exp(-1 / (1e4 * 30.0))], 30.0)


def test_bad_sampling_arguments_raise():
    kernel = Kernel(0.01, 0.5)
    with pytest.raises(ValueError, match="frame_rate"):
        kernel.impulse_response(0.0, 10)
    with pytest.raises(ValueError, match="n_frames"):
        kernel.impulse_response(30.0, 0)
    with pytest.raises(ValueError, match="frame_rate"):
        kernel.ar_coefficients(-5.0)


def test_kernel_is_frozen_and_prints_its_times_in_ms():
    kernel = Kernel(0.05, 0.5, 0.2)
    with pytest.raises(AttributeError):
        kernel.decay_s = 1.0
    text = str(kernel)
    assert "rise 50 ms" in text and "decay 500 ms" in text and "half-decay" in text
    assert kernel.scaled(0.4).amplitude == 0.4 and kernel.scaled(0.4).decay_s == 0.5


def test_kernel_round_trips_through_a_json_dict():
    import json

    kernel = Kernel(0.01, 0.2, 0.3, slow_decay_s=1.0, slow_fraction=0.2, dff_max=2.0, hill_n=2.0, hill_k=3.0)
    assert Kernel(**json.loads(json.dumps(kernel.to_dict()))) == kernel
