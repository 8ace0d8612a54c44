"""Tests for calcium.score: matching, F1, binned correlations, van Rossum distance."""
import itertools
import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.optimize import linear_sum_assignment

from calcium.score import (ScoreTable, SpikeScore, match_spikes, score_many, score_spikes,
                           van_rossum_distance)


# --------------------------------------------------------------------------- matching
def test_hand_worked_matching_example():
    # Worked example (by hand), tolerance 0.05 s:
    #   true     = 1.00, 2.00, 3.00, 3.04
    #   inferred = 1.02, 2.10, 3.03, 5.00
    # Admissible pairs (|Δt| <= 0.05): 1.02-1.00 (0.02), 3.03-3.00 (0.03), 3.03-3.04 (0.01).
    # 2.10 is 0.10 from 2.00 -> no pair; 5.00 has no partner.
    # 3.03 can match only one of 3.00/3.04: the cheaper 3.04 (0.01).
    # Matches: (1.02, 1.00), (3.03, 3.04) -> n_matched = 2.
    # precision = 2/4 = 0.5, recall = 2/4 = 0.5, F1 = 2*2/(4+4) = 0.5.
    # timing errors (inferred - true): +0.02, -0.01 -> mean 0.005 s, sd = sqrt(((0.015)^2+(0.015)^2)/1)
    true = [1.00, 2.00, 3.00, 3.04]
    inferred = [1.02, 2.10, 3.03, 5.00]
    s = score_spikes(inferred, true, tolerance_s=0.05)
    assert s.n_matched == 2
    assert s.matched_pairs.tolist() == [[0, 0], [2, 3]]
    assert s.precision == pytest.approx(0.5)
    assert s.recall == pytest.approx(0.5)
    assert s.f1 == pytest.approx(0.5)
    assert s.timing_error_mean_s == pytest.approx(0.005)
    assert s.timing_error_sd_s == pytest.approx(math.sqrt(2 * 0.015 ** 2))


def test_identical_trains_have_f1_of_one_and_zero_distance():
    # Definition of F1 (harmonic mean of precision and recall): identical trains -> 1.
    rng = np.random.default_rng(1)
    t = np.sort(rng.uniform(0, 100, 300))
    s = score_spikes(t, t, tolerance_s=0.01, duration_s=100.0)
    assert (s.precision, s.recall, s.f1) == (1.0, 1.0, 1.0)
    assert s.van_rossum == pytest.approx(0.0, abs=1e-6)
    assert all(r == pytest.approx(1.0) for _, r in s.correlations)
    assert s.timing_error_mean_s == 0.0


def _greedy_closest_first(inferred, true, tol):
    """Reference greedy rule: repeatedly take the closest admissible unmatched pair."""
    pairs = sorted((abs(a - b), i, j) for i, a in enumerate(inferred) for j, b in enumerate(true)
                   if abs(a - b) <= tol)
    used_i, used_j, n = set(), set(), 0
    for _, i, j in pairs:
        if i not in used_i and j not in used_j:
            used_i.add(i), used_j.add(j)
            n += 1
    return n


def test_optimal_matching_beats_greedy_on_constructed_case():
    # Worked example, tolerance 0.1 s: true = 0.00, 0.15; inferred = 0.08, 0.24.
    # Distances: 0.08-0.15 = 0.07 (closest), 0.08-0.00 = 0.08, 0.24-0.15 = 0.09, 0.24-0.00 too far.
    # Greedy closest-first takes 0.08-0.15 and then 0.24 has no free partner: 1 match.
    # Optimal: 0.08-0.00 and 0.24-0.15: 2 matches.
    inferred, true = [0.08, 0.24], [0.0, 0.15]
    assert _greedy_closest_first(inferred, true, 0.1) == 1
    pairs = match_spikes(inferred, true, tolerance_s=0.1)
    assert pairs.tolist() == [[0, 0], [1, 1]]
    assert score_spikes(inferred, true, tolerance_s=0.1).f1 == 1.0


