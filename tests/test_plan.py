"""Tests for calcium.plan: detectability of single spikes by simulation and deconvolution."""
import math

import numpy as np
import pytest
from scipy import stats

from calcium.kernel import Kernel
from calcium.plan import DetectabilityPlan, plan_detectability, wilson_interval

SHORT_INTERVALS = (0.02, 0.035, 0.05, 0.075, 0.1, 0.15, 0.2, 0.3)


def test_wilson_interval_matches_scipy():
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson") (Wilson 1927).
    for k, n in [(0, 10), (8, 10), (97, 100), (50, 50)]:
        expected = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        low, high = wilson_interval(k, n)
        assert low == pytest.approx(expected.low, abs=1e-12)
        assert high == pytest.approx(expected.high, abs=1e-12)


def test_threshold_gives_the_requested_false_positive_rate_on_fresh_spike_free_data():
    # Reference: definition of the threshold as the (1 - alpha) quantile of the spike-free statistic;
    # on independent spike-free windows the exceedance fraction must match alpha within ~4 binomial s.e.
    plan = plan_detectability(indicator="GCaMP6f", frame_rates=(15.0, 30.0), noise_sd=(0.05, 0.2), n_trials=20,
                              intervals_s=(0.5,), false_positive_rate=0.01, seed=1)
    n_windows = 10000  # max(2000, 100 / alpha)
    se = math.sqrt(0.01 * 0.99 / n_windows)
    assert np.all(np.abs(plan.achieved_false_positive_rate - 0.01) < 4 * se + 0.002)


def test_gcamp6s_like_single_spikes_are_almost_always_detected_at_typical_noise():
    # Chen et al. 2013, Nature 499:295 (values from memory): with GCaMP6s in vivo (single-spike ΔF/F ~ 23 %,
    # half-decay ~ 0.55 s) single action potentials were detected in nearly all cases (>= 90 %) at a 1 %
    # false-positive rate, at frame rates of ~15-30 Hz and per-frame noise of a few to ~10 % ΔF/F
    # (typical two-photon noise; common practice).
    plan = plan_detectability(indicator="GCaMP6s", frame_rates=(15.0, 30.0), noise_sd=(0.05, 0.1), n_trials=100,
                              intervals_s=(0.5,), false_positive_rate=0.01, seed=0)
    assert isinstance(plan, DetectabilityPlan)
    assert np.all(plan.detection >= 0.9), plan.detection


def test_faster_indicator_resolves_shorter_intervals_than_a_slower_one():
    # Chen et al. 2013, Nature 499:295 (from memory): GCaMP6f, the fastest variant, follows spikes in
    # trains at higher rates than the slow GCaMP6s. Same seed -> same noise for both (common random numbers).
    # At 30 Hz the frame interval (33 ms) limits both indicators alike near one frame, so the shortest
    # resolved interval may tie there; over the swept intervals the fast indicator must still do better.
    common = dict(frame_rates=(30.0, 60.0), noise_sd=(0.05,), n_trials=100, intervals_s=SHORT_INTERVALS, seed=3)
    fast = plan_detectability(indicator="GCaMP6f", **common)
    slow = plan_detectability(indicator="GCaMP6s", **common)
    assert np.all(fast.shortest_resolved_interval_s <= slow.shortest_resolved_interval_s)
    assert fast.shortest_resolved_interval_s[1, 0] < slow.shortest_resolved_interval_s[1, 0]
    assert np.all(fast.resolved.mean(axis=-1) > slow.resolved.mean(axis=-1))


def test_two_spikes_within_one_frame_are_rarely_told_apart():
    # Geometry of frame sampling (worked by hand): two spikes delta apart fall into different frame
    # intervals with probability delta * frame_rate when delta < 1 / frame_rate; a frame-resolution
    # inference cannot separate them otherwise. At 7.5 Hz and 20 ms that is 0.15.
    plan = plan_detectability(indicator="GCaMP6f", frame_rates=(7.5,), noise_sd=(0.02,), n_trials=200,
                              intervals_s=(0.02, 1.0), seed=2)
    p = 0.02 * 7.5
    upper = p + 4 * math.sqrt(p * (1 - p) / 200)
    assert plan.resolved[0, 0, 0] <= upper
    assert plan.resolved[0, 0, 1] >= 0.9


def test_detection_falls_as_noise_grows():
    # Common practice: detectability is set by the single-spike signal-to-noise ratio.
    plan = plan_detectability(indicator="GCaMP6f", frame_rates=(30.0,), noise_sd=(0.05, 0.15, 0.3), n_trials=150,
                              intervals_s=(0.5,), seed=4)
    d = plan.detection[0]
    assert d[0] > d[1] > d[2]
    assert d[0] >= 0.95 and d[2] < 0.5


