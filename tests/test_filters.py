"""Tests for calcium.signal.filters: zero-phase filters, edge spans, detrending."""
import numpy as np
import pytest
import scipy.signal as ss
from hypothesis import given, settings
from hypothesis import strategies as st

from calcium._checks import MissingDataError
from calcium.signal import DetrendResult, FilterResult, design_filter, detrend, zero_phase_filter

FRAME_RATE = 30.0

ALL_DESIGNS = [
    ("lowpass", 3.0, "butterworth", 4),
    ("highpass", 0.5, "butterworth", 3),
    ("bandpass", (1.0, 5.0), "butterworth", 2),
    ("bandstop", (4.0, 6.0), "butterworth", 3),
    ("lowpass", 3.0, "fir", 60),
    ("highpass", 2.0, "fir", 60),
    ("bandpass", (1.0, 5.0), "fir", 80),
    ("bandstop", (4.0, 6.0), "fir", 80),
]


def _tone_amplitude(y, freq_hz, frame_rate, keep):
    """Least-squares amplitude of a sinusoid of known frequency over the frames ``keep``."""
    t = np.arange(y.size)[keep] / frame_rate
    design = np.column_stack([np.sin(2 * np.pi * freq_hz * t), np.cos(2 * np.pi * freq_hz * t)])
    coef, *_ = np.linalg.lstsq(design, y[keep], rcond=None)
    return float(np.hypot(*coef))


def _tone(freq_hz, n, frame_rate=FRAME_RATE, phase=0.3):
    return np.sin(2 * np.pi * freq_hz * np.arange(n) / frame_rate + phase)


# --------------------------------------------------------------------------- forward-backward gain
@pytest.mark.parametrize("kind", ["lowpass", "highpass"])
@pytest.mark.parametrize("order", [2, 4, 6])
def test_forward_backward_gives_minus_6_db_at_single_pass_half_power_point(kind, order):
    # Textbook DSP: a Butterworth filter has |H| = 1/sqrt(2) (-3 dB) at its cutoff; applied forward and
    # backward the gain is |H|^2 = 0.5 (-6 dB). Measured on a filtered tone, away from the ends.
    cutoff = 2.0
    filt = design_filter(kind, cutoff, FRAME_RATE, order=order)
    n = 6000
    y = filt.apply(_tone(cutoff, n))
    keep = np.zeros(n, bool)
    keep[1000:-1000] = True
    assert _tone_amplitude(y, cutoff, FRAME_RATE, keep) == pytest.approx(0.5, abs=0.01)
    freq, single, zero_phase = filt.frequency_response(n_points=3001)  # 0.005 Hz steps: 2 Hz is a grid point
    at_cutoff = np.argmin(np.abs(freq - cutoff))
    assert single[at_cutoff] == pytest.approx(1 / np.sqrt(2), abs=1e-6)
    assert zero_phase[at_cutoff] == pytest.approx(0.5, abs=1e-6)


@pytest.mark.parametrize("order", [1, 2, 4, 8])
@pytest.mark.parametrize("cutoff", [0.5, 3.0, 10.0])
def test_half_power_point_matches_bilinear_butterworth_formula(order, cutoff):
    # Oppenheim & Schafer, Discrete-Time Signal Processing (bilinear-transform Butterworth):
    # |H(f)|^2 = 1 / (1 + (tan(pi f / fs) / tan(pi fc / fs))^(2N)). The zero-phase -3 dB point is where
    # |H|^2 = 1/sqrt(2), i.e. tan(pi f / fs) = tan(pi fc / fs) * (sqrt(2) - 1)^(1 / 2N).
    filt = design_filter("lowpass", cutoff, FRAME_RATE, order=order)
    ratio = (np.sqrt(2) - 1) ** (1 / (2 * order))
    expected = FRAME_RATE / np.pi * np.arctan(np.tan(np.pi * cutoff / FRAME_RATE) * ratio)
    assert len(filt.half_power_hz) == 1
    assert filt.half_power_hz[0] == pytest.approx(expected, rel=1e-7)
    high = design_filter("highpass", cutoff, FRAME_RATE, order=order)
    # High-pass by the same transform: (tan(pi fc/fs) / tan(pi f/fs))^(2N) replaces the ratio.
    expected_high = FRAME_RATE / np.pi * np.arctan(np.tan(np.pi * cutoff / FRAME_RATE) / ratio)
    assert high.half_power_hz[0] == pytest.approx(expected_high, rel=1e-7)