def test_among_maximum_matchings_the_smallest_total_error_is_chosen():
    # Worked example, tolerance 0.5 s: true = 0.0, 0.4; inferred = 0.3, 0.35.
    # Both pairings have 2 matches: (0.3-0.0, 0.35-0.4) costs 0.30 + 0.05 = 0.35;
    # (0.3-0.4, 0.35-0.0) costs 0.10 + 0.35 = 0.45. The first must be chosen.
    pairs = match_spikes([0.3, 0.35], [0.0, 0.4], tolerance_s=0.5)
    assert pairs.tolist() == [[0, 0], [1, 1]]


def _brute_force(inferred, true, tol):
    """Exhaustive search over all one-to-one matchings (reference): (max count, min total |Δt|)."""
    best = (0, 0.0)
    n, m = len(inferred), len(true)
    for k in range(min(n, m), 0, -1):
        costs = []
        for rows in itertools.combinations(range(n), k):
            for cols in itertools.permutations(range(m), k):
                d = [abs(inferred[r] - true[c]) for r, c in zip(rows, cols)]
                if max(d) <= tol:
                    costs.append(sum(d))
        if costs:
            return (k, min(costs))
    return best


def test_matching_equals_exhaustive_search_on_random_small_trains():
    # Reference: exhaustive enumeration of all matchings.
    rng = np.random.default_rng(7)
    for _ in range(60):
        n, m = rng.integers(0, 5, size=2)
        inferred = np.sort(rng.uniform(0, 1, n))
        true = np.sort(rng.uniform(0, 1, m))
        pairs = match_spikes(inferred, true, tolerance_s=0.15)
        count, cost = _brute_force(list(inferred), list(true), 0.15)
        assert pairs.shape[0] == count
        got = float(np.abs(inferred[pairs[:, 0]] - true[pairs[:, 1]]).sum()) if count else 0.0
        assert got == pytest.approx(cost, abs=1e-12)
        assert len(set(pairs[:, 0])) == count and len(set(pairs[:, 1])) == count


def test_stretch_decomposition_matches_one_full_assignment():
    # Reference: scipy.optimize.linear_sum_assignment on the whole (n x m) cost matrix.
    rng = np.random.default_rng(3)
    true = np.sort(rng.uniform(0, 60, 400))
    inferred = np.sort(np.concatenate([true[:300] + rng.normal(0, 0.03, 300), rng.uniform(0, 60, 80)]))
    tol = 0.05
    pairs = match_spikes(inferred, true, tolerance_s=tol)
    d = np.abs(inferred[:, None] - true[None, :])
    ok = d <= tol
    big = 1e6
    r, c = linear_sum_assignment(np.where(ok, d, big))
    keep = ok[r, c]
    assert pairs.shape[0] == keep.sum()
    assert np.abs(inferred[pairs[:, 0]] - true[pairs[:, 1]]).sum() == pytest.approx(d[r[keep], c[keep]].sum())


# --------------------------------------------------------------------------- empty trains
def test_empty_trains_follow_the_documented_conventions():
    both = score_spikes([], [], tolerance_s=0.1)
    assert (both.precision, both.recall, both.f1, both.n_matched) == (1.0, 1.0, 1.0, 0)
    assert both.van_rossum == 0.0
    missed = score_spikes([], [1.0, 2.0], tolerance_s=0.1)
    assert (missed.precision, missed.recall, missed.f1) == (0.0, 0.0, 0.0)
    false_alarm = score_spikes([1.0], [], tolerance_s=0.1)
    assert (false_alarm.precision, false_alarm.recall, false_alarm.f1) == (0.0, 0.0, 0.0)
    assert math.isnan(false_alarm.timing_error_mean_s)


