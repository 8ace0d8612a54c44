"""Tests of infer_spikes / infer_spikes_many (calcium.infer.api).

References used below:
- the forward model (calcium.forward.simulate_recording) with known spikes;
- the exact solver (calcium.infer.ar.deconvolve_ar) for what infer_spikes
  must reproduce when given the same parameters;
- the conventions of ARCHITECTURE.md (frame k at k / frame_rate, missing
  frames reported, ValueError for bad input) - common practice.
"""
import numpy as np
import pytest

from calcium._checks import MissingDataError
from calcium.forward import simulate_recording
from calcium.infer import deconvolve_ar, infer_spikes, infer_spikes_many
from calcium.kernel import Kernel


@pytest.fixture(scope="module")
def recording():
    return simulate_recording(2, 60.0, 30.0, indicator="GCaMP6s", rate_hz=0.5, noise_sd=0.04, seed=21)


def test_result_fields_are_consistent(recording):
    # reference: the definitions in SpikeInference's docstring (common practice)
    y = recording.dff[0]
    result = infer_spikes(y, 30.0, indicator="GCaMP6s")
    T = y.size
    for name in ("activity", "spike_counts", "denoised"):
        assert getattr(result, name).shape == (T,)
    assert result.spike_counts.dtype.kind == "i"
    assert result.spike_counts.sum() == result.spike_times.size == result.n_spikes
    assert np.all(np.diff(result.spike_times) >= 0)
    assert np.all((result.spike_times >= 0) & (result.spike_times < T / 30.0))
    np.testing.assert_array_equal(np.bincount(np.round(result.spike_times * 30.0).astype(int), minlength=T),
                                  result.spike_counts)
    assert result.kernel == Kernel.from_indicator("GCaMP6s")
    assert result.converged and result.penalty > 0 and result.noise_sd > 0
    assert not result.missing.any
    # the activity is in spikes: its total is close to the count
    assert abs(result.activity.sum() - result.n_spikes) <= 0.25 * result.n_spikes + 1


def test_given_parameters_reproduce_the_exact_solver(recording):
    # reference: deconvolve_ar with the same coefficients, penalty and baseline
    y = recording.dff[1]
    kernel = Kernel.from_indicator("GCaMP6s")
    result = infer_spikes(y, 30.0, kernel=kernel, noise_sd=0.04, penalty=0.5, baseline=0.0)
    exact = deconvolve_ar(y, kernel.ar_coefficients(30.0), penalty=0.5, baseline=0.0)
    assert result.objective == pytest.approx(exact.objective, rel=1e-12)
    assert result.penalty == 0.5 and result.noise_sd == 0.04 and result.baseline == 0.0


def test_spikes_are_found_near_the_true_ones(recording):
    # reference: forward model ground truth; matching within 2 frames, greedy is enough at this SNR
    y = recording.dff[0]
    truth = recording.spike_times[0]
    result = infer_spikes(y, 30.0, indicator="GCaMP6s")
    assert abs(result.n_spikes - truth.size) <= 2
    nearest = np.min(np.abs(result.spike_times[:, None] - truth[None, :]), axis=1)
    assert np.mean(nearest <= 2 / 30.0) >= 0.9


def test_missing_frames_are_ignored_and_reported(recording):
    # reference: ARCHITECTURE.md contract (missing frames weight 0, reported)
    y = recording.dff[0].copy()
    y[[5, 6, 7, 300]] = np.nan
    y[400] = np.inf
    result = infer_spikes(y, 30.0, indicator="GCaMP6s", noise_sd=0.04)
    assert result.missing.count == 5
    np.testing.assert_array_equal(result.missing.frames(), [5, 6, 7, 300, 400])
    assert np.all(np.isfinite(result.denoised)) and np.all(np.isfinite(result.activity))


def test_constant_and_quiet_traces_give_no_spikes():
    # reference: worked by hand (no transient, nothing to infer); quiet = white noise only
    assert infer_spikes(np.full(300, 0.2), 30.0).n_spikes == 0
    assert infer_spikes(np.full(300, 0.2), 30.0, indicator="GCaMP6f").n_spikes == 0
    rng = np.random.default_rng(3)
    quiet = rng.normal(0.0, 0.05, 3000)
    assert infer_spikes(quiet, 30.0, indicator="GCaMP6s").n_spikes == 0
    blind = infer_spikes(quiet, 30.0)
    assert blind.n_spikes == 0 and blind.kernel is None


def test_saturating_kernel_is_inverted_before_deconvolution():
    # reference: forward model with a Hill saturation (Kernel.saturate); bursts drive it into saturation
    kernel = Kernel.from_indicator("GCaMP6s", dff_max=1.0)
    rec = simulate_recording(1, 60.0, 30.0, kernel=kernel, rate_hz=1.0, noise_sd=0.03, spike_model="bursts",
                             seed=4)
    truth = rec.spike_times[0].size
    with_model = infer_spikes(rec.dff[0], 30.0, kernel=kernel)
    linear = infer_spikes(rec.dff[0], 30.0, kernel=Kernel(kernel.rise_s, kernel.decay_s, kernel.amplitude))
    assert abs(with_model.n_spikes - truth) <= 0.1 * truth
    assert abs(with_model.n_spikes - truth) < abs(linear.n_spikes - truth)


