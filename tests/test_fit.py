"""Tests for calcium.fit: kernel fitting from known spikes, clock lag, intervals, kinetics check.

Ground truth comes from the forward model (calcium.forward.simulate_recording): the kinetics, the
amplitude and the clock offset used to make the data are known exactly.
"""
import dataclasses
import warnings

import numpy as np
import pytest

from calcium.fit import KernelFit, check_kinetics, fit_kernel
from calcium.forward import simulate_recording
from calcium.indicators import get_indicator
from calcium.kernel import Kernel


def _recording(indicator, *, frame_rate, duration_s, seed, snr=3.0, rate_hz=0.5, kernel=None):
    kernel = Kernel.from_indicator(indicator) if kernel is None else kernel
    rec = simulate_recording(1, duration_s, frame_rate, kernel=kernel, rate_hz=rate_hz,
                             noise_sd=kernel.amplitude / snr, seed=seed)
    return rec.dff[0], rec.spike_times[0], kernel


# --------------------------------------------------------------------------- accuracy
@pytest.mark.parametrize("indicator, frame_rate, lag_s", [("GCaMP6s", 30.0, 0.05), ("GCaMP6f", 60.0, -0.08)])
def test_kinetics_amplitude_and_clock_offset_are_recovered_at_single_spike_snr_3(indicator, frame_rate, lag_s):
    # Reference: the forward model's own parameters (known truth). Single-spike SNR 3 = amplitude / noise s.d.
    dff, true_times, kernel = _recording(indicator, frame_rate=frame_rate, duration_s=120.0, seed=11)
    given = true_times - lag_s  # the spike clock runs `lag_s` behind the frames
    fit = fit_kernel(dff, given, frame_rate, kernel=indicator, n_bootstrap=0)
    assert isinstance(fit, KernelFit)
    assert fit.kernel.decay_s == pytest.approx(kernel.decay_s, rel=0.10)
    assert fit.kernel.rise_s == pytest.approx(kernel.rise_s, rel=0.35)
    assert fit.kernel.amplitude == pytest.approx(kernel.amplitude, rel=0.15)
    assert abs(fit.lag_s - lag_s) < 1.0 / frame_rate
    assert fit.converged and fit.n_spikes == true_times.size
    assert fit.r_squared > 0 and fit.residual_sd == pytest.approx(kernel.amplitude / 3, rel=0.1)
    assert fit.usable and fit.response_p_value <= 0.01 and "responds to the spikes beyond chance" in fit.verdict
    assert fit.require_usable() is fit


def test_a_large_clock_offset_is_found_without_an_initial_kernel():
    # Lag of 0.4 s, generic start (no indicator given): the cross-correlation first guess must find it.
    dff, true_times, kernel = _recording("GCaMP6f", frame_rate=30.0, duration_s=90.0, seed=5)
    fit = fit_kernel(dff, true_times - 0.4, 30.0, n_bootstrap=0, max_lag_s=1.0)
    assert abs(fit.lag_initial_s - 0.4) < 3 / 30.0
    assert abs(fit.lag_s - 0.4) < 1 / 30.0
    assert fit.kernel.half_decay_s == pytest.approx(kernel.half_decay_s, rel=0.15)


def test_bootstrap_intervals_cover_the_truth_in_most_seeded_repeats():
    # Reference: the definition of a 90 % confidence interval (it should contain the true value in
    # about 90 % of repeats); we require >= 80 % of 30 repeats for each of rise, decay, amplitude, lag.
    # Short traces (120 s, ~45 segments) and 40 bootstrap refits keep this test at ~10 s.
    kernel = Kernel.from_indicator("GCaMP6s")
    lag_s = 0.05
    truth = dict(rise_s=kernel.rise_s, decay_s=kernel.decay_s, amplitude=kernel.amplitude, lag_s=lag_s)
    covered = dict.fromkeys(truth, 0)
    for repeat in range(30):
        dff, times, _ = _recording("GCaMP6s", frame_rate=30.0, duration_s=120.0, seed=100 + repeat)
        fit = fit_kernel(dff, times - lag_s, 30.0, kernel="GCaMP6s", n_bootstrap=40, confidence=0.9, seed=repeat)
        assert fit.confidence.level == 0.9 and fit.confidence.n_bootstrap >= 35
        for name, value in truth.items():
            covered[name] += fit.confidence.covers(name, value)
    assert all(count >= 24 for count in covered.values()), covered