# --------------------------------------------------------------------------- correlations
def test_binned_correlation_equals_pearson_of_histogram_counts():
    # Reference: scipy.stats.pearsonr of numpy.histogram counts on bins [0, duration].
    rng = np.random.default_rng(11)
    true = np.sort(rng.uniform(0, 50, 200))
    inferred = np.sort(np.concatenate([true[::2] + rng.normal(0, 0.05, 100), rng.uniform(0, 50, 40)]))
    inferred = inferred[(inferred >= 0) & (inferred <= 50)]
    s = score_spikes(inferred, true, tolerance_s=0.1, duration_s=50.0, bin_widths_s=(0.5, 1.0))
    for width in (0.5, 1.0):
        # bins of `width` from 0 to 50 s (numpy's last bin is closed, so a spike at exactly 50 s counts)
        edges = width * np.arange(round(50 / width) + 1)
        expected = stats.pearsonr(np.histogram(inferred, edges)[0], np.histogram(true, edges)[0])[0]
        assert s.correlation(width) == pytest.approx(expected, rel=1e-9)
    with pytest.raises(ValueError, match="bin_width_s"):
        s.correlation(0.25)


def test_correlation_is_nan_for_a_constant_train():
    s = score_spikes([], [1.0, 5.0], tolerance_s=0.1, duration_s=10.0, bin_widths_s=(1.0,))
    assert math.isnan(s.correlation(1.0))


# --------------------------------------------------------------------------- van Rossum
def _filtered(times, tau, t):
    out = np.zeros_like(t)
    for ti in times:
        out += np.where(t >= ti, np.exp(-(t - ti) / tau), 0.0)
    return out


def test_van_rossum_distance_equals_numerical_integral_of_filtered_trains():
    # Reference: van Rossum (2001) Neural Comput 13:751, D^2 = (1/tau) ∫ (f - g)^2 dt with
    # f, g the trains filtered by H(t) exp(-t/tau); integral by scipy.integrate.quad.
    rng = np.random.default_rng(5)
    tau = 0.2
    a = np.sort(rng.uniform(0, 3, 7))
    b = np.sort(np.concatenate([a[:4] + rng.normal(0, 0.05, 4), rng.uniform(0, 3, 2)]))
    breaks = np.sort(np.concatenate([a, b]))
    integrand = lambda t: (_filtered(a, tau, np.array([t]))[0] - _filtered(b, tau, np.array([t]))[0]) ** 2
    total, _ = integrate.quad(integrand, breaks[0] - 1.0, breaks[-1] + 40 * tau, points=breaks,
                              limit=500, epsabs=1e-12, epsrel=1e-10)
    expected = math.sqrt(total / tau)
    assert van_rossum_distance(a, b, van_rossum_tau_s=tau) == pytest.approx(expected, rel=1e-6)


def test_van_rossum_distance_of_simple_cases_matches_closed_form():
    # van Rossum (2001): one unmatched spike gives D^2 = 1/2; a pair delta apart gives
    # D^2 = 1 - exp(-delta/tau) (worked out from the integral by hand).
    assert van_rossum_distance([2.0], [], van_rossum_tau_s=0.3) ** 2 == pytest.approx(0.5)
    assert van_rossum_distance([1.0], [1.1], van_rossum_tau_s=0.2) ** 2 == pytest.approx(1 - math.exp(-0.5))
    # symmetric, and coincident spikes (a doublet) count twice
    assert van_rossum_distance([1.0, 1.0], [1.0], van_rossum_tau_s=0.2) ** 2 == pytest.approx(0.5)
    assert van_rossum_distance([0.3, 2.0], [1.0], van_rossum_tau_s=0.5) == pytest.approx(
        van_rossum_distance([1.0], [0.3, 2.0], van_rossum_tau_s=0.5))


def test_van_rossum_default_time_constant_is_the_tolerance():
    s = score_spikes([1.0], [1.05], tolerance_s=0.1)
    assert s.van_rossum_tau_s == 0.1
    assert s.van_rossum == pytest.approx(van_rossum_distance([1.0], [1.05], van_rossum_tau_s=0.1))