def test_band_filters_report_two_half_power_points_inside_the_design_band():
    # Common practice: at the single-pass -3 dB edges the zero-phase gain is 0.5 (-6 dB), so the
    # zero-phase -3 dB points lie inside a pass band and outside a stop band.
    for kind in ("bandpass", "bandstop"):
        filt = design_filter(kind, (2.0, 6.0), FRAME_RATE, order=3)
        low, high = filt.half_power_hz
        if kind == "bandpass":
            assert 2.0 < low < high < 6.0   # the pass band narrows
        else:
            assert low < 2.0 and high > 6.0   # the stop band widens
        for f in filt.half_power_hz:
            g = np.abs(ss.freqz_sos(filt.sos, worN=[f], fs=FRAME_RATE)[1][0]) ** 2
            assert g == pytest.approx(1 / np.sqrt(2), abs=1e-9)   # scipy's response at the reported point


def test_filter_reports_effective_order_squared_gain_and_edge_span():
    filt = design_filter("lowpass", 2.0, FRAME_RATE, order=5)
    assert filt.order == 5
    assert filt.effective_order == 10
    # textbook DSP: forward-backward filtering multiplies the gain by itself (|H|^2)
    _, single, zero = filt.frequency_response(n_points=256)
    np.testing.assert_allclose(zero, single ** filt.gain_exponent, rtol=1e-12, atol=1e-15)
    # Common practice: edge span = half the (forward-backward) filter order.
    assert filt.edge_frames == filt.effective_order // 2 == 5
    text = filt.describe()
    assert "zero phase" in text and "|H|^2" in text and "effective order 10" in text


def test_frequency_response_zero_phase_gain_is_single_pass_gain_squared_and_matches_scipy():
    for kind, cutoff, method, order in ALL_DESIGNS:
        filt = design_filter(kind, cutoff, FRAME_RATE, order=order, method=method)
        freq, single, zero_phase = filt.frequency_response(n_points=301)
        assert freq[0] == 0 and freq[-1] == pytest.approx(FRAME_RATE / 2)
        np.testing.assert_allclose(zero_phase, single ** 2, atol=1e-15)
        # Reference: scipy.signal.freqz / freqz_sos on the same coefficients.
        if method == "fir":
            ref = np.abs(ss.freqz(filt.taps, [1.0], worN=freq, fs=FRAME_RATE)[1])
        else:
            ref = np.abs(ss.freqz_sos(filt.sos, worN=freq, fs=FRAME_RATE)[1])
        np.testing.assert_allclose(single, ref, atol=1e-12)


# --------------------------------------------------------------------------- zero phase
@pytest.mark.parametrize("kind, cutoff, method, order", ALL_DESIGNS)
def test_impulse_response_is_symmetric_about_its_centre(kind, cutoff, method, order):
    # Textbook DSP: a zero-phase filter has a real, even frequency response, hence an impulse response
    # symmetric about the impulse.
    filt = design_filter(kind, cutoff, FRAME_RATE, order=order, method=method)
    n, centre = 4001, 2000
    impulse = np.zeros(n)
    impulse[centre] = 1.0
    h = filt.apply(impulse)
    span = 1500
    np.testing.assert_allclose(h[centre - span:centre][::-1], h[centre + 1:centre + span + 1],
                               atol=1e-10 * np.abs(h).max())
    # Group delay of the impulse response, read as FIR coefficients (scipy.signal.group_delay), equals the
    # impulse position: the filter itself adds no delay.
    f_pass = {"lowpass": 1.0, "highpass": 8.0, "bandpass": 3.0, "bandstop": 1.0}[kind]
    _, delay = ss.group_delay((h, [1.0]), w=[f_pass], fs=FRAME_RATE)
    assert delay[0] == pytest.approx(centre, abs=1e-6)


def test_cross_correlation_of_input_and_output_peaks_at_lag_zero():
    # Textbook DSP: no delay means the input/output cross-correlation peaks at lag 0 (a single-pass
    # Butterworth filter, scipy.signal.sosfilt, does delay: its peak is at a positive lag).
    rng = np.random.default_rng(3)
    x = rng.normal(size=20000)
    filt = design_filter("lowpass", 1.0, FRAME_RATE, order=4)
    lags = ss.correlation_lags(x.size, x.size)
    y = filt.apply(x)
    assert lags[np.argmax(ss.correlate(y, x))] == 0
    delayed = ss.sosfilt(filt.sos, x)
    assert lags[np.argmax(ss.correlate(delayed, x))] > 0


