"""Tests of calcium.forward: exact forward model and the simulated recordings."""
import dataclasses
import inspect
import json
import math
import warnings

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import minimize_scalar

from calcium.forward import (BaselineModel, NoiseModel, SpikeModel, _linear_rows, _linear_rows_lfilter,
                             _predict_direct, _run_recursions, _slow_drift, predict_fluorescence, simulate_recording,
                             summed_response)
from calcium.kernel import Kernel


def analytic_double_exponential(delay, rise, decay, amplitude):
    """Closed form of a normalised difference of exponentials (0 before the spike)."""
    t_peak = math.log(decay / rise) * rise * decay / (decay - rise)  # handbook calculus
    peak = math.exp(-t_peak / decay) - math.exp(-t_peak / rise)
    d = np.maximum(delay, 0.0)
    return np.where(delay >= 0, amplitude * (np.exp(-d / decay) - np.exp(-d / rise)) / peak, 0.0)


def analytic_slow(delay, rise, decay, slow, fraction, amplitude):
    """Weighted sum of two double exponentials, normalised by a numerically found peak (scipy)."""
    def shape(t):
        return (1 - fraction) * (np.exp(-t / decay) - np.exp(-t / rise)) + fraction * (np.exp(-t / slow)
                                                                                     - np.exp(-t / rise))
    peak = -minimize_scalar(lambda t: -shape(t), bounds=(0, 2 * decay), method="bounded",
                            options={"xatol": 1e-13}).fun
    d = np.maximum(delay, 0.0)
    return np.where(delay >= 0, amplitude * shape(d) / peak, 0.0)


# ------------------------------------------------------------ point samples
@pytest.mark.parametrize("scan_offset_s", [0.0, 0.0123])
def test_point_samples_of_a_sub_frame_spike_equal_the_analytic_expression(scan_offset_s):
    frame_rate, n = 30.0, 120
    kernel = Kernel(0.04, 0.35, 0.3)
    frame_times = np.arange(n) / frame_rate + scan_offset_s
    for spike in (0.0, 0.51234567, 1.0 / 3.0 + 1e-7, 2.9):
        got = predict_fluorescence([spike], kernel, frame_rate, n, scan_offset_s=scan_offset_s)
        expected = analytic_double_exponential(frame_times - spike, 0.04, 0.35, 0.3)
        np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-12)


def test_point_samples_with_instantaneous_rise_and_a_spike_on_a_frame_time():
    frame_rate, n = 20.0, 60
    kernel = Kernel(0.0, 0.5, 0.25)
    spikes = [0.5, 0.77]  # the first falls exactly on frame 10
    got = predict_fluorescence(spikes, kernel, frame_rate, n)
    t = np.arange(n) / frame_rate
    # closed form of a single exponential, counted from the spike on (right-continuous jump)
    expected = sum(np.where(t >= s, 0.25 * np.exp(-(t - s) / 0.5), 0.0) for s in spikes)
    np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-15)
    assert got[10] == pytest.approx(0.25, rel=1e-12)


def test_point_samples_with_a_slow_component_equal_the_analytic_expression():
    frame_rate, n = 15.0, 200
    kernel = Kernel(0.03, 0.2, 0.4, slow_decay_s=1.8, slow_fraction=0.3)
    spikes = np.array([0.111, 3.0071, 3.05, 7.77])
    t = np.arange(n) / frame_rate
    expected = sum(analytic_slow(t - s, 0.03, 0.2, 1.8, 0.3, 0.4) for s in spikes)
    np.testing.assert_allclose(predict_fluorescence(spikes, kernel, frame_rate, n), expected, rtol=1e-9, atol=1e-12)


def test_spikes_before_the_first_sample_time_still_count():
    kernel = Kernel(0.02, 0.3)
    got = predict_fluorescence([0.001], kernel, 10.0, 5, scan_offset_s=0.05)
    expected = analytic_double_exponential(np.arange(5) / 10.0 + 0.05 - 0.001, 0.02, 0.3, 1.0)
    np.testing.assert_allclose(got, expected, rtol=1e-9)


# -------------------------------------------------------------- exposures
@pytest.mark.parametrize("kernel", [Kernel(0.03, 0.4, 0.2), Kernel(0.0, 0.4, 0.2),
                                    Kernel(0.01, 0.15, 0.5, slow_decay_s=1.0, slow_fraction=0.25)],
                         ids=["double", "single", "slow"])
