"""Tests for calcium.signal.noise: white-noise level from the upper band of the power spectrum.

Method: Pnevmatikakis et al. (2016), Neuron 89(2):285-299 (noise s.d. from the PSD over the upper half
of the spectrum); Welch (1967), IEEE Trans. Audio Electroacoust. 15(2):70-73.
"""
import warnings

import numpy as np
import pytest
import scipy.signal as ss
from hypothesis import given, settings
from hypothesis import strategies as st

from calcium._checks import MissingDataError
from calcium.signal import estimate_noise

FRAME_RATE = 30.0
AVERAGES = ("arithmetic", "median", "geometric")


@pytest.mark.parametrize("average", AVERAGES)
@pytest.mark.parametrize("seed", range(5))
def test_white_noise_of_known_sd_is_recovered_within_5_percent(average, seed):
    # Reference: one-sided PSD of white noise of variance s^2 is 2 s^2 / fs at every frequency.
    sd = 0.5 + seed
    x = np.random.default_rng(seed).normal(10.0, sd, 10_000)
    assert estimate_noise(x, FRAME_RATE, average=average) == pytest.approx(sd, rel=0.05)


def test_mean_estimate_equals_the_welch_formula_computed_with_scipy():
    # Reference: scipy.signal.welch (Hann, 256-frame segments, half overlap, one-sided density) and
    # sigma^2 = mean PSD over [fs/4, fs/2) * fs/2 (Pnevmatikakis et al. 2016).
    x = np.random.default_rng(21).normal(50.0, 2.0, (3, 5000))
    freq, psd = ss.welch(x, FRAME_RATE, nperseg=256, axis=-1)
    band = (freq >= FRAME_RATE / 4) & (freq < FRAME_RATE / 2)
    expected = np.sqrt(psd[:, band].mean(axis=-1) * FRAME_RATE / 2)
    np.testing.assert_allclose(estimate_noise(x, FRAME_RATE), expected, rtol=1e-10)


@pytest.mark.parametrize("seed", range(4))
def test_ar1_signal_plus_white_noise_gives_the_white_part_within_10_percent(seed):
    # Reference: an AR(1) process (coefficient 0.95 at 30 Hz) has little power in the upper half of the
    # spectrum (its PSD falls as 1 / |1 - 0.95 exp(-i w)|^2), so the estimate is the white part's s.d.
    # Here the coloured part has twice the s.d. of the white part.
    rng = np.random.default_rng(100 + seed)
    n, phi, white_sd, ar_sd = 10_000, 0.95, 1.0, 2.0
    innovations = rng.normal(0.0, ar_sd * np.sqrt(1 - phi ** 2), n)
    coloured = ss.lfilter([1.0], [1.0, -phi], innovations)
    y = coloured + rng.normal(0.0, white_sd, n)
    for average in AVERAGES:
        assert estimate_noise(y, FRAME_RATE, average=average) == pytest.approx(white_sd, rel=0.10)


def test_median_and_log_averages_are_corrected_for_chi_square_bias():
    # Reference: a periodogram value of white noise is (level) * chi2_2 / 2 (Percival & Walden 1993,
    # Spectral Analysis for Physical Applications); its median is ln 2 times the mean, and the mean of its
    # log is the log of the mean minus Euler's gamma. On 256-frame traces (one Welch segment, 2 degrees of
    # freedom) an uncorrected median would read the variance 31 % low and an uncorrected log average 44 %
    # low. Corrected: the median estimate of the variance is unbiased on average over many traces, and the
    # log average is unbiased in the log (its correction is the exact expectation of log chi2_2 / 2).
    x = np.random.default_rng(9).normal(0.0, 2.0, (400, 256))
    median = estimate_noise(x, FRAME_RATE, average="median")
    assert median.shape == (400,)
    assert np.mean(median ** 2) == pytest.approx(4.0, rel=0.03)
    log_average = estimate_noise(x, FRAME_RATE, average="geometric")
    assert np.mean(np.log(log_average ** 2)) == pytest.approx(np.log(4.0), abs=0.03)


def test_median_resists_a_strong_tone_in_the_band_while_the_mean_does_not():
    # Common practice: a narrow spectral peak moves the mean of the band but hardly its median.
    rng = np.random.default_rng(12)
    t = np.arange(20_000) / FRAME_RATE
    y = rng.normal(0.0, 1.0, t.size) + 3.0 * np.sin(2 * np.pi * 11.0 * t)
    assert estimate_noise(y, FRAME_RATE, average="arithmetic") > 1.3
    assert estimate_noise(y, FRAME_RATE, average="median") == pytest.approx(1.0, rel=0.05)