# --------------------------------------------------------------------------- agreement with scipy
@pytest.mark.parametrize("kind, cutoff, method, order", ALL_DESIGNS)
@pytest.mark.parametrize("padtype, padlen", [("odd", None), ("even", 40), ("constant", 7), (None, None)])
def test_filter_equals_scipy_filtfilt_on_the_same_coefficients(kind, cutoff, method, order, padtype, padlen):
    # Reference: scipy.signal.sosfiltfilt / filtfilt with the same coefficients and padding.
    rng = np.random.default_rng(11)
    x = rng.normal(size=(3, 900)).cumsum(axis=1)
    filt = design_filter(kind, cutoff, FRAME_RATE, order=order, method=method)
    ours = filt.apply(x, padtype=padtype, padlen=padlen)
    if method == "fir":
        ref = ss.filtfilt(filt.taps, [1.0], x, axis=-1, padtype=padtype, padlen=padlen)
        # scipy's own coefficients must be what we report
        np.testing.assert_array_equal(filt.taps, ss.firwin(order + 1, cutoff, fs=FRAME_RATE, pass_zero=kind))
    else:
        ref = ss.sosfiltfilt(filt.sos, x, axis=-1, padtype=padtype, padlen=padlen)
        np.testing.assert_array_equal(filt.sos, ss.butter(order, cutoff, kind, fs=FRAME_RATE, output="sos"))
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12 * np.abs(ref).max())
    np.testing.assert_array_equal(ours[1], filt.apply(x[1], padtype=padtype, padlen=padlen))  # 1-D == 2-D


def test_zero_phase_filter_wraps_design_and_apply():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(2, 700))
    result = zero_phase_filter(x, FRAME_RATE, "bandpass", (0.5, 4.0), order=3)
    assert isinstance(result, FilterResult)
    ref = ss.sosfiltfilt(ss.butter(3, (0.5, 4.0), "bandpass", fs=FRAME_RATE, output="sos"), x)
    np.testing.assert_allclose(result.filtered, ref, atol=1e-12)
    assert result.filter.order == 3 and result.filter.kind == "bandpass"
    assert result.edge_mask.shape == x.shape
    assert result.edge_mask[:, :3].all() and result.edge_mask[:, -3:].all()
    assert not result.edge_mask[:, 3:-3].any()
    assert not result.missing.any


# --------------------------------------------------------------------------- edges
@pytest.mark.parametrize("kind, cutoff, order", [("lowpass", 3.0, 40), ("highpass", 2.0, 30),
                                                 ("bandpass", (1.0, 5.0), 50)])
def test_fir_edge_span_is_exactly_where_padding_matters(kind, cutoff, order):
    # Textbook DSP (linear convolution): forward-backward FIR has an impulse response reaching `order`
    # samples on each side, so output samples >= edge_frames from both ends cannot depend on the padding,
    # and the outermost samples do.
    filt = design_filter(kind, cutoff, FRAME_RATE, order=order, method="fir")
    e = filt.edge_frames
    assert e == order
    x = np.random.default_rng(4).normal(size=800).cumsum()
    odd = filt.apply(x, padtype="odd")
    even = filt.apply(x, padtype="even")
    np.testing.assert_allclose(odd[e:-e], even[e:-e], atol=1e-10)
    assert abs(odd[0] - even[0]) > 1e-6 and abs(odd[-1] - even[-1]) > 1e-6


def test_mark_and_trim_use_the_edge_span():
    filt = design_filter("lowpass", 2.0, FRAME_RATE, order=6)
    x = np.random.default_rng(5).normal(size=(2, 300))
    full = filt.apply(x)
    marked, mask = filt.apply(x, edges="mark")
    np.testing.assert_array_equal(marked, full)
    expected = np.zeros(300, bool)
    expected[:6] = expected[-6:] = True
    np.testing.assert_array_equal(mask, np.broadcast_to(expected, (2, 300)))
    trimmed = filt.apply(x, edges="trim")
    np.testing.assert_array_equal(trimmed, full[:, 6:-6])
    with pytest.raises(ValueError, match="trim"):
        design_filter("lowpass", 2.0, FRAME_RATE, order=20, method="fir").apply(np.ones(40), edges="trim")