def test_isolated_spike_amplitudes_scatter_as_least_squares_theory_predicts():
    # Reference: least-squares theory: the amplitude of one response u in white noise of s.d. sigma has
    # s.d. sigma / ||u||. The per-spike amplitudes must centre on the true amplitude with that spread.
    kernel = Kernel.from_indicator("GCaMP6s")
    dff, times, _ = _recording("GCaMP6s", frame_rate=30.0, duration_s=240.0, seed=3, rate_hz=0.3)
    fit = fit_kernel(dff, times, 30.0, kernel="GCaMP6s", n_bootstrap=0)
    amps = fit.per_spike_amplitude
    assert amps.size == fit.n_isolated >= 20
    unit = kernel.impulse_response(30.0, 200) / kernel.amplitude
    expected_sd = (kernel.amplitude / 3) / np.linalg.norm(unit)
    assert np.median(amps) == pytest.approx(kernel.amplitude, rel=0.1)
    assert np.std(amps, ddof=1) == pytest.approx(expected_sd, rel=0.35)


def test_free_form_response_matches_the_kernel_averaged_over_sub_frame_delays():
    # Reference: the true kernel (Kernel.evaluate); with spikes binned to the first frame after them,
    # sample j of the free-form response estimates the mean over spikes of h(j / rate + delay_i).
    fr = 30.0
    dff, times, kernel = _recording("GCaMP6f", frame_rate=fr, duration_s=120.0, seed=2, snr=10.0, rate_hz=1.0)
    fit = fit_kernel(dff, times, fr, model="free", kernel="GCaMP6f", n_bootstrap=0, free_length_s=0.8)
    assert fit.model == "free" and isinstance(fit.kernel, Kernel)
    aligned = times + fit.lag_s  # the fitted lag is ~0 here but enters the binning
    delays = np.ceil(aligned * fr - 1e-9) / fr - aligned
    j = np.arange(fit.impulse_response.size)
    expected = kernel.evaluate(j[:, None] / fr + delays[None, :]).mean(axis=1)
    assert np.max(np.abs(fit.impulse_response - expected)) < 0.1 * kernel.amplitude
    assert fit.impulse_time_s == pytest.approx(j / fr + delays.mean())
    assert fit.free_r_squared > 0.5


def test_a_linear_indicator_responds_to_groups_of_spikes_in_proportion():
    # Reference: linearity of the forward model without saturation (responses add).
    kernel = Kernel.from_indicator("GCaMP6f")
    rec = simulate_recording(1, 200.0, 30.0, kernel=kernel, rate_hz=0.6, spike_model="bursts", burst_size_mean=2.0,
                             burst_isi_s=0.02, noise_sd=0.02, seed=8)
    fit = fit_kernel(rec.dff[0], rec.spike_times[0], 30.0, kernel="GCaMP6f", n_bootstrap=0, isolation_s=0.4,
                     burst_window_s=0.05)
    ratios = {n: ratio for n, count, ratio in fit.burst_linearity if count >= 3}
    assert 1 in ratios and 2 in ratios
    assert all(abs(r - 1) < 0.15 for r in ratios.values()), ratios