def test_exposure_averages_equal_quad_of_the_kernel(kernel):
    frame_rate, n, exposure, offset = 25.0, 40, 0.03, 0.002
    frame_times = np.arange(n) / frame_rate + offset
    # spikes: before a window, exactly inside windows (frames 5 and 17), between windows, and one in the
    # last frame's window
    spikes = np.array([0.01, frame_times[5] + 0.3 * exposure, frame_times[17] + 0.9 * exposure,
                       frame_times[17] + 0.035, frame_times[-1] + 0.5 * exposure])
    got = predict_fluorescence(spikes, kernel, frame_rate, n, scan_offset_s=offset, exposure_s=exposure)

    def response(t):
        return float(sum(kernel.evaluate(t - s) for s in spikes))

    for k in range(n):
        lo, hi = frame_times[k], frame_times[k] + exposure
        inside = [s for s in spikes if lo < s < hi]
        # Reference: scipy.integrate.quad of the summed kernel over the exposure window.
        integral, _ = quad(response, lo, hi, points=inside or None, epsabs=1e-14, epsrel=1e-13, limit=200)
        assert got[k] == pytest.approx(integral / exposure, rel=1e-9, abs=1e-13), k


def test_exposure_of_one_full_frame_interval_is_allowed_and_longer_is_refused():
    kernel = Kernel(0.03, 0.4)
    predict_fluorescence([0.1], kernel, 10.0, 5, exposure_s=0.1)
    with pytest.raises(ValueError, match="exposure_s"):
        predict_fluorescence([0.1], kernel, 10.0, 5, exposure_s=0.11)


# ---------------------------------------------------- superposition, order
def test_response_to_a_train_is_the_sum_of_single_spike_responses():
    rng = np.random.default_rng(3)
    spikes = rng.uniform(0, 20, 40)
    kernel = Kernel(0.05, 0.6, 0.2)
    for exposure in (None, 0.02):
        train = predict_fluorescence(spikes, kernel, 30.0, 600, exposure_s=exposure)
        singles = sum(predict_fluorescence([s], kernel, 30.0, 600, exposure_s=exposure) for s in spikes)
        np.testing.assert_allclose(train, singles, rtol=1e-12, atol=1e-14)


def test_fast_recursion_matches_the_plain_sum_reference():
    rng = np.random.default_rng(4)
    spikes = np.concatenate([rng.uniform(0, 60, 150), [10.0, 10.0, 10.0]])  # repeated times add up
    for kernel in (Kernel(0.02, 0.3, 0.2), Kernel(0.0, 1.0, 0.1),
                   Kernel(0.02, 0.3, 0.2, slow_decay_s=2.0, slow_fraction=0.2, dff_max=1.5, hill_n=2.0,
                          hill_k=2.5)):
        fast = predict_fluorescence(spikes, kernel, 30.0, 1800, scan_offset_s=0.004)
        plain = _predict_direct(spikes, kernel, 30.0, 1800, scan_offset_s=0.004)
        np.testing.assert_allclose(fast, plain, rtol=1e-10, atol=1e-13)


@pytest.mark.parametrize("exposure", [None, 0.025])
def test_compiled_recursions_match_the_plain_python_and_lfilter_references(exposure):
    rng = np.random.default_rng(6)
    n_rows, n_frames, frame_rate = 3, 400, 30.0
    kernel = Kernel(0.02, 0.3, 0.2, slow_decay_s=2.0, slow_fraction=0.2)
    rows = np.repeat(np.arange(n_rows), [25, 0, 40])  # the middle row has no spikes
    times = rng.uniform(0, n_frames / frame_rate, rows.size)
    offsets = np.array([0.0, 0.01, 0.02])[rows]
    args = (times, rows, n_rows, kernel, frame_rate, n_frames, offsets, exposure)
    compiled = _linear_rows(*args)
    plain = _linear_rows(*args, recursions=_run_recursions.py_func)  # the same loop, not compiled
    vectorised = _linear_rows_lfilter(*args)  # bincount + scipy.signal.lfilter
    np.testing.assert_allclose(compiled, plain, rtol=1e-13, atol=1e-16)
    np.testing.assert_allclose(compiled, vectorised, rtol=1e-12, atol=1e-15)
    assert np.all(compiled[1] == 0)


def test_unsorted_spike_times_give_the_same_prediction():
    rng = np.random.default_rng(5)
    spikes = rng.uniform(0, 10, 30)
    kernel = Kernel(0.05, 0.5)
    np.testing.assert_array_equal(predict_fluorescence(spikes, kernel, 30.0, 300),
                                  predict_fluorescence(np.sort(spikes), kernel, 30.0, 300))