def test_timing_is_more_precise_at_higher_frame_rates():
    # Common practice: spike timing from imaging is limited by the frame interval (and the noise).
    plan = plan_detectability(indicator="GCaMP6f", frame_rates=(10.0, 60.0), noise_sd=(0.03,), n_trials=150,
                              intervals_s=(0.5,), seed=5)
    slow, fast = plan.timing_sd_s[:, 0]
    assert fast < slow
    assert np.all(plan.timing_sd_se_s[:, 0] < 0.3 * plan.timing_sd_s[:, 0])


def test_photon_budget_sets_the_noise_by_shot_noise():
    # Shot-noise limit (Poisson statistics): N photons per frame give a relative s.d. of 1 / sqrt(N).
    plan = plan_detectability(indicator="GCaMP6f", frame_rates=(30.0,), photons_per_frame=(100.0, 400.0),
                              n_trials=150, intervals_s=(0.5,), seed=6)
    assert plan.noise_sd == pytest.approx((0.1, 0.05))
    assert plan.photons_per_frame == (100.0, 400.0)
    gaussian = plan_detectability(indicator="GCaMP6f", frame_rates=(30.0,), noise_sd=(0.05,), n_trials=150,
                                  intervals_s=(0.5,), seed=6)
    assert plan.detection[0, 0] < plan.detection[0, 1]
    assert abs(plan.detection[0, 1] - gaussian.detection[0, 0]) < 0.1


def test_same_seed_gives_the_same_plan():
    kwargs = dict(kernel=Kernel(0.02, 0.3, 0.15), frame_rates=(20.0,), noise_sd=(0.08,), n_trials=40,
                  intervals_s=(0.1, 0.3))
    a = plan_detectability(seed=9, **kwargs)
    b = plan_detectability(seed=9, **kwargs)
    assert np.array_equal(a.detection, b.detection) and np.array_equal(a.resolved, b.resolved)
    assert np.allclose(np.array(a.rows(), float), np.array(b.rows(), float), equal_nan=True)
    text = str(a)
    assert "20" in text and "Wilson" in text


@pytest.mark.parametrize("kwargs, match", [
    (dict(noise_sd=0.1, photons_per_frame=100.0), "either noise_sd or photons_per_frame"),
    (dict(kernel=Kernel(0.02, 0.3, 0.1), indicator="GCaMP6f"), "either kernel or indicator"),
    (dict(frame_rates=(30.0, -1.0)), "frame_rates"),
    (dict(false_positive_rate=0.7), "false_positive_rate"),
    (dict(n_trials=1), "n_trials"),
    (dict(intervals_s=()), "intervals_s"),
    (dict(resolve_fraction=1.5), "resolve_fraction"),
    (dict(kernel=Kernel(0.02, 0.3, 0.1, slow_decay_s=2.0, slow_fraction=0.2)), "slow decay"),
])
def test_bad_arguments_are_named(kwargs, match):
    with pytest.raises(ValueError, match=match):
        plan_detectability(**kwargs)


def test_more_noise_never_resolves_shorter_intervals():
    # Common practice: noise can only blur two nearby spikes together; with the split threshold calibrated on
    # single spikes, extra noise must not make a pair look more resolvable (a single spike split by noise
    # would otherwise pass for two).
    plan = plan_detectability(indicator="GCaMP6s", frame_rates=(20.0, 40.0), noise_sd=(0.03, 0.09),
                              n_trials=80, intervals_s=(0.035, 0.05, 0.075, 0.1, 0.15, 0.25, 0.5), seed=1)
    quiet, noisy = plan.shortest_resolved_interval_s[:, 0], plan.shortest_resolved_interval_s[:, 1]
    assert np.all(np.nan_to_num(noisy, nan=np.inf) >= quiet)


@pytest.mark.parametrize("rates, match", [
    ((30.0, 1e6), r"frame_rates=1000000.0 Hz is above the range of calcium imaging"),
    ((1 / 30,), r"frame_rates=0.0333+ Hz is below.*the frame rate is 1/0.0333+ = 30 Hz"),
    ((1e-300,), r"frame_rates=1e-300 Hz is below"),
])
def test_implausible_frame_rates_are_refused(rates, match):
    with pytest.raises(ValueError, match=match):
        plan_detectability(indicator="GCaMP6f", frame_rates=rates, n_trials=20)


def test_a_plan_beyond_the_machine_is_refused_before_simulating():
    import tracemalloc

    # 20 kHz with a one-in-a-million false-positive rate: 2e7 single-spike trials of ~1e5 frames each.
    tracemalloc.start()
    try:
        with pytest.raises(ValueError, match=r"plan_detectability with frame_rates up to 20000 Hz, n_trials=20 and "
                                             r"false_positive_rate=1e-06 would need about .* of memory, more than"
                                             r".*raise false_positive_rate"):
            plan_detectability(indicator="GCaMP6f", frame_rates=(30.0, 20000.0), n_trials=20,
                               false_positive_rate=1e-6)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 20e6