# --------------------------------------------------------------------------- notch
def test_notch_removes_a_tone_by_40_db_and_passes_a_tone_an_octave_away():
    # Common practice (dB = 20 log10 of amplitude ratio); tones measured by least squares away from the ends.
    n = 9000
    notch = design_filter("bandstop", (4.5, 5.5), FRAME_RATE, order=4)
    keep = np.zeros(n, bool)
    keep[1500:-1500] = True
    removed = _tone_amplitude(notch.apply(_tone(5.0, n)), 5.0, FRAME_RATE, keep)
    assert 20 * np.log10(removed) <= -40
    for octave in (2.5, 10.0):
        passed = _tone_amplitude(notch.apply(_tone(octave, n)), octave, FRAME_RATE, keep)
        assert abs(20 * np.log10(passed)) <= 0.5


# --------------------------------------------------------------------------- validation
def test_cutoff_at_or_above_nyquist_is_refused_naming_nyquist():
    with pytest.raises(ValueError, match=r"Nyquist.*15"):
        design_filter("lowpass", 15.0, FRAME_RATE)
    with pytest.raises(ValueError, match="15"):
        design_filter("bandpass", (2.0, 16.0), FRAME_RATE)
    with pytest.raises(ValueError, match="cutoff_hz"):
        design_filter("highpass", 0.0, FRAME_RATE)
    with pytest.raises(ValueError, match="cutoff_hz"):
        design_filter("bandstop", 3.0, FRAME_RATE)
    with pytest.raises(ValueError, match="cutoff_hz"):
        design_filter("bandpass", (5.0, 2.0), FRAME_RATE)


def test_bad_order_kind_method_and_fir_parity_are_refused():
    with pytest.raises(ValueError, match="order"):
        design_filter("lowpass", 2.0, FRAME_RATE, order=0)
    with pytest.raises(ValueError, match="order"):
        design_filter("lowpass", 2.0, FRAME_RATE, order=2.5)
    with pytest.raises(ValueError, match="kind"):
        design_filter("notch", 2.0, FRAME_RATE)
    with pytest.raises(ValueError, match="method"):
        design_filter("lowpass", 2.0, FRAME_RATE, method="chebyshev")
    with pytest.raises(ValueError, match="even"):
        design_filter("highpass", 2.0, FRAME_RATE, order=31, method="fir")
    with pytest.raises(ValueError, match="edges"):
        design_filter("lowpass", 2.0, FRAME_RATE).apply(np.ones(100), edges="cut")
    with pytest.raises(ValueError, match="frame_rate"):
        design_filter("lowpass", 2.0, -1.0)


def test_trace_too_short_for_the_padding_names_the_minimum_length():
    filt = design_filter("lowpass", 2.0, FRAME_RATE, order=4)
    need = filt.default_padlen + 1
    assert filt.min_frames() == need
    with pytest.raises(ValueError, match=f"at least {need} frames"):
        filt.apply(np.ones(need - 1))
    filt.apply(np.ones(need))  # just long enough
    with pytest.raises(ValueError, match="at least 21 frames"):
        filt.apply(np.ones(15), padlen=20)


# --------------------------------------------------------------------------- missing samples
def test_missing_samples_stay_missing_and_their_neighbourhood_is_marked():
    rng = np.random.default_rng(6)
    x = rng.normal(size=(2, 600)).cumsum(axis=1)
    x[0, 200:210] = np.nan
    x[1, 400] = np.inf
    filt = design_filter("lowpass", 2.0, FRAME_RATE, order=4)
    y, mask = filt.apply(x, edges="mark")
    np.testing.assert_array_equal(np.isnan(y), ~np.isfinite(x))
    e = filt.edge_frames
    assert mask[0, 200 - e:210 + e].all() and not mask[0, 200 - e - 1] and not mask[0, 210 + e]
    assert mask[1, 400 - e:401 + e].all() and not mask[1, 400 - e - 1] and not mask[1, 401 + e]
    # Reference: the same scipy filter run on the trace with the gap linearly interpolated (numpy.interp).
    frames = np.arange(600)
    good = np.isfinite(x[0])
    filled = np.interp(frames, frames[good], x[0, good])
    ref = ss.sosfiltfilt(filt.sos, filled)
    np.testing.assert_allclose(y[0, good], ref[good], atol=1e-12)


def test_all_missing_trace_is_refused():
    with pytest.raises(MissingDataError):
        zero_phase_filter(np.full((2, 100), np.nan), FRAME_RATE, "lowpass", 2.0)


@settings(max_examples=40, deadline=None)
@given(rois=st.integers(1, 3), frames=st.integers(60, 300), seed=st.integers(0, 10_000),
       missing_fraction=st.floats(0.0, 0.3), two_d=st.booleans())