def test_saturation_is_applied_to_the_summed_linear_response():
    linear = Kernel(0.05, 0.5, 0.3)
    saturating = Kernel(0.05, 0.5, 0.3, dff_max=2.0, hill_n=2.4, hill_k=2.0)
    burst = 0.5 + 0.005 * np.arange(60)
    sat = predict_fluorescence(burst, saturating, 30.0, 150)
    np.testing.assert_allclose(sat, saturating.saturate(predict_fluorescence(burst, linear, 30.0, 150)), rtol=1e-14)
    assert sat.max() < 2.0 < predict_fluorescence(burst, linear, 30.0, 150).max()
    np.testing.assert_allclose(saturating.unsaturate(sat), predict_fluorescence(burst, linear, 30.0, 150),
                               rtol=1e-8, atol=1e-12)


# --------------------------------------------------------------- bad input
def test_spikes_after_the_end_are_ignored_with_a_count_in_a_warning():
    kernel = Kernel(0.05, 0.5)
    with pytest.warns(UserWarning, match="2 spike time"):
        got = predict_fluorescence([1.0, 10.0, 12.0], kernel, 10.0, 100)  # recording ends at 10 s
    np.testing.assert_array_equal(got, predict_fluorescence([1.0], kernel, 10.0, 100))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        predict_fluorescence([9.99], kernel, 10.0, 100)  # in the last frame interval: no warning


@pytest.mark.parametrize("spikes, kwargs, name", [
    ([-0.1], {}, "spike_times_s"),
    ([np.nan], {}, "spike_times_s"),
    ([np.inf], {}, "spike_times_s"),
    ([[0.1, 0.2]], {}, "spike_times_s"),
    (["a"], {}, "spike_times_s"),
    ([0.1], {"n_frames": 0}, "n_frames"),
    ([0.1], {"frame_rate": 0.0}, "frame_rate"),
    ([0.1], {"frame_rate": -30.0}, "frame_rate"),
    ([0.1], {"scan_offset_s": -0.01}, "scan_offset_s"),
    ([0.1], {"exposure_s": 0.0}, "exposure_s"),
    ([0.1], {"kernel": "GCaMP6s"}, "kernel"),
])
def test_bad_forward_arguments_raise_value_error_naming_them(spikes, kwargs, name):
    args = {"kernel": Kernel(0.05, 0.5), "frame_rate": 30.0, "n_frames": 100}
    args.update(kwargs)
    with pytest.raises(ValueError, match=name):
        predict_fluorescence(spikes, args.pop("kernel"), args.pop("frame_rate"), args.pop("n_frames"), **args)


@pytest.mark.parametrize("offset", [0.1, 0.5, 2.0])
def test_a_scan_offset_of_a_frame_or_more_is_refused(offset):
    # At 10 Hz a frame lasts 0.1 s: a scan offset is a delay within the frame, so it must be shorter.
    with pytest.raises(ValueError, match=rf"scan_offset_s={offset!r} s is not shorter than one frame interval "
                                         r"\(1/frame_rate = 0.1 s\).*shift the spike times instead"):
        predict_fluorescence([0.5], Kernel(0.02, 0.3), 10.0, 20, scan_offset_s=offset)
    with pytest.raises(ValueError, match=r"scan_offset_s\[1\]=.* s is not shorter than one frame interval"):
        simulate_recording(2, 5.0, 10.0, scan_offset_s=[0.0, offset])


def test_summed_response_keeps_spikes_before_the_first_frame():
    # Reference: the closed form of the double exponential at every frame time, for spikes on either side of 0.
    kernel = Kernel(0.02, 0.3, 0.5)
    spikes = np.array([-0.73, -0.04, 0.251, 1.0])
    frame_times = np.arange(30) / 10.0
    expected = sum(analytic_double_exponential(frame_times - s, 0.02, 0.3, 0.5) for s in spikes)
    np.testing.assert_allclose(summed_response(spikes, kernel, 10.0, 30), expected, rtol=1e-9, atol=1e-15)


def test_no_spikes_give_a_flat_zero_trace():
    np.testing.assert_array_equal(predict_fluorescence([], Kernel(0.05, 0.5), 30.0, 50), np.zeros(50))