def test_blind_inference_estimates_kernel_and_spike_size():
    # reference: forward model with known kernel (GCaMP6f, 0.19 dF/F per spike)
    rec = simulate_recording(1, 120.0, 30.0, indicator="GCaMP6f", rate_hz=0.5, noise_sd=0.04, seed=5)
    result = infer_spikes(rec.dff[0], 30.0)
    true = Kernel.from_indicator("GCaMP6f")
    assert result.kernel.amplitude == pytest.approx(true.amplitude, rel=0.2)
    assert result.kernel.decay_s == pytest.approx(true.decay_s, rel=0.15)
    assert abs(result.n_spikes - rec.spike_times[0].size) <= 0.1 * rec.spike_times[0].size


def test_kernel_with_a_slow_component_goes_through_the_convex_solver():
    # reference: forward model with a three-exponential kernel
    kernel = Kernel(0.05, 0.3, 0.3, slow_decay_s=1.5, slow_fraction=0.2)
    rec = simulate_recording(1, 15.0, 20.0, kernel=kernel, rate_hz=1.0, noise_sd=0.03, seed=6)
    result = infer_spikes(rec.dff[0], 20.0, kernel=kernel)
    assert result.coefficients.size == 0
    assert abs(result.n_spikes - rec.spike_times[0].size) <= 2


def test_many_traces_give_the_single_trace_results(recording):
    # reference: infer_spikes on each row
    many = infer_spikes_many(recording.dff, 30.0, indicator="GCaMP6s", noise_sd=[0.04, 0.05])
    assert len(many) == 2
    for i, noise in enumerate([0.04, 0.05]):
        single = infer_spikes(recording.dff[i], 30.0, indicator="GCaMP6s", noise_sd=noise)
        np.testing.assert_array_equal(many[i].spike_times, single.spike_times)


def test_a_call_does_not_depend_on_the_calls_before_it(recording):
    # reference: determinism (common practice): the scratch space reused between calls carries nothing over
    fresh = infer_spikes(recording.dff[1], 30.0)
    infer_spikes(recording.dff[0], 30.0, indicator="GCaMP6s")
    again = infer_spikes(recording.dff[1], 30.0)
    np.testing.assert_array_equal(fresh.spike_times, again.spike_times)
    np.testing.assert_array_equal(fresh.activity, again.activity)
    assert fresh.objective == again.objective and fresh.baseline == again.baseline


def test_results_do_not_depend_on_the_memory_layout_of_the_trace(recording):
    # reference: determinism (common practice): a row of a Fortran-order array (a strided view) holds the same
    # values as a C-order copy and must give the same results, bit for bit (blind kinetics and noise included)
    strided = np.asfortranarray(np.tile(recording.dff, (3, 1)))[1]
    assert not strided.flags.c_contiguous
    fresh = infer_spikes(strided.copy(), 30.0)
    viewed = infer_spikes(strided, 30.0)
    for name in ("activity", "denoised", "spike_times"):
        np.testing.assert_array_equal(getattr(fresh, name), getattr(viewed, name))
    assert fresh.objective == viewed.objective and fresh.noise_sd == viewed.noise_sd


def test_bad_input_raises_value_errors():
    y = np.zeros(100)
    with pytest.raises(ValueError, match="at least 3"):
        infer_spikes(np.ones(2), 30.0, noise_sd=0.1)
    with pytest.raises(MissingDataError):
        infer_spikes(np.full(50, np.nan), 30.0)
    with pytest.raises(ValueError, match="frame_rate"):
        infer_spikes(y, 0.0)
    with pytest.raises(ValueError, match="frame_rate"):
        infer_spikes(y, np.nan)
    with pytest.raises(ValueError, match="one trace"):
        infer_spikes(np.zeros((2, 100)), 30.0)
    with pytest.raises(ValueError, match="at most one"):
        infer_spikes(y, 30.0, kernel=Kernel(0.0, 0.5), indicator="GCaMP6s")
    with pytest.raises(ValueError, match="noise_sd"):
        infer_spikes(np.random.default_rng(0).normal(size=10), 30.0)
    with pytest.raises(ValueError, match="noise_sd"):
        infer_spikes(y, 30.0, noise_sd=-0.1)
    with pytest.raises(ValueError, match="one value or one per ROI"):
        infer_spikes_many(np.zeros((2, 100)), 30.0, noise_sd=[0.1, 0.1, 0.1])


def test_raw_fluorescence_is_refused_unless_the_user_insists():
    # ΔF/F is 0 at rest by definition (Grienberger & Konnerth 2012); raw counts sit far above 1
    rng = np.random.default_rng(2)
    raw = 1000.0 + rng.normal(0.0, 5.0, 3000)
    with pytest.raises(ValueError, match="raw fluorescence"):
        infer_spikes(raw, 30.0)
    result = infer_spikes(raw, 30.0, allow_raw=True)  # insisting: analysed, the level taken as the baseline
    assert result.baseline == pytest.approx(1000.0, abs=1.0)