def test_filter_preserves_shape_and_nan_positions(rois, frames, seed, missing_fraction, two_d):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rois, frames))
    holes = rng.random(x.shape) < missing_fraction
    holes[:, 0] = False  # every ROI keeps a finite sample
    x[holes] = np.nan
    if not two_d:
        x, holes = x[0], holes[0]
    result = zero_phase_filter(x, FRAME_RATE, "lowpass", 3.0, order=2)
    assert result.filtered.shape == x.shape
    np.testing.assert_array_equal(np.isnan(result.filtered), holes)
    assert np.isfinite(result.filtered[~holes]).all()
    assert result.edge_mask[holes].all()
    np.testing.assert_array_equal(result.missing.mask, holes)


# --------------------------------------------------------------------------- detrending
def test_highpass_detrend_removes_slow_drift_and_keeps_fast_signal():
    # Reference: the same zero-phase high-pass, scipy.signal.sosfiltfilt on scipy.signal.butter coefficients.
    n = 18000
    t = np.arange(n) / FRAME_RATE
    fast = np.sin(2 * np.pi * 1.0 * t)
    drift = 5.0 * np.sin(2 * np.pi * t / 2000.0) + 0.01 * t
    result = detrend(fast + drift, FRAME_RATE, method="highpass", cutoff_hz=0.05)
    assert isinstance(result, DetrendResult)
    ref = ss.sosfiltfilt(ss.butter(2, 0.05, "highpass", fs=FRAME_RATE, output="sos"), fast + drift)
    np.testing.assert_allclose(result.detrended, ref, atol=1e-12)
    np.testing.assert_allclose(result.trend, fast + drift - ref, atol=1e-12)
    middle = slice(3000, -3000)
    assert np.abs(result.detrended[middle] - fast[middle]).max() < 0.05
    assert result.cutoff_hz == 0.05 and result.amplitude is None


def _bleaching_recording(seed, n=27000, amplitude=80.0, decay_s=300.0, offset=120.0, noise=3.0):
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FRAME_RATE
    curve = amplitude * np.exp(-t / decay_s) + offset
    events = (rng.random(n) < 0.2 / FRAME_RATE).astype(float)
    transients = np.convolve(events, np.exp(-np.arange(150) / FRAME_RATE / 0.6))[:n]
    return curve * (1 + 0.4 * transients) + rng.normal(0, noise, n), curve


def test_exponential_detrend_recovers_the_bleaching_curve():
    # Reference: the generating model a*exp(-t/tau) + c (simulation ground truth), with sparse positive
    # transients and noise; the fit uses the lower envelope so transients must not pull it up.
    traces, curves = zip(*(_bleaching_recording(seed) for seed in range(3)))
    x = np.array(traces)
    result = detrend(x, FRAME_RATE, method="exponential")
    np.testing.assert_allclose(result.time_constant_s, 300.0, rtol=0.05)
    np.testing.assert_allclose(result.amplitude, 80.0, rtol=0.05)
    np.testing.assert_allclose(result.offset, 120.0, rtol=0.03)
    np.testing.assert_allclose(result.trend, np.array(curves), rtol=0.02)
    # Division by the curve normalised to t = 0: the baseline is flat at the initial level.
    flat = np.array(curves)[:, :1] * np.ones_like(x)
    quiet = np.abs(x / np.array(curves) - 1) < 0.01  # frames without a transient
    assert np.median(np.abs(result.detrended[quiet] / flat[quiet] - 1)) < 0.02
    one = detrend(x[1], FRAME_RATE, method="exponential")
    assert one.time_constant_s == pytest.approx(result.time_constant_s[1])


def test_exponential_detrend_keeps_missing_frames_missing():
    x, _ = _bleaching_recording(7, n=9000)
    x[3000:3300] = np.nan
    result = detrend(x, FRAME_RATE, method="exponential")
    np.testing.assert_array_equal(np.isnan(result.detrended), np.isnan(x))
    assert result.missing.count == 300
    assert result.time_constant_s == pytest.approx(300.0, rel=0.15)


def test_exponential_detrend_refuses_traces_centred_on_zero():
    x = np.random.default_rng(8).normal(size=6000)
    with pytest.raises(ValueError, match="highpass"):
        detrend(x, FRAME_RATE, method="exponential")
    with pytest.raises(ValueError, match="method"):
        detrend(x, FRAME_RATE, method="linear")