def test_band_can_be_chosen_and_must_lie_below_nyquist():
    # Reference: white noise is flat, so any band gives the same level.
    x = np.random.default_rng(13).normal(0.0, 1.5, 20_000)
    assert estimate_noise(x, FRAME_RATE, band_hz=(2.0, 6.0)) == pytest.approx(1.5, rel=0.05)
    with pytest.raises(ValueError, match="Nyquist"):
        estimate_noise(x, FRAME_RATE, band_hz=(5.0, 16.0))
    with pytest.raises(ValueError, match="band_hz"):
        estimate_noise(x, FRAME_RATE, band_hz=(6.0, 2.0))
    with pytest.raises(ValueError, match="band_hz"):
        estimate_noise(x, FRAME_RATE, band_hz=3.0)
    with pytest.raises(ValueError, match="no frequency"):
        estimate_noise(x, FRAME_RATE, band_hz=(3.0, 3.01))


def test_two_d_input_gives_one_estimate_per_roi_equal_to_one_d():
    x = np.random.default_rng(14).normal(0.0, 1.0, (5, 3000)) * np.arange(1, 6)[:, None]
    per_roi = estimate_noise(x, FRAME_RATE)
    assert per_roi.shape == (5,)
    np.testing.assert_allclose(per_roi, [estimate_noise(row, FRAME_RATE) for row in x], rtol=1e-12)
    assert isinstance(estimate_noise(x[0], FRAME_RATE), float)


def test_missing_samples_are_skipped_without_joining_across_gaps():
    # Reference: the known white-noise s.d. A large step hidden inside a gap would add broad-band power if
    # the stretches on either side were joined; taking the spectrum of each finite stretch avoids it.
    rng = np.random.default_rng(15)
    x = rng.normal(0.0, 1.0, (2, 12_000))
    x[:, 6000:] += 500.0
    x[:, 5990:6010] = np.nan
    x[1, 100] = np.inf
    for average in AVERAGES:
        np.testing.assert_allclose(estimate_noise(x, FRAME_RATE, average=average), 1.0, rtol=0.05)


@pytest.mark.parametrize("band_hz", [None, (0.0, 15.0)])
def test_with_gaps_the_spectrum_averages_scipy_periodograms_of_segments_without_missing_samples(band_hz):
    # Reference: scipy.signal.spectrogram gives the periodogram of each Welch segment (Hann, 256 frames,
    # half overlap, density scaling); with gaps, the estimate is the average over the segments that hold no
    # missing sample.
    rng = np.random.default_rng(17)
    x = rng.normal(3.0, 1.0, (2, 4000)).cumsum(axis=1) * 0.1 + rng.normal(size=(2, 4000))
    x[0, [300, 1700, 1701, 3990]] = np.nan
    x[1, 2000:2300] = np.nan
    freq, _, spec = ss.spectrogram(np.nan_to_num(x), FRAME_RATE, window="hann", nperseg=256, noverlap=128,
                                   detrend="constant", scaling="density", mode="psd", axis=-1)
    starts = np.arange(spec.shape[-1]) * 128
    low, high = (FRAME_RATE / 4, FRAME_RATE / 2) if band_hz is None else band_hz
    band = (freq >= low) & (freq <= high) & (freq > 0) & (freq < FRAME_RATE / 2)
    for roi in range(2):
        clean = np.array([np.isfinite(x[roi, s:s + 256]).all() for s in starts])
        level = spec[roi][:, clean].mean(axis=1)[band].mean()
        expected = np.sqrt(level * FRAME_RATE / 2)
        got = estimate_noise(x, FRAME_RATE, band_hz=band_hz)[roi]
        assert got == pytest.approx(expected, rel=1e-10)


def test_short_stretches_between_gaps_set_a_shorter_segment():
    rng = np.random.default_rng(16)
    x = rng.normal(0.0, 1.0, 3000)
    x[::100] = np.nan          # finite stretches of 99 frames
    assert estimate_noise(x, FRAME_RATE) == pytest.approx(1.0, rel=0.05)
    x[::10] = np.nan           # finite stretches of 9 frames: too short
    with pytest.raises(ValueError, match="16 consecutive finite frames"):
        estimate_noise(x, FRAME_RATE)