# ------------------------------------------------------------ simulation
def test_simulated_recording_has_the_documented_fields_and_is_reproducible():
    kwargs = dict(indicator="GCaMP6f", spikes=SpikeModel(rate_hz=2.0),
                  noise=NoiseModel(photons_per_frame=50.0, read_noise_sd=0.5),
                  baseline=BaselineModel(bleach_fraction=0.3, drift_sd=0.05), scan_offset_s=np.linspace(0, 0.03, 5),
                  seed=11)
    a = simulate_recording(5, 30.0, 30.0, **kwargs)
    b = simulate_recording(5, 30.0, 30.0, **kwargs)
    for name in ("raw", "dff", "dff_clean", "f0"):
        assert getattr(a, name).shape == (5, 900)
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    assert len(a.spike_times) == 5 and a.frame_rate == 30.0 and a.kernel == Kernel.from_indicator("GCaMP6f")
    c = simulate_recording(5, 30.0, 30.0, **{**kwargs, "seed": 12})
    assert not np.array_equal(a.raw, c.raw)
    # spikes come from their own random stream: changing the noise leaves them unchanged
    d = simulate_recording(5, 30.0, 30.0, **{**kwargs, "noise": NoiseModel(noise_sd=0.1)})
    for x, y in zip(a.spike_times, d.spike_times):
        np.testing.assert_array_equal(x, y)
    # ROI i does not depend on how many ROIs are simulated
    e = simulate_recording(2, 30.0, 30.0, **{**kwargs, "scan_offset_s": kwargs["scan_offset_s"][:2]})
    np.testing.assert_array_equal(e.raw, a.raw[:2])


def test_params_record_every_argument_and_every_field_of_the_parameter_objects_and_are_json_serialisable():
    rec = simulate_recording(2, 5.0, 20.0, spikes=SpikeModel(rate_hz=[1.0, 2.0]), noise=NoiseModel(noise_sd=0.1),
                             seed=1)
    objects = {"spikes": SpikeModel, "baseline": BaselineModel, "noise": NoiseModel}
    for name, parameter in inspect.signature(simulate_recording).parameters.items():
        if name in objects:
            for field in dataclasses.fields(objects[name]):
                assert field.name in rec.params
        elif parameter.kind is not parameter.VAR_KEYWORD and name != "scan_offsets":  # (its former name)
            assert name in rec.params
    assert rec.params["rate_hz"] == [1.0, 2.0] and rec.params["noise_sd"] == 0.1 and rec.params["n_frames"] == 100
    assert rec.params["spike_model"] == "poisson" and rec.params["f0"] == 100.0
    json.dumps(rec.params)


def test_clean_dff_is_the_forward_model_of_the_returned_spikes():
    offsets = np.array([0.0, 0.01, 0.02])
    kernel = Kernel(0.03, 0.3, 0.2, dff_max=3.0, hill_n=2.0, hill_k=2.0)
    rec = simulate_recording(3, 20.0, 30.0, kernel=kernel, spikes=SpikeModel(rate_hz=3.0), scan_offset_s=offsets,
                             exposure_s=0.02, seed=5)
    for roi in range(3):
        expected = predict_fluorescence(rec.spike_times[roi], kernel, 30.0, 600, scan_offset_s=offsets[roi],
                                        exposure_s=0.02)
        np.testing.assert_allclose(rec.dff_clean[roi], expected, rtol=1e-12, atol=1e-15)


def test_noise_free_recording_is_baseline_times_one_plus_dff_with_exact_bleaching():
    rec = simulate_recording(2, 60.0, 10.0, spikes=SpikeModel(rate_hz=1.0),
                             baseline=BaselineModel(f0=[50.0, 80.0], bleach_fraction=0.4, bleach_tau_s=20.0), seed=2)
    t = np.arange(600) / 10.0
    bleach = 0.6 + 0.4 * np.exp(-t / 20.0)  # documented bleaching curve
    np.testing.assert_allclose(rec.f0, np.array([50.0, 80.0])[:, None] * bleach, rtol=1e-14)
    np.testing.assert_allclose(rec.raw, rec.f0 * (1 + rec.dff_clean), rtol=1e-14)
    np.testing.assert_allclose(rec.dff, rec.dff_clean, atol=1e-12)


def test_shot_noise_variance_equals_its_mean():
    photons, n_frames = 20.0, 100_000
    rec = simulate_recording(2, n_frames / 100.0, 100.0, spikes=SpikeModel(rate_hz=0.0),
                             baseline=BaselineModel(f0=[100.0, 7.0]), noise=NoiseModel(photons_per_frame=photons),
                             seed=8)
    for roi, f0 in enumerate((100.0, 7.0)):
        counts = rec.raw[roi] * photons / f0
        np.testing.assert_allclose(counts, np.round(counts), atol=1e-9)  # whole photons
        mean, var = counts.mean(), counts.var(ddof=1)
        # Poisson: variance = mean.  Sampling s.d. of the sample variance is sqrt((mu4 - sigma^4) / n) with the
        # Poisson central fourth moment mu4 = mu + 3 mu^2 (handbook), i.e. sqrt((mu + 2 mu^2) / n); allow 5 s.d.
        tolerance = 5 * math.sqrt((photons + 2 * photons ** 2) / n_frames)
        assert abs(var - mean) < tolerance + 5 * math.sqrt(photons / n_frames)
        assert abs(mean - photons) < 5 * math.sqrt(photons / n_frames)


