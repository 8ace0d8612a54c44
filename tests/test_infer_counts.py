"""Tests of activity -> whole spikes (calcium.infer.counts).

References used below:
- closed forms of a sampled exponential / difference of exponentials run
  through the AR difference filter (worked by hand from Kernel.evaluate);
- scipy.optimize.nnls for the non-negative refit on a support;
- hand-worked examples of the rounding and placement rules.
"""
import math

import numpy as np
import pytest
import scipy.optimize
import scipy.signal

from calcium.infer.counts import (_sorted_median, _sorted_quantile, _std, activity_events, event_sizes,
                                  events_to_spikes, quantal_size, refit_on_support, spike_unit)
from calcium.kernel import Kernel

PHASES = (np.arange(64) + 0.5) / 64  # the positions within a frame that spike_unit averages over


def test_spike_unit_of_a_single_exponential_matches_its_closed_form():
    # reference: a spike d frames before frame J gives activity A * g**d at frame J only (worked by hand)
    kernel = Kernel(0.0, 0.3, 0.5)
    g = kernel.ar_coefficients(20.0)
    unit = spike_unit(kernel, 20.0, g)
    assert unit.size == pytest.approx(np.mean(0.5 * g[0] ** PHASES), rel=1e-12)
    assert unit.size == pytest.approx(0.5 * (1 - g[0]) / -math.log(g[0]), rel=1e-3)  # continuous average
    assert unit.lag_frames == pytest.approx(0.5, abs=1e-12)


def test_spike_unit_of_a_difference_of_exponentials_matches_its_closed_form():
    # reference: with alpha (d^(k+p) - r^(k+p)) samples, the AR(2) activity is alpha (d^p - r^p) at frame J and
    # alpha (d r^p - r d^p) at J + 1 (worked by hand), p the spike's distance before frame J in frames
    kernel = Kernel(0.05, 0.5, 0.2)
    fs = 30.0
    (alpha, _), (minus_alpha, _) = kernel.exponential_terms()
    assert minus_alpha == pytest.approx(-alpha)
    d, r = math.exp(-1 / (0.5 * fs)), math.exp(-1 / (0.05 * fs))
    first = alpha * (d ** PHASES - r ** PHASES)
    second = alpha * (d * r ** PHASES - r * d ** PHASES)
    unit = spike_unit(kernel, fs, kernel.ar_coefficients(fs))
    assert unit.size == pytest.approx(np.mean(first + second), rel=1e-10)
    lag = np.mean((2 * first + 3 * second) / (first + second) - (2 - PHASES))
    assert unit.lag_frames == pytest.approx(lag, rel=1e-10)


def test_events_are_rounded_and_placed_at_quantiles_of_their_activity():
    # reference: hand-worked example of the rule in events_to_spikes' Notes
    activity = np.array([0, 0, 1.0, 0, 0, 0.3, 0, 0, 2.1, 0])
    times, counts = events_to_spikes(activity, 10.0, merge_gap=0)
    np.testing.assert_allclose(times, [0.2, 0.775, 0.825])
    np.testing.assert_array_equal(counts, [0, 0, 1, 0, 0, 0, 0, 0, 2, 0])
    shifted, _ = events_to_spikes(activity, 10.0, merge_gap=0, lag_frames=1.0)
    np.testing.assert_allclose(shifted, [0.1, 0.675, 0.725])


def test_activity_split_over_nearby_frames_is_merged_before_rounding():
    # reference: hand-worked: 0.3 and 0.4 two frames apart are one event of 0.7 -> one spike
    activity = np.array([0, 0.3, 0, 0.4, 0, 0, 0])
    assert events_to_spikes(activity, 1.0, merge_gap=0)[0].size == 0
    times, _ = events_to_spikes(activity, 1.0, merge_gap=1)
    assert times.size == 1 and 1.0 < times[0] < 3.0
    starts, stops = activity_events(activity, merge_gap=1)
    np.testing.assert_array_equal(starts, [1])
    np.testing.assert_array_equal(stops, [4])
    np.testing.assert_allclose(event_sizes(activity, merge_gap=1), [0.7])


def test_quantal_size_finds_the_size_of_one_spike():
    # reference: a simulated mixture with known quantum 0.2 (1, 2 and 3 spikes) plus small noise events
    rng = np.random.default_rng(1)
    n = np.repeat([1, 2, 3], [300, 80, 30])
    sizes = 0.2 * n + rng.normal(0, 0.03, n.size)
    sizes = np.concatenate([sizes, rng.uniform(0.0, 0.05, 200)])
    assert quantal_size(sizes, min_size=0.08) == pytest.approx(0.2, rel=0.05)
    assert quantal_size(sizes[:2], min_size=0.08) is None


def test_refit_on_a_support_is_the_non_negative_least_squares_fit():
    # reference: scipy.optimize.nnls on the dense convolution columns of the support
    rng = np.random.default_rng(2)
    g = [1.4, -0.45]
    T = 120
    spikes = np.zeros(T)
    spikes[[10, 11, 50, 90]] = [0.6, 0.5, 1.0, 0.8]
    y = scipy.signal.lfilter([1.0], [1.0, -g[0], -g[1]], spikes) + rng.normal(0, 0.05, T)
    support = np.zeros(T, dtype=bool)
    support[[9, 10, 11, 12, 49, 50, 51, 89, 90, 100]] = True
    calcium, refit, baseline = refit_on_support(y, g, support, baseline=0.0)
    cols = np.flatnonzero(support)
    K = np.column_stack([scipy.signal.lfilter([1.0], [1.0, -g[0], -g[1]], np.eye(T)[j]) for j in cols])
    expected, _ = scipy.optimize.nnls(K, y)
    np.testing.assert_allclose(refit[cols], expected, atol=1e-8)
    assert np.all(refit[~support] == 0) and baseline == 0.0
    np.testing.assert_allclose(calcium, K @ expected, atol=1e-8)


def test_quantiles_of_sorted_values_and_the_spread_equal_numpys():
    # reference: numpy.percentile (default linear method), numpy.median and numpy.std, value for value
    rng = np.random.default_rng(4)
    for n in (1, 2, 3, 4, 7, 100, 801):
        x = rng.lognormal(size=n)
        ordered = np.sort(x)
        for q in (0.25, 0.5, 0.75, 0.9):
            assert _sorted_quantile(ordered, q) == np.percentile(x, 100 * q)
        assert _sorted_median(ordered) == np.median(x)
        assert _std(x) == np.std(x)