# --------------------------------------------------------------------------- many ROIs
def test_pooled_scores_come_from_summed_counts():
    inferred = {0: [0.1, 0.5, 0.9], 1: [1.0], 2: []}
    true = {0: [0.1, 0.5], 1: [2.0, 3.0, 4.0], 2: [1.0]}
    table = score_many(inferred, true, tolerance_s=0.05)
    assert isinstance(table, ScoreTable) and len(table) == 3
    assert all(isinstance(s, SpikeScore) for s in table.scores)
    assert (table.n_true, table.n_inferred, table.n_matched) == (6, 4, 2)
    assert table.precision == pytest.approx(2 / 4)
    assert table.recall == pytest.approx(2 / 6)
    assert table.f1 == pytest.approx(2 * 2 / 10)
    # not the mean of per-ROI F1 (which would be (0.8 + 0 + 0) / 3)
    assert table[0].f1 == pytest.approx(0.8)
    assert table.rows()[-1][0] == "pooled"
    assert "pooled" in str(table)


def test_roi_in_only_one_dict_is_scored_against_empty_train_with_warning():
    with pytest.warns(UserWarning, match="only one"):
        table = score_many({0: [1.0], 5: [2.0]}, {0: [1.0]}, tolerance_s=0.1)
    assert table.rois == (0, 5)
    assert table[5].n_true == 0 and table[5].precision == 0.0


def test_lists_of_different_length_are_rejected():
    with pytest.raises(ValueError, match="same number of ROIs"):
        score_many([[1.0], [2.0]], [[1.0]], tolerance_s=0.1)


# --------------------------------------------------------------------------- bad input
def test_unsorted_times_are_sorted_with_a_warning():
    with pytest.warns(UserWarning, match="ascending"):
        s = score_spikes([0.5, 0.1], [0.1, 0.5], tolerance_s=0.01)
    assert s.f1 == 1.0


@pytest.mark.parametrize("kwargs, match", [
    (dict(tolerance_s=0.0), "tolerance_s"),
    (dict(tolerance_s=0.1, bin_widths_s=()), "bin_widths_s"),
    (dict(tolerance_s=0.1, bin_widths_s=(0.1, -1)), "bin_widths_s"),
    (dict(tolerance_s=0.1, duration_s=-1.0), "duration_s"),
    (dict(tolerance_s=0.1, van_rossum_tau_s=0.0), "van_rossum_tau_s"),
])
def test_bad_arguments_are_named_in_the_error(kwargs, match):
    with pytest.raises(ValueError, match=match):
        score_spikes([1.0], [1.0], **kwargs)


def test_non_finite_or_two_dimensional_times_are_rejected():
    with pytest.raises(ValueError, match="inferred_times"):
        score_spikes([1.0, np.nan], [1.0], tolerance_s=0.1)
    with pytest.raises(ValueError, match="true_times"):
        score_spikes([1.0], [[1.0, 2.0]], tolerance_s=0.1)


def test_spikes_beyond_duration_are_reported():
    with pytest.warns(UserWarning, match="outside"):
        score_spikes([1.0, 12.0], [1.0], tolerance_s=0.1, duration_s=10.0)


def test_negative_times_are_refused_as_the_spike_table_reader_refuses_them(tmp_path):
    # Consistency with calcium.io.read_spike_times, which refuses a negative time in a file.
    from calcium._checks import CalciumInputError
    from calcium.io import read_spike_times

    (tmp_path / "s.csv").write_text("time_s\n-0.5\n1.0\n")
    with pytest.raises(CalciumInputError, match="negative"):
        read_spike_times(tmp_path / "s.csv")
    true = np.array([-0.5, 1.0])
    with pytest.raises(ValueError, match=r"true_times holds 1 negative time\(s\) \(first -0.5 s at index 0\).*align "
                                         r"the clocks first"):
        score_spikes([1.0], true, tolerance_s=0.1)
    np.testing.assert_array_equal(true, [-0.5, 1.0])  # the input is left as it was
    with pytest.raises(ValueError, match=r"inferred\[3\] holds 1 negative time"):
        score_many({3: [-0.01]}, {3: [0.5]}, tolerance_s=0.1)


def test_the_former_name_of_the_van_rossum_time_constant_still_works_with_a_deprecation_warning():
    with pytest.warns(DeprecationWarning, match="van_rossum_tau_s"):
        old = van_rossum_distance([1.0], [1.1], tau_s=0.2)
    assert old == van_rossum_distance([1.0], [1.1], van_rossum_tau_s=0.2)