# --------------------------------------------------------------------------- missing frames and bad input
def test_missing_frames_are_left_out_of_the_fit():
    # Whatever the samples at missing frames were, the fit must not change: two traces that differ only at
    # frames marked NaN give the same result.
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=60.0, seed=4)
    rng = np.random.default_rng(0)
    missing = rng.random(dff.size) < 0.1
    a = np.where(missing, np.nan, dff)
    b = np.where(missing, np.nan, dff + 5.0 * missing)  # different values, then hidden again
    fit_a = fit_kernel(a, times, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    fit_b = fit_kernel(b, times, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert fit_a.n_missing_frames == int(missing.sum())
    assert fit_a.kernel == fit_b.kernel and fit_a.lag_s == fit_b.lag_s
    full = fit_kernel(dff, times, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert fit_a.kernel.decay_s == pytest.approx(full.kernel.decay_s, rel=0.1)


def test_unsorted_spike_times_are_sorted_with_a_warning():
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=40.0, seed=6)
    shuffled = np.random.default_rng(1).permutation(times)
    with pytest.warns(UserWarning, match="ascending"):
        fit = fit_kernel(dff, shuffled, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    ref = fit_kernel(dff, times, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert fit.kernel == ref.kernel


def test_spikes_slightly_outside_the_trace_are_counted_and_ignored():
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=40.0, seed=6)
    extra = np.sort(np.concatenate([times, [-5.0, 41.5, 42.0]]))
    with pytest.warns(UserWarning, match="3 spike time"):
        fit = fit_kernel(dff, extra, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert fit.n_ignored_spikes == 3 and fit.n_spikes == times.size


def test_spikes_from_a_longer_recording_are_refused_with_a_clear_message():
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=40.0, seed=6)
    # e.g. the trace was imaged at 30 Hz but read as 90 Hz: the spikes run three times too long
    with pytest.raises(ValueError, match="same recording"):
        fit_kernel(dff[: dff.size // 3], times, 30.0, n_bootstrap=0)


def test_no_spikes_or_too_few_isolated_spikes_raise_with_the_counts():
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=40.0, seed=6)
    with pytest.raises(ValueError, match="no spikes"):
        fit_kernel(dff, [], 30.0)
    burst = np.array([10.0, 10.05, 10.1, 20.0, 20.05])  # no spike is isolated, and 5 spikes in all
    with pytest.raises(ValueError, match=r"found 0 isolated spike\(s\).*at least 3 isolated spikes, or at least "
                                         r"min_spikes=10 spikes in all"):
        fit_kernel(dff, burst, 30.0, isolation_s=0.3)


@pytest.mark.parametrize("kwargs, match", [
    (dict(model="spline"), "model"),
    (dict(confidence=1.5), "confidence"),
    (dict(max_lag_s=0.0), "max_lag_s"),
    (dict(n_bootstrap=-1), "n_bootstrap"),
    (dict(kernel=3.0), "kernel"),
    (dict(kernel="no-such-indicator"), "unknown indicator"),
])
def test_bad_arguments_are_named(kwargs, match):
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=20.0, seed=6)
    with pytest.raises(ValueError, match=match):
        fit_kernel(dff, times, 30.0, **kwargs)


def test_several_rois_at_once_are_refused():
    with pytest.raises(ValueError, match="one ROI"):
        fit_kernel(np.zeros((2, 100)), [1.0], 30.0)


# --------------------------------------------------------------------------- check_kinetics
def test_published_kernel_passes_its_own_check():
    # Reference: calcium.indicators (Chen et al. 2013 values, from memory, as tabulated there).
    check = check_kinetics(Kernel.from_indicator("GCaMP6s"), "GCaMP6s")
    assert check.ok and not check.messages
    assert [r.quantity for r in check.rows] == ["time to peak", "half-decay", "single-spike ΔF/F"]
    assert all(r.ratio == pytest.approx(1.0, rel=1e-6) for r in check.rows)
    assert "GCaMP6s" in str(check) and "ok" in str(check)


def test_times_off_by_one_factor_point_to_the_frame_rate():
    # A frame rate 2.5 x too low in the metadata stretches every time by 2.5 (dimensional analysis).
    k = Kernel.from_indicator("GCaMP6f")
    stretched = Kernel(k.rise_s * 2.5, k.decay_s * 2.5, k.amplitude)
    check = check_kinetics(stretched, "GCaMP6f")
    assert not check.ok
    assert check.rows[0].ratio == pytest.approx(2.5, rel=1e-6) and check.rows[1].ratio == pytest.approx(2.5)
    assert any("frame rate" in m for m in check.messages)
    assert "OUTSIDE" in str(check) and "Likely causes" in str(check)


def test_low_amplitude_points_to_neuropil_or_f0():
    k = Kernel.from_indicator("GCaMP6f")
    check = check_kinetics(k.scaled(k.amplitude / 5), "GCaMP6f")
    assert not check.ok and not check.rows[2].ok
    assert any("neuropil" in m and "F0" in m for m in check.messages)


def test_slow_decay_in_a_cold_recording_points_to_temperature():
    row = get_indicator("GCaMP6f")
    k = Kernel.from_indicator("GCaMP6f")
    slow = Kernel(k.rise_s, k.decay_s * 3.0, k.amplitude)
    check = check_kinetics(slow, row, temperature_c=22.0)
    assert not check.ok
    assert any("temperature" in m and "22" in m for m in check.messages)


def test_saturating_indicator_with_bursts_is_flagged_as_saturation():
    # Reference: the Hill-type saturation of the forward model (Kernel.saturate): bursts respond less than
    # the sum of single spikes, which the fit reports in burst_linearity and check_kinetics explains.
    k = dataclasses.replace(Kernel.from_indicator("GCaMP6f"), dff_max=0.6)
    rec = simulate_recording(1, 120.0, 30.0, kernel=k, rate_hz=1.5, spike_model="bursts", burst_size_mean=3,
                             burst_isi_s=0.02, noise_sd=0.03, seed=4)
    fit = fit_kernel(rec.dff[0], rec.spike_times[0], 30.0, kernel="GCaMP6f", n_bootstrap=0, isolation_s=0.3,
                     burst_window_s=0.1)
    ratios = [ratio for n, count, ratio in fit.burst_linearity if n >= 3 and count >= 2]
    assert ratios and max(ratios) < 0.8
    check = check_kinetics(fit, "GCaMP6f")
    assert any("saturat" in m for m in check.messages)


def test_check_kinetics_refuses_other_objects():
    with pytest.raises(ValueError, match="KernelFit or a Kernel"):
        check_kinetics({"decay_s": 1.0}, "GCaMP6f")


# --------------------------------------------------------------------------- busy cells
def _double_exponential_sum(times_s, spikes_s, rise_s, decay_s, amplitude):
    """Sum over spikes of amplitude * (exp(-t/decay) - exp(-t/rise)) / peak, written out here (not calcium.forward);
    the peak of the bracket is at t* = ln(decay/rise) rise decay / (decay - rise) (handbook calculus)."""
    t_peak = np.log(decay_s / rise_s) * rise_s * decay_s / (decay_s - rise_s)
    peak = np.exp(-t_peak / decay_s) - np.exp(-t_peak / rise_s)
    delay = times_s[:, None] - spikes_s[None, :]
    after = np.maximum(delay, 0.0)
    responses = np.where(delay >= 0, (np.exp(-after / decay_s) - np.exp(-after / rise_s)) / peak, 0.0)
    return amplitude * responses.sum(axis=1)


def test_a_cell_firing_at_3_hz_without_isolated_spikes_is_fitted_through_its_summed_responses():
    # Ground truth: the double-exponential sum above. 3 Hz with gamma(4) intervals (CV 0.5): no spike has the
    # default 0.8 s of quiet on both sides, so the isolated-spike requirement alone would refuse the cell.
    rise, decay, amplitude, frame_rate = 0.05, 0.4, 0.2, 30.0
    rng = np.random.default_rng(21)
    spikes = 1.0 + np.cumsum(rng.gamma(4.0, 1.0 / 12.0, size=360))
    times = np.arange(int((spikes[-1] + 3.0) * frame_rate)) / frame_rate
    dff = _double_exponential_sum(times, spikes, rise, decay, amplitude) + rng.normal(0.0, amplitude / 4, times.size)
    fit = fit_kernel(dff, spikes, frame_rate, isolation_s=0.8, n_bootstrap=0)
    assert fit.n_isolated < 3 and fit.n_spikes == spikes.size
    # Tolerances as for isolated spikes at single-spike SNR 3 (decay 10 %, rise 35 %, amplitude 15 %), tighter
    # where the many spikes allow it.
    assert fit.kernel.decay_s == pytest.approx(decay, rel=0.10)
    assert fit.kernel.rise_s == pytest.approx(rise, rel=0.35)
    assert fit.kernel.amplitude == pytest.approx(amplitude, rel=0.10)
    assert abs(fit.lag_s) < 1.0 / frame_rate
    assert fit.usable and "busy cell: " in fit.verdict and f"all {spikes.size} spikes" in fit.verdict


def test_a_busy_cell_needs_min_spikes_in_all():
    rng = np.random.default_rng(22)
    spikes = 1.0 + np.cumsum(rng.gamma(4.0, 1.0 / 12.0, size=8))
    times = np.arange(int((spikes[-1] + 3.0) * 30.0)) / 30.0
    dff = _double_exponential_sum(times, spikes, 0.05, 0.4, 0.2) + rng.normal(0.0, 0.05, times.size)
    with pytest.raises(ValueError, match=r"among 8 spikes.*min_spikes=10"):
        fit_kernel(dff, spikes, 30.0, isolation_s=0.8, n_bootstrap=0)
    fit = fit_kernel(dff, spikes, 30.0, isolation_s=0.8, n_bootstrap=0, min_spikes=8)
    assert fit.n_spikes == 8


# --------------------------------------------------------------------------- verdict
def test_pure_noise_gives_an_unusable_fit_that_says_why():
    rng = np.random.default_rng(5)
    noise = rng.normal(0.0, 0.05, 3600)
    _, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=120.0, seed=7)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_kernel(noise, times, 30.0, n_bootstrap=0)
    assert not fit.usable
    assert "does not respond to these spikes more than to the same spikes shifted in time" in fit.verdict
    with pytest.raises(ValueError, match="the kernel fit is not usable: the trace does not respond"):
        fit.require_usable()
    assert "NOT USABLE" in str(fit)


def test_another_cells_spikes_give_an_unusable_fit():
    rec = simulate_recording(2, 180.0, 30.0, indicator="GCaMP6f", rate_hz=0.8, noise_sd=0.05, seed=12)
    fit = fit_kernel(rec.dff[0], rec.spike_times[1], 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert not fit.usable and fit.signal_explained < 0.3
    own = fit_kernel(rec.dff[0], rec.spike_times[0], 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert own.usable and own.signal_explained > 0.6


def test_shifted_spike_p_values_are_not_small_for_unrelated_trains_more_often_than_stated():
    # Reference: the definition of a p-value: under the null hypothesis P(p <= alpha) <= alpha. 40 traces each
    # fitted to an independent spike train: at most 2 + 2 binomial s.d. of them may have p <= 0.05 (about 5).
    small = 0
    for seed in range(40):
        rec = simulate_recording(1, 120.0, 15.0, indicator="GCaMP6s", rate_hz=1.0, noise_sd=0.05, seed=seed)
        other = simulate_recording(1, 120.0, 15.0, indicator="GCaMP6s", rate_hz=1.0, seed=1000 + seed)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fit = fit_kernel(rec.dff[0], other.spike_times[0], 15.0, kernel="GCaMP6s", n_bootstrap=0)
        except ValueError:  # nothing rises after the spikes: certainly no response
            continue
        small += fit.response_p_value <= 0.05
    assert small <= 5


def test_a_clock_offset_beyond_the_search_range_is_reported_at_the_edge():
    # A true offset of 1.5 s with max_lag_s=1: the lag can only reach the bound; the fit must say so. (A slow
    # indicator, so that spikes 1 s off still overlap their responses and a fit is found.)
    dff, true_times, _ = _recording("GCaMP6s", frame_rate=30.0, duration_s=120.0, seed=9)
    given = true_times - 1.5
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_kernel(dff, given, 30.0, kernel="GCaMP6s", n_bootstrap=0, max_lag_s=1.0)
        wider = fit_kernel(dff, given, 30.0, kernel="GCaMP6s", n_bootstrap=0, max_lag_s=2.0)
    assert fit.lag_at_edge and not fit.usable
    assert "sits at the edge of the search range (max_lag_s=1 s)" in fit.verdict
    assert "refit with a wider max_lag_s (e.g. 2)" in fit.verdict and "AT THE EDGE" in str(fit)
    assert abs(wider.lag_s - 1.5) < 1 / 30.0 and not wider.lag_at_edge and wider.usable
    # a fast indicator 1.5 s off gives nothing to fit within 1 s: the error points at max_lag_s
    dff, true_times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=120.0, seed=9)
    with pytest.raises(ValueError, match=r"at any lag within max_lag_s=1 s.*widen max_lag_s"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fit_kernel(dff, true_times - 1.5, 30.0, kernel="GCaMP6f", n_bootstrap=0, max_lag_s=1.0)


def test_the_former_name_of_the_starting_kernel_still_works_with_a_deprecation_warning():
    dff, times, _ = _recording("GCaMP6f", frame_rate=30.0, duration_s=20.0, seed=6)
    with pytest.warns(DeprecationWarning, match="kernel="):
        old = fit_kernel(dff, times, 30.0, initial="GCaMP6f", n_bootstrap=0)
    new = fit_kernel(dff, times, 30.0, kernel="GCaMP6f", n_bootstrap=0)
    assert old.kernel == new.kernel and old.lag_s == new.lag_s
    with pytest.raises(ValueError, match="not both"):
        fit_kernel(dff, times, 30.0, initial="GCaMP6f", kernel="GCaMP6f")