def test_gaussian_dff_noise_has_the_requested_sd():
    n_frames, sd = 40_000, 0.07
    rec = simulate_recording(1, n_frames / 50.0, 50.0, spikes=SpikeModel(rate_hz=0.5), noise=NoiseModel(noise_sd=sd),
                             baseline=BaselineModel(bleach_fraction=0.5), seed=9)
    residual = rec.dff[0] - rec.dff_clean[0]
    # Sampling s.d. of a Gaussian sample s.d. is sigma / sqrt(2 (n - 1)) (handbook); allow 5 s.d.
    assert abs(residual.std(ddof=1) - sd) < 5 * sd / math.sqrt(2 * (n_frames - 1))


def test_poisson_spike_counts_match_the_rate():
    n_rois, duration, rate = 40, 200.0, 2.5
    rec = simulate_recording(n_rois, duration, 10.0, spikes=SpikeModel(rate_hz=rate), seed=13)
    total = sum(t.size for t in rec.spike_times)
    expected = n_rois * duration * rate
    assert abs(total - expected) < 5 * math.sqrt(expected)  # Poisson: variance = mean
    for train in rec.spike_times:
        assert np.all(np.diff(train) >= 0) and train.min() >= 0 and train.max() < duration


def test_renewal_intervals_respect_the_dead_time_and_have_gamma_moments():
    rate, refractory, shape = 5.0, 0.05, 4.0
    rec = simulate_recording(20, 300.0, 10.0, spikes=SpikeModel(rate_hz=rate, spike_model="renewal",
                                                              refractory_s=refractory, isi_shape=shape), seed=14)
    intervals = np.concatenate([np.diff(t) for t in rec.spike_times])
    assert intervals.min() >= refractory * (1 - 1e-9)
    # Interval = dead time + Gamma(shape, mean 1/rate - dead time): mean 1/rate, s.d. (1/rate - dead time)/sqrt(shape)
    # (gamma distribution moments, handbook).  ~30,000 intervals: 2 % tolerance is > 5 sampling s.d.
    assert intervals.mean() == pytest.approx(1 / rate, rel=0.02)
    assert intervals.std() == pytest.approx((1 / rate - refractory) / math.sqrt(shape), rel=0.02)


def test_bursts_have_the_requested_intra_burst_interval_and_mean_rate():
    rate, size, isi = 2.0, 4.0, 0.008
    rec = simulate_recording(20, 300.0, 10.0, spikes=SpikeModel(rate_hz=rate, spike_model="bursts",
                                                              burst_size_mean=size, burst_isi_s=isi), seed=15)
    intervals = np.concatenate([np.diff(t) for t in rec.spike_times])
    at_isi = np.mean(np.abs(intervals - isi) < 1e-9)
    assert at_isi > 0.7  # (size - 1) / size = 0.75 of intervals lie within bursts, minus a few overlaps
    total = sum(t.size for t in rec.spike_times)
    # compound Poisson: variance = burst rate x T x E[size^2], size = 1 + Poisson(size - 1)
    bursts = 20 * 300.0 * rate / size
    sd = math.sqrt(bursts * ((size - 1) + size ** 2))
    assert abs(total - bursts * size) < 5 * sd


def test_sinusoidal_rate_modulation_has_the_requested_depth():
    rate, depth, period, duration, n_rois = 5.0, 0.8, 4.0, 2000.0, 6
    rec = simulate_recording(n_rois, duration, 10.0, spikes=SpikeModel(
        rate_hz=rate, rate_modulation="sinusoid", rate_modulation_depth=depth, rate_modulation_period_s=period),
        seed=16)
    # Campbell's theorem: E[sum exp(2 pi i s / P)] = integral of rate(t) exp(2 pi i t / P) dt, of modulus
    # rate depth T / 2 (whatever the phase); the component along it has variance N / 2 (N = expected count).
    moduli = [abs(np.exp(2j * np.pi * train / period).sum()) for train in rec.spike_times]
    n_expected = rate * duration
    assert abs(np.mean(moduli) - rate * depth * duration / 2) < 5 * math.sqrt(n_expected / 2 / n_rois)


def test_random_rate_modulation_keeps_the_mean_rate_and_overdisperses_counts():
    rate = 4.0
    flat = simulate_recording(10, 400.0, 10.0, spikes=SpikeModel(rate_hz=rate), seed=17)
    modulated = simulate_recording(10, 400.0, 10.0, spikes=SpikeModel(
        rate_hz=rate, rate_modulation="random", rate_modulation_depth=1.0, rate_modulation_period_s=5.0), seed=17)

    def fano(rec):
        counts = np.array([np.histogram(t, bins=np.arange(0, 401, 2.0))[0] for t in rec.spike_times])
        return counts.var() / counts.mean()

    assert fano(flat) == pytest.approx(1.0, abs=0.15)  # Poisson counts: Fano factor 1
    assert fano(modulated) > 2.0
    total = sum(t.size for t in modulated.spike_times)
    assert total == pytest.approx(10 * 400.0 * rate, rel=0.15)  # log-normal rate with mean rate (loose: slow noise)