def test_too_short_or_all_missing_traces_are_refused():
    with pytest.raises(ValueError, match="at least 16"):
        estimate_noise(np.ones(15), FRAME_RATE)
    with pytest.raises(MissingDataError):
        estimate_noise(np.full(100, np.nan), FRAME_RATE)
    x = np.random.default_rng(1).normal(size=(3, 100))
    x[2] = np.nan
    with pytest.raises(MissingDataError, match="2"):
        estimate_noise(x, FRAME_RATE)
    with pytest.raises(ValueError, match="average"):
        estimate_noise(x[0], FRAME_RATE, average="mode")
    with pytest.raises(ValueError, match="frame_rate"):
        estimate_noise(x[0], 0.0)


@settings(max_examples=30, deadline=None)
@given(rois=st.integers(1, 4), frames=st.integers(16, 700), seed=st.integers(0, 10_000),
       scale=st.floats(1e-3, 1e3), two_d=st.booleans())
def test_estimate_is_positive_finite_and_scales_with_the_trace(rois, frames, seed, scale, two_d):
    # Reference: the s.d. is homogeneous of degree 1 (scaling the trace scales the estimate).
    x = np.random.default_rng(seed).normal(size=(rois, frames))
    if not two_d:
        x = x[0]
    base = np.atleast_1d(estimate_noise(x, FRAME_RATE))
    scaled = np.atleast_1d(estimate_noise(scale * x, FRAME_RATE))
    assert base.shape == ((rois,) if two_d else (1,))
    assert np.isfinite(base).all() and (base > 0).all()
    np.testing.assert_allclose(scaled, scale * base, rtol=1e-9)


@pytest.mark.parametrize("n", [8, 64, 255, 256])
def test_the_window_is_scipys_hann_and_the_chi_square_median_is_scipys(n):
    # References: scipy.signal.get_window("hann", n) (periodic, as scipy.signal.welch uses it) and
    # scipy.stats.chi2.median, which the per-ROI path computes without importing scipy.signal / scipy.stats.
    import scipy.special
    import scipy.stats

    from calcium.signal.noise import _hann

    np.testing.assert_allclose(_hann(n), ss.get_window("hann", n), rtol=0, atol=1e-15)
    dof = np.array([2.0, 3.7, 18.0, 250.0])
    np.testing.assert_allclose(2.0 * scipy.special.gammaincinv(dof / 2.0, 0.5), scipy.stats.chi2.median(dof),
                               rtol=1e-12)


def test_many_rows_give_exactly_the_values_of_one_row_at_a_time():
    # A ROI's noise must not depend on the other ROIs of the call (the pipeline estimates a chunk at once and
    # promises results independent of the chunking): bit for bit, with and without missing frames.
    rng = np.random.default_rng(21)
    for n in (300, 5000, 36000):
        x = rng.normal(size=(5, n)) + np.cumsum(rng.normal(size=(5, n)), axis=1) * 0.01
        x[1, rng.integers(0, n, 4)] = np.nan
        for band in (None, (0.0, 5.0)):
            together = estimate_noise(x, 30.0, band_hz=band)
            np.testing.assert_array_equal(together, [estimate_noise(row, 30.0, band_hz=band) for row in x])


@pytest.mark.parametrize("scale", [1e300, 1e-300, 2.0 ** 600])
@pytest.mark.parametrize("gaps", [False, True])
def test_values_of_extreme_magnitude_give_the_scaled_estimate_not_inf_or_zero(scale, gaps):
    # Reference: the s.d. is homogeneous of degree 1 (scaling a trace by c scales its noise s.d. by c);
    # the squares of 1e300 overflow float64 and those of 1e-300 underflow, which must not show.
    x = np.random.default_rng(12).normal(size=(2, 3000))
    if gaps:
        x[0, 100:400] = np.nan
    base = estimate_noise(x, FRAME_RATE)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no overflow warning reaches the user either
        scaled = estimate_noise(x * scale, FRAME_RATE)
    assert np.isfinite(scaled).all() and (scaled > 0).all()
    np.testing.assert_allclose(scaled / scale, base, rtol=1e-9)


@pytest.mark.parametrize("old, new", [("mean", "arithmetic"), ("logmeanexp", "geometric")])
def test_former_names_of_the_averages_still_work_with_a_deprecation_warning(old, new):
    x = np.random.default_rng(3).normal(0.0, 1.0, 4000)
    with pytest.warns(DeprecationWarning, match=new):
        value = estimate_noise(x, FRAME_RATE, average=old)
    assert value == estimate_noise(x, FRAME_RATE, average=new)