@pytest.mark.parametrize("kwargs, name", [
    ({"kernel": Kernel(0.05, 0.5), "indicator": "GCaMP6s"}, "kernel"),
    ({"spikes": SpikeModel(rate_hz=[1.0, 2.0, 3.0])}, r"spikes\.rate_hz has 3 values but n_rois=2"),
    ({"baseline": BaselineModel(f0=[10.0])}, r"baseline\.f0 has 1 values but n_rois=2"),
    ({"spikes": {"rate_hz": 2.0}}, r"spikes must be a calcium\.forward\.SpikeModel, got dict"),
    ({"noise": 0.1}, r"noise must be a calcium\.forward\.NoiseModel"),
    ({"seed": -1}, "seed"),
    ({"indicator": "GCaMP99"}, "GCaMP99"),
])
def test_bad_simulation_arguments_raise_value_error_naming_them(kwargs, name):
    with pytest.raises(ValueError, match=name):
        simulate_recording(2, 10.0, 10.0, **kwargs)


@pytest.mark.parametrize("model, fields, pattern", [
    (NoiseModel, {"photons_per_frame": 10.0, "noise_sd": 0.1}, r"either photons_per_frame=10\.0 .* or noise_sd=0\.1"),
    (NoiseModel, {"photons_per_frame": 0.0}, r"NoiseModel\.photons_per_frame .* got 0\.0; give the photons"),
    (NoiseModel, {"read_noise_sd": -1.0}, r"NoiseModel\.read_noise_sd .* got -1\.0; give"),
    (NoiseModel, {"noise_sd": float("nan")}, r"NoiseModel\.noise_sd .* got nan; give"),
    (SpikeModel, {"spike_model": "gamma"}, r"SpikeModel\.spike_model must be one of 'poisson', 'renewal', 'bursts'; "
                                          r"got 'gamma'"),
    (SpikeModel, {"spike_model": "renewal", "refractory_s": 0.5, "rate_hz": 3.0},
     r"refractory_s \* rate_hz must be < 1 .* refractory_s=0\.5 with rate_hz up to 3\.0; give a shorter"),
    (SpikeModel, {"rate_hz": -1.0}, r"SpikeModel\.rate_hz must be .* got -1\.0; give a mean firing rate"),
    (SpikeModel, {"rate_hz": [1.0, -2.0]}, r"SpikeModel\.rate_hz\[1\] must be .* got -2\.0; give"),
    (SpikeModel, {"rate_hz": [[1.0, 2.0]]},
     r"SpikeModel\.rate_hz must be a number or a 1-D sequence .* shape \(1, 2\)"),
    (SpikeModel, {"rate_hz": "fast"}, r"SpikeModel\.rate_hz must be a number or a 1-D sequence .* 'fast'"),
    (SpikeModel, {"rate_modulation": "square"}, r"SpikeModel\.rate_modulation must be one of None, 'sinusoid'"),
    (SpikeModel, {"rate_modulation": "sinusoid", "rate_modulation_depth": 1.5},
     r"SpikeModel\.rate_modulation_depth must be in \[0, 1\] for a sinusoid .* got 1\.5; use"),
    (SpikeModel, {"spike_model": "bursts", "burst_size_mean": 0.5}, r"SpikeModel\.burst_size_mean must be >= 1 .*0\.5"),
    (SpikeModel, {"burst_isi_s": 0.0}, r"SpikeModel\.burst_isi_s .* got 0\.0; give"),
    (SpikeModel, {"isi_shape": -1}, r"SpikeModel\.isi_shape .* got -1; give"),
    (SpikeModel, {"rate_modulation_period_s": 0.0}, r"SpikeModel\.rate_modulation_period_s .* got 0\.0; give"),
    (BaselineModel, {"bleach_fraction": 1.0}, r"BaselineModel\.bleach_fraction must be in \[0, 1\), got 1\.0; "),
    (BaselineModel, {"f0": [100.0, 0.0]}, r"BaselineModel\.f0\[1\] must be a positive .* got 0\.0; give"),
    (BaselineModel, {"drift_sd": -0.1}, r"BaselineModel\.drift_sd .* got -0\.1; give"),
    (BaselineModel, {"drift_tau_s": float("inf")}, r"BaselineModel\.drift_tau_s .* got inf; give"),
    (BaselineModel, {"bleach_tau_s": True}, r"BaselineModel\.bleach_tau_s .* got True; give"),
])
def test_a_parameter_object_refuses_a_bad_field_naming_it_its_value_and_a_remedy(model, fields, pattern):
    with pytest.raises(ValueError, match=pattern):
        model(**fields)


def test_parameter_objects_are_frozen_normalised_and_hashable():
    spikes = SpikeModel(rate_hz=np.array([1, 2.5]), refractory_s=np.float32(0.25))
    assert spikes.rate_hz == (1.0, 2.5) and all(type(v) is float for v in spikes.rate_hz)
    assert type(spikes.refractory_s) is float and spikes.refractory_s == 0.25
    assert BaselineModel(f0=50).f0 == 50.0 and type(BaselineModel(f0=50).f0) is float
    assert spikes == SpikeModel(rate_hz=[1.0, 2.5], refractory_s=0.25) and hash(spikes) == hash(
        SpikeModel(rate_hz=[1.0, 2.5], refractory_s=0.25))
    with pytest.raises(dataclasses.FrozenInstanceError):
        spikes.rate_hz = 3.0
    assert NoiseModel() == NoiseModel(photons_per_frame=None, read_noise_sd=0.0, noise_sd=None)


# The call of the old interface and its translation into the parameter objects, field by field.
_FORMER_CALL = dict(rate_hz=[0.5, 2, 1.5], spike_model="renewal", refractory_s=0.01, isi_shape=2.0,
                    rate_modulation="random", rate_modulation_depth=0.4, rate_modulation_period_s=6.0,
                    f0=np.array([40.0, 60.0, 90.0]), bleach_fraction=0.2, bleach_tau_s=50.0, drift_sd=0.1,
                    drift_tau_s=8.0, photons_per_frame=80.0, read_noise_sd=0.3)


def test_former_keywords_still_work_for_one_release_with_a_warning_and_give_the_same_recording():
    new = simulate_recording(3, 20.0, 15.0, indicator="jGCaMP8m", seed=4, spikes=SpikeModel(
        rate_hz=[0.5, 2, 1.5], spike_model="renewal", refractory_s=0.01, isi_shape=2.0, rate_modulation="random",
        rate_modulation_depth=0.4, rate_modulation_period_s=6.0), baseline=BaselineModel(
        f0=np.array([40.0, 60.0, 90.0]), bleach_fraction=0.2, bleach_tau_s=50.0, drift_sd=0.1, drift_tau_s=8.0),
        noise=NoiseModel(photons_per_frame=80.0, read_noise_sd=0.3))
    with pytest.warns(DeprecationWarning) as caught:
        old = simulate_recording(3, 20.0, 15.0, indicator="jGCaMP8m", seed=4, **_FORMER_CALL)
    messages = [str(w.message) for w in caught if w.category is DeprecationWarning]
    assert len(messages) == 3  # one per parameter object
    assert any("pass spikes=SpikeModel(rate_hz=[0.5, 2, 1.5], spike_model='renewal'" in m for m in messages)
    assert any("pass baseline=BaselineModel(f0=array(" in m for m in messages)
    assert any("pass noise=NoiseModel(photons_per_frame=80.0, read_noise_sd=0.3)" in m for m in messages)
    assert all("removed in the next release" in m for m in messages)
    for name in ("raw", "dff", "dff_clean", "f0"):
        assert np.array_equal(getattr(old, name), getattr(new, name))
    assert all(np.array_equal(a, b) for a, b in zip(old.spike_times, new.spike_times))
    # the parameters are those of the old interface, value for value (recorded as given, as they were)
    assert old.params == new.params and json.dumps(old.params["rate_hz"]) == "[0.5, 2, 1.5]"
    # the warning points at the caller, not at the package
    assert all(w.filename == __file__ for w in caught)


def test_a_former_keyword_cannot_be_mixed_with_its_parameter_object_and_an_unknown_keyword_is_a_type_error():
    with pytest.raises(ValueError, match=r"also rate_hz=2\.0: give these inside spikes=SpikeModel\(\.\.\.\) only"):
        simulate_recording(2, 10.0, 10.0, spikes=SpikeModel(), rate_hz=2.0)
    with pytest.raises(TypeError, match="unexpected keyword argument 'rate'"):
        simulate_recording(2, 10.0, 10.0, rate=2.0)
    # another object's keywords may still be given the old way (with their warning)
    with pytest.warns(DeprecationWarning, match=r"noise=NoiseModel\(noise_sd=0\.1\)"):
        mixed = simulate_recording(2, 10.0, 10.0, spikes=SpikeModel(rate_hz=2.0), noise_sd=0.1, seed=3)
    new = simulate_recording(2, 10.0, 10.0, spikes=SpikeModel(rate_hz=2.0), noise=NoiseModel(noise_sd=0.1), seed=3)
    assert np.array_equal(mixed.raw, new.raw)


def test_the_new_interface_emits_no_deprecation_warning():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        simulate_recording(2, 10.0, 10.0, spikes=SpikeModel(rate_hz=2.0), baseline=BaselineModel(drift_sd=0.1),
                           noise=NoiseModel(noise_sd=0.1), seed=3)


def test_slow_drift_is_a_stationary_unit_variance_first_order_autoregression():
    # Sampled exactly, a unit-variance Ornstein-Uhlenbeck process is AR(1) with coefficient a = exp(-step/tau):
    # variance 1 from the first sample on and autocorrelation a**k at lag k (Uhlenbeck & Ornstein 1930; Box &
    # Jenkins 1976 for the AR(1) moments).  20,000 independent paths of 50 steps.
    a, n_paths, n_steps = math.exp(-0.1), 20_000, 50
    rng = np.random.default_rng(0)
    paths = np.array([_slow_drift(rng, n_steps, a) for _ in range(n_paths)])
    tolerance = 5 / math.sqrt(n_paths)  # ~5 sampling s.d. of a variance or correlation near 1 (Gaussian)
    for step in (0, 1, 25, 49):
        assert paths[:, step].mean() == pytest.approx(0.0, abs=tolerance)
        assert paths[:, step].var() == pytest.approx(1.0, abs=3 * tolerance)
    for lag in (1, 5, 20):
        correlation = np.mean(paths[:, 10] * paths[:, 10 + lag])
        assert correlation == pytest.approx(a ** lag, abs=3 * tolerance)


def test_baseline_drift_is_the_slow_drift_of_the_rois_noise_stream():
    # The drift and the rate modulation share one generator: rebuild a ROI's drift from its documented stream
    # (child 1 of the ROI's seed sequence) and the step coefficient exp(-1 / (drift_tau_s frame_rate)).
    rec = simulate_recording(2, 30.0, 20.0, spikes=SpikeModel(rate_hz=0.0),
                             baseline=BaselineModel(f0=70.0, drift_sd=0.2, drift_tau_s=4.0), seed=12)
    stream = np.random.SeedSequence(12).spawn(2)[1].spawn(2)[1]
    drift = _slow_drift(np.random.default_rng(stream), 600, math.exp(-1.0 / (4.0 * 20.0)))
    assert np.array_equal(rec.f0[1], 70.0 * np.exp(0.2 * drift))


def test_a_simulation_too_large_for_the_machine_is_refused_before_anything_is_allocated():
    import tracemalloc

    tracemalloc.start()
    try:
        with pytest.raises(ValueError, match=r"simulate_recording with n_rois=1000000000 x 36000 frames would need "
                                             r"about \d+(\.\d+)? PB of memory, more than the .* available.*fewer ROIs"):
            simulate_recording(1_000_000_000, 1200.0, 30.0)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 50e6  # nothing of the size of the request was allocated


def test_save_writes_traces_spikes_and_parameters(tmp_path):
    from calcium.io import read_spike_times, read_traces

    rec = simulate_recording(3, 10.0, 20.0, spikes=SpikeModel(rate_hz=2.0), noise=NoiseModel(noise_sd=0.05), seed=21)
    written = rec.save(tmp_path / "sim")
    folder = tmp_path / "sim"
    assert set(written) == {"raw", "dff", "dff_clean", "f0", "spikes", "parameters"}
    assert all(path.is_file() and path.parent == folder for path in written.values())
    raw = read_traces(folder / "raw.h5")
    np.testing.assert_array_equal(raw.traces, rec.raw)
    assert raw.frame_rate == 20.0
    np.testing.assert_array_equal(read_traces(folder / "dff_clean.h5").traces, rec.dff_clean)
    spikes = read_spike_times(folder / "spikes.csv")
    for roi in range(3):
        np.testing.assert_array_equal(spikes[roi], rec.spike_times[roi])
    params = json.loads((folder / "parameters.json").read_text())
    assert params["seed"] == 21 and params["n_frames"] == 200


def test_the_former_name_of_the_scan_offset_still_works_with_a_deprecation_warning():
    with pytest.warns(DeprecationWarning, match="scan_offset_s"):
        old = simulate_recording(2, 5.0, 10.0, scan_offsets=[0.0, 0.02], seed=1)
    new = simulate_recording(2, 5.0, 10.0, scan_offset_s=[0.0, 0.02], seed=1)
    assert np.array_equal(old.dff, new.dff)
