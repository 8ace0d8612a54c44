"""Tests for calcium.signal.rhythms: periodic components shared across a session (spectra, coherence,
short-time Fourier transform, Morlet scalogram, detection, aliasing, removal, phase locking), and the
``exclude_hz`` bands of calcium.signal.estimate_noise.

Each check against something outside the project names it beside the check.
"""
import numpy as np
import pytest
import scipy.signal as ss

from calcium.signal import estimate_noise

FRAME_RATE = 30.0


# --------------------------------------------------------------------------- noise without the peaks
def test_noise_estimate_leaves_out_the_excluded_bands_as_the_welch_formula_does():
    # Reference: scipy.signal.welch (Hann, 256-frame segments, half overlap) and sigma^2 = mean PSD over the
    # band [fs/4, fs/2) without the excluded bins, times fs/2 (Pnevmatikakis et al. 2016).
    rng = np.random.default_rng(3)
    t = np.arange(20_000) / FRAME_RATE
    x = rng.normal(0.0, 1.0, (2, t.size)) + 3.0 * np.sin(2 * np.pi * 11.0 * t)
    freq, psd = ss.welch(x, FRAME_RATE, nperseg=256, axis=-1)
    band = (freq >= FRAME_RATE / 4) & (freq < FRAME_RATE / 2) & ~((freq >= 10.5) & (freq <= 11.5))
    expected = np.sqrt(psd[:, band].mean(axis=-1) * FRAME_RATE / 2)
    got = estimate_noise(x, FRAME_RATE, exclude_hz=[(10.5, 11.5)])
    np.testing.assert_allclose(got, expected, rtol=1e-10)
    assert np.all(np.abs(got - 1.0) < 0.05)                  # the tone's power is gone from the estimate
    assert np.all(estimate_noise(x, FRAME_RATE) > 1.2)        # (and it was there without the exclusion)


def test_noise_exclusion_is_checked_and_must_leave_some_of_the_band():
    x = np.random.default_rng(0).normal(size=2000)
    with pytest.raises(ValueError, match="exclude_hz"):
        estimate_noise(x, FRAME_RATE, exclude_hz=[(5.0,)])
    with pytest.raises(ValueError, match="exclude_hz"):
        estimate_noise(x, FRAME_RATE, exclude_hz=[(6.0, 5.0)])
    with pytest.raises(ValueError, match="exclude less"):
        estimate_noise(x, FRAME_RATE, exclude_hz=[(7.0, 15.0)])


# --------------------------------------------------------------------------- a small session made here
def _session(rng, *, n_rois=30, n_frames=9000, frame_rate=FRAME_RATE, noise_sd=0.1, rhythms=(), share=1.0):
    """ΔF/F of ROIs firing at random: each spike a decaying exponential (0.8 s) of 0.4 ΔF/F, white noise, and
    rhythms (frequency_hz, amplitude[, drift_hz]) added to a share of the ROIs, each ROI with its own phase."""
    t = np.arange(n_frames) / frame_rate
    spikes = (rng.random((n_rois, n_frames)) < 0.3 / frame_rate).astype(float)
    dff = 0.4 * ss.lfilter([1.0], [1.0, -np.exp(-1 / (0.8 * frame_rate))], spikes, axis=-1)
    dff += rng.normal(0.0, noise_sd, dff.shape)
    carriers = np.flatnonzero(rng.random(n_rois) < share)
    for rhythm in rhythms:
        freq, amplitude, drift = (*rhythm, 0.0)[:3]
        phase = 2 * np.pi * (freq * t + drift * 60.0 / (2 * np.pi) * (1 - np.cos(2 * np.pi * t / 60.0)))
        for i in carriers:
            dff[i] += amplitude * np.sin(phase + rng.uniform(0, 2 * np.pi))
    return dff, carriers


# --------------------------------------------------------------------------- spectra and coherence
from calcium.signal.rhythms import (PhaseLocking, Rhythm, RhythmRemoval, SessionRhythms, apparent_frequency,  # noqa: E402
                                    find_rhythms, notch_edges_hz, phase_locking, physical_frequencies,
                                    remove_rhythms, rhythm_phase, scalogram, session_spectra, shared_component,
                                    spectrogram)


def test_roi_spectra_are_scipy_welch_and_coherence_is_scipy_coherence_with_the_other_rois():
    # Reference: scipy.signal.welch and scipy.signal.coherence (Hann, nperseg, half overlap, constant detrend);
    # the reference of ROI i is the mean of the other ROIs.
    rng = np.random.default_rng(0)
    dff, _ = _session(rng, n_rois=6, n_frames=3000, rhythms=[(7.0, 0.1)])
    spectra = session_spectra(dff, FRAME_RATE, segment_s=5.0)
    assert spectra.segment_frames == 150 and spectra.resolution_hz == pytest.approx(0.2)
    _, psd = ss.welch(dff, FRAME_RATE, nperseg=150, axis=-1)
    np.testing.assert_allclose(spectra.power, psd, rtol=1e-10)
    for i in (0, 5):
        others = np.delete(dff, i, axis=0).mean(axis=0)
        _, expected = ss.coherence(dff[i], others, FRAME_RATE, nperseg=150)
        np.testing.assert_allclose(spectra.coherence[i, 1:], expected[1:], rtol=1e-8, atol=1e-12)
    _, average_psd = ss.welch(dff.mean(axis=0), FRAME_RATE, nperseg=150)
    np.testing.assert_allclose(spectra.reference_power, average_psd, rtol=1e-10)


def test_coherence_with_the_neuropil_is_scipy_coherence_and_its_spectrum_is_welch():
    # Reference: scipy.signal.coherence / welch of each ROI with its own neuropil trace.
    rng = np.random.default_rng(1)
    dff, _ = _session(rng, n_rois=3, n_frames=3000)
    neuropil = 0.5 * dff + rng.normal(0, 0.1, dff.shape)
    spectra = session_spectra(dff, FRAME_RATE, segment_s=5.0, neuropil=neuropil)
    assert spectra.reference == "neuropil"
    _, expected = ss.coherence(dff[1], neuropil[1], FRAME_RATE, nperseg=150)
    np.testing.assert_allclose(spectra.coherence[1, 1:], expected[1:], rtol=1e-8)
    np.testing.assert_allclose(spectra.neuropil_power, ss.welch(neuropil, FRAME_RATE, nperseg=150)[1], rtol=1e-10)


def test_a_segment_with_a_missing_frame_is_left_out_of_the_average():
    # Reference: the Welch average is the mean of the periodograms of the segments (scipy.signal.welch of each
    # whole segment alone); the segments holding the missing frame are not among them.
    rng = np.random.default_rng(2)
    x = rng.normal(size=(1, 1500))
    x[0, 400] = np.nan
    spectra = session_spectra(x, FRAME_RATE, segment_s=5.0)
    starts = np.arange(0, 1500 - 150 + 1, 75)
    kept = [s for s in starts if not (s <= 400 < s + 150)]
    expected = np.mean([ss.welch(x[0, s:s + 150], FRAME_RATE, nperseg=150)[1] for s in kept], axis=0)
    np.testing.assert_allclose(spectra.power[0], expected, rtol=1e-10)
    assert spectra.n_segments[0] == len(kept) == len(starts) - 2


def test_a_sinusoid_has_the_closed_form_power_at_its_frequency():
    # Closed forms: for a sinusoid of amplitude A at the centre of a bin, Welch with a periodic Hann window of
    # N frames gives the one-sided density A^2 N / (3 fs) at that bin (|X| = A N / 4, sum w^2 = 3N/8), and the
    # density summed over the bins times the resolution is its variance A^2 / 2 (Parseval).
    amplitude, n = 0.7, 300
    t = np.arange(30_000) / FRAME_RATE
    spectra = session_spectra(amplitude * np.sin(2 * np.pi * 4.0 * t), FRAME_RATE, segment_s=n / FRAME_RATE)
    k = int(np.argmax(spectra.power[0]))
    assert spectra.freq_hz[k] == pytest.approx(4.0)
    assert spectra.power[0, k] == pytest.approx(amplitude ** 2 * n / (3 * FRAME_RATE), rel=1e-6)
    assert spectra.power[0].sum() * spectra.resolution_hz == pytest.approx(amplitude ** 2 / 2, rel=1e-6)


# --------------------------------------------------------------------------- short-time Fourier transform
def test_spectrogram_is_scipy_stft_as_a_density_and_states_its_resolution():
    # Reference: scipy.signal.stft (Hann window, boundary=None, padded=False, scaling 'spectrum': X / sum(w));
    # density = 2 |X sum(w)|^2 / (fs sum(w^2)) away from 0 Hz and Nyquist.
    x = np.random.default_rng(3).normal(size=3000)
    result = spectrogram(x, FRAME_RATE, window_s=5.0, overlap=0.5)
    freq, times, stft = ss.stft(x, FRAME_RATE, nperseg=150, noverlap=75, boundary=None, padded=False)
    window = ss.get_window("hann", 150)
    density = np.abs(stft) ** 2 * window.sum() ** 2 / (FRAME_RATE * np.sum(window ** 2))
    density[1:-1] *= 2
    np.testing.assert_allclose(result.power, density, rtol=1e-10)
    np.testing.assert_allclose(result.time_s, times)
    assert (result.window_s, result.step_s, result.resolution_hz) == (5.0, 2.5, pytest.approx(0.2))
    assert result.bandwidth_hz == pytest.approx(0.3)      # Hann: 1.5 bins (Harris 1978)
    assert "5 s in time" in result.describe()


def test_spectrogram_windows_holding_a_missing_frame_are_blank():
    x = np.random.default_rng(4).normal(size=1500)
    x[700] = np.nan
    result = spectrogram(x, FRAME_RATE, window_s=5.0)
    blank = np.isnan(result.power).all(axis=0)
    starts = (result.time_s * FRAME_RATE - 75).round().astype(int)
    np.testing.assert_array_equal(blank, (starts <= 700) & (700 < starts + 150))


# --------------------------------------------------------------------------- Morlet scalogram
def test_scalogram_reads_a_sinusoids_amplitude():
    # Closed form: the wavelet's gain is 2 exp(-(nu - f)^2 / (2 sigma_f^2)) on positive frequencies, so a
    # sinusoid of amplitude a at f gives |W(f, t)| = a away from the edges (beyond 6 sigma_t the Gaussian
    # reaches the padding with a weight below exp(-18)); at the edge of the cone of influence (sqrt(2) sigma_t,
    # Torrence & Compo 1998) the edge has taken less than a tenth.
    t = np.arange(6000) / FRAME_RATE
    result = scalogram(0.3 * np.cos(2 * np.pi * 6.0 * t + 0.4), FRAME_RATE, freq_hz=[6.0, 3.0])
    far = int(np.ceil(6 * result.time_resolution_s[0] * FRAME_RATE))
    np.testing.assert_allclose(result.amplitude[0][far:-far], 0.3, rtol=1e-6)
    np.testing.assert_allclose(result.amplitude[0][result.reliable[0]], 0.3, rtol=0.1)
    assert np.median(result.amplitude[1][result.reliable[1]]) < 1e-3       # 3 Hz is 21 sigma_f away


@pytest.mark.parametrize("n_cycles", [4.0, 7.0])
@pytest.mark.parametrize("freq", [2.0, 8.0])
def test_morlet_time_and_frequency_spread_follow_from_the_number_of_cycles(n_cycles, freq):
    # Published forms: the Morlet wavelet of n cycles at f has a Gaussian envelope of s.d. sigma_t = n / (2 pi f)
    # and a Gaussian spectrum of s.d. sigma_f = f / n = 1 / (2 pi sigma_t) (Tallon-Baudry et al. 1996,
    # J Neurosci 16:4240; Torrence & Compo 1998, Bull Am Meteorol Soc 79:61). Measured on the transform:
    # the response to an impulse over time, and to unit sinusoids over their frequency.
    frame_rate = 100.0
    impulse = np.zeros(20_001)
    impulse[10_000] = 1.0
    result = scalogram(impulse, frame_rate, freq_hz=[freq], n_cycles=n_cycles)
    t = (np.arange(impulse.size) - 10_000) / frame_rate
    near = np.abs(t) < 8 * n_cycles / (2 * np.pi * freq)           # (away from the trace's own ends)
    envelope, t = result.amplitude[0][near], t[near]
    spread_t = np.sqrt(np.sum(t ** 2 * envelope) / np.sum(envelope))
    assert spread_t == pytest.approx(n_cycles / (2 * np.pi * freq), rel=1e-3)
    assert result.time_resolution_s[0] == pytest.approx(n_cycles / (2 * np.pi * freq))
    assert result.frequency_resolution_hz[0] == pytest.approx(freq / n_cycles)
    assert result.edge_s[0] == pytest.approx(np.sqrt(2) * n_cycles / (2 * np.pi * freq))  # T&C cone of influence
    probes = freq + np.linspace(-2.5, 2.5, 41) * freq / n_cycles
    tt = np.arange(40_000) / frame_rate
    gains = np.array([np.median(scalogram(np.cos(2 * np.pi * p * tt), frame_rate, freq_hz=[freq],
                                          n_cycles=n_cycles).amplitude[0][15_000:25_000]) for p in probes])
    curvature = np.polyfit(probes - freq, np.log(gains), 2)[0]         # log of a Gaussian: -x^2 / (2 s^2)
    assert np.sqrt(-0.5 / curvature) == pytest.approx(freq / n_cycles, rel=1e-3)


def test_scalogram_cone_of_influence_and_missing_frames():
    x = np.random.default_rng(5).normal(size=3000)
    x[1500] = np.nan
    result = scalogram(x, FRAME_RATE, freq_hz=[1.0, 10.0])
    reach = np.ceil(result.edge_s * FRAME_RATE).astype(int)
    for k in range(2):
        assert not result.reliable[k, :reach[k]].any() and not result.reliable[k, -reach[k]:].any()
        assert not result.reliable[k, 1500 - reach[k]:1500 + reach[k] + 1].any()
        assert result.reliable[k, reach[k] + 1:1500 - reach[k] - 1].all()
    assert np.isnan(result.amplitude[:, 1500]).all() and np.isfinite(result.amplitude[:, 1499]).all()


# --------------------------------------------------------------------------- aliasing
@pytest.mark.parametrize("physical", [3.0, 14.9, 16.0, 50.0, 60.0, 77.7, 120.0])
def test_apparent_frequency_is_where_the_sampled_rhythm_shows(physical):
    # Reference: the aliasing formula |f - fs round(f / fs)| (Oppenheim & Schafer 2010, sec. 4.2), against the
    # peak of numpy's FFT of the sampled sinusoid itself.
    n = 3000
    samples = np.sin(2 * np.pi * physical * np.arange(n) / FRAME_RATE + 0.3)
    peak = np.fft.rfftfreq(n, 1 / FRAME_RATE)[np.argmax(np.abs(np.fft.rfft(samples)))]
    assert apparent_frequency(physical, FRAME_RATE) == pytest.approx(peak, abs=FRAME_RATE / n)
    assert apparent_frequency(physical, FRAME_RATE) == pytest.approx(abs(physical - FRAME_RATE * round(physical / FRAME_RATE)))


def test_physical_frequencies_are_every_source_of_an_observed_peak():
    # Reference: the aliasing formula (Oppenheim & Schafer 2010): every candidate k fs +- f appears at f.
    candidates = physical_frequencies(10.0, FRAME_RATE, up_to_hz=130.0)
    np.testing.assert_allclose(candidates, [10, 20, 40, 50, 70, 80, 100, 110, 130])
    np.testing.assert_allclose(apparent_frequency(candidates, FRAME_RATE), 10.0)
    with pytest.raises(ValueError, match="Nyquist"):
        physical_frequencies(16.0, FRAME_RATE)


# --------------------------------------------------------------------------- detection
def test_an_aliased_shared_rhythm_is_found_and_described():
    # Mains at 50 Hz sampled at 30 Hz appears at 10 Hz (aliasing formula); amplitude 0.1 = the noise s.d.;
    # a sinusoid's amplitude a is sqrt(2 x its power) (closed form).
    rng = np.random.default_rng(6)
    dff, carriers = _session(rng, n_rois=40, n_frames=18_000, rhythms=[(50.0, 0.1)], share=0.6)
    found = find_rhythms(dff, FRAME_RATE)
    assert len(found.rhythms) == 1
    rhythm = found.rhythms[0]
    assert isinstance(rhythm, Rhythm) and isinstance(found, SessionRhythms)
    assert rhythm.frequency_hz == pytest.approx(10.0, abs=0.02)
    assert rhythm.band_hz[0] < 10.0 < rhythm.band_hz[1] and rhythm.bandwidth_hz < 1.0
    assert rhythm.share == pytest.approx(carriers.size / 40, abs=0.03)
    np.testing.assert_array_equal(np.flatnonzero(rhythm.roi_significant), carriers)
    assert rhythm.amplitude == pytest.approx(0.1, rel=0.1)
    assert rhythm.amplitude_to_noise == pytest.approx(1.0, rel=0.1)
    assert rhythm.coherent and rhythm.stability == "steady" and rhythm.harmonic_of is None
    assert np.min(np.abs(rhythm.physical_hz - 50.0)) < 0.02 and "mains at 50" in rhythm.verdict
    np.testing.assert_allclose(found.noise_sd, 0.1, rtol=0.05)             # the peak is left out of the noise
    assert found.summary().count("\n- ") == 1


def test_a_clean_session_has_no_rhythm_and_the_threshold_is_above_its_statistic():
    rng = np.random.default_rng(7)
    dff, _ = _session(rng, n_rois=40, n_frames=18_000)
    found = find_rhythms(dff, FRAME_RATE)
    assert found.rhythms == () and "no shared rhythm" in found.summary()
    searched = np.isfinite(found.threshold)
    assert np.all(found.statistic[searched] < found.threshold[searched])


def test_a_drifting_rhythm_and_a_harmonic_are_told_apart_from_a_steady_one():
    rng = np.random.default_rng(8)
    dff, _ = _session(rng, n_rois=30, n_frames=36_000, rhythms=[(4.0, 0.15, 0.4), (9.0, 0.2), (18.0, 0.1)])
    found = find_rhythms(dff, FRAME_RATE)
    by_freq = {round(r.frequency_hz): r for r in found.rhythms}
    assert set(by_freq) >= {4, 9, 12}       # 18 Hz aliases to 12 Hz at 30 frames/s
    assert by_freq[4].stability == "drifting" and by_freq[4].bandwidth_hz > 0.6
    assert by_freq[9].stability == "steady"
    assert by_freq[12].harmonic_of == pytest.approx(9.0, abs=0.05)


def test_an_intermittent_rhythm_is_called_intermittent():
    rng = np.random.default_rng(9)
    dff, _ = _session(rng, n_rois=30, n_frames=18_000)
    t = np.arange(18_000) / FRAME_RATE
    dff[:, :9000] += 0.2 * np.sin(2 * np.pi * 6.0 * t[:9000])
    rhythm, = find_rhythms(dff, FRAME_RATE).rhythms
    assert rhythm.stability == "intermittent" and 0 < rhythm.present.sum() < rhythm.present.size


def test_detection_arguments_are_checked():
    x = np.random.default_rng(0).normal(size=(3, 3000))
    for kwargs, name in [({"min_share": 1.0}, "min_share"), ({"false_alarm": 0}, "false_alarm"),
                         ({"segment_s": -1}, "segment_s"), ({"segment_s": 0.5}, "segment_s"),
                         ({"neuropil": np.zeros((2, 3000))}, "neuropil")]:
        with pytest.raises(ValueError, match=name):
            find_rhythms(x, FRAME_RATE, **kwargs)


# --------------------------------------------------------------------------- removal
@pytest.mark.parametrize("centre, width", [(10.0, 0.4), (2.5, 0.2), (14.0, 0.6)])
def test_notch_is_the_second_order_notch_of_scipy_iirnotch(centre, width):
    # Reference: scipy.signal.iirnotch(w0, Q = w0 / bw) and scipy.signal.freqz: the single-pass gain of our notch
    # equals it, and the zero-phase gain is its square.
    removal = remove_rhythms(np.zeros(3000), FRAME_RATE, [(centre - width / 2, centre + width / 2)])
    notch = removal.filters[0]
    b, a = ss.iirnotch(centre, centre / width, fs=FRAME_RATE)
    freq, single, zero_phase = notch.frequency_response(1001)
    _, reference = ss.freqz(b, a, worN=freq, fs=FRAME_RATE)
    np.testing.assert_allclose(single, np.abs(reference), atol=1e-10)
    np.testing.assert_allclose(zero_phase, np.abs(reference) ** 2, atol=1e-10)
    # the band-stop edges: tan(w1/2) tan(w2/2) = tan^2(w0/2) and w2 - w1 = 2 pi width / fs (bilinear transform)
    low, high = notch_edges_hz(centre, width, FRAME_RATE)
    half = lambda f: np.tan(np.pi * f / FRAME_RATE)  # noqa: E731
    assert half(low) * half(high) == pytest.approx(half(centre) ** 2, rel=1e-12)
    assert high - low == pytest.approx(width, rel=1e-12)


def test_removal_takes_out_a_rhythm_without_moving_a_transient_in_time():
    # Reference: zero-phase (forward-backward) filtering has no delay (Oppenheim & Schafer 2010): the peak of a
    # transient stays at its frame, and its cross-correlation with the original peaks at lag 0.
    t = np.arange(6000) / FRAME_RATE
    after = np.maximum(t - 100.0, 0.0)
    transient = 0.5 * np.exp(-after / 0.8) * (1 - np.exp(-after / 0.05))
    rhythm = 0.2 * np.sin(2 * np.pi * 7.0 * t)
    for method in ("notch", "bandstop"):
        removal = remove_rhythms(transient + rhythm, FRAME_RATE, [(6.8, 7.2)], method=method)
        assert isinstance(removal, RhythmRemoval)
        inner = slice(removal.edge_frames, -removal.edge_frames)
        assert np.max(np.abs(removal.cleaned[inner] - transient[inner])) < 0.02
        assert np.argmax(removal.cleaned) == np.argmax(transient)
        lags = np.arange(-30, 31)
        xcorr = [np.dot(np.roll(removal.cleaned[inner], lag), transient[inner]) for lag in lags]
        assert lags[np.argmax(xcorr)] == 0


def test_the_reported_edge_span_bounds_what_the_filter_adds_around_a_frame():
    impulse = np.zeros(8001)
    impulse[4000] = 1.0
    removal = remove_rhythms(impulse, FRAME_RATE, [(9.9, 10.1)])
    added = np.abs(removal.cleaned - impulse)
    span = removal.edge_frames
    assert span > 100                              # a narrow notch rings for ~1/(pi width) = 1.6 s and more
    assert added[:4000 - span].max() <= 1e-3 * added.max() and added[4001 + span:].max() <= 1e-3 * added.max()
    assert added[4000 - span:4000 - span + 3].max() > 0.5e-3 * added.max()
    assert removal.affected[:span].all() and removal.affected[-span:].all() and not removal.affected[span + 1]


def test_missing_frames_stay_missing_and_mark_their_surroundings():
    x = np.random.default_rng(10).normal(0, 0.1, (2, 6000))
    x[1, 3000:3010] = np.nan
    removal = remove_rhythms(x, FRAME_RATE, [(4.9, 5.1)])
    assert np.isnan(removal.cleaned[1, 3000:3010]).all() and np.isfinite(removal.cleaned[0]).all()
    span = removal.edge_frames
    assert removal.affected[1, 3000 - span:3010 + span].all() and not removal.affected[0, 3000]


def test_regression_removes_a_rhythm_reaching_each_roi_with_its_own_phase_and_gain():
    # The shared component is phase-aligned: ROIs in opposite phases do not cancel (a plain average of these
    # five phases would keep a quarter of the rhythm); each ROI's weight has the modulus of its gain.
    rng = np.random.default_rng(11)
    t = np.arange(9000) / FRAME_RATE
    noise = rng.normal(0, 0.1, (5, t.size))
    gains = np.array([0.2, 0.3, 0.25, 0.15, 0.3])
    phases = np.array([0.0, 1.0, 3.0, 4.0, np.pi])
    rhythm = gains[:, None] * np.sin(2 * np.pi * 10.0 * t + phases[:, None])
    removal = remove_rhythms(noise + rhythm, FRAME_RATE, [(9.8, 10.2)], method="regression")
    inner = slice(removal.edge_frames, -removal.edge_frames)
    residual = np.std((removal.removed - rhythm)[:, inner], axis=1)
    assert np.all(residual < 0.02)
    ratios = np.abs(removal.coefficients[:, 0]) / gains
    np.testing.assert_allclose(ratios / ratios.mean(), 1.0, rtol=0.05)
    # the same with the shared component handed in as a reference (as the pipeline's workers get it)
    reference = shared_component(noise + rhythm, FRAME_RATE, [(9.8, 10.2)])
    again = remove_rhythms(noise + rhythm, FRAME_RATE, [(9.8, 10.2)], method="regression", reference=reference)
    assert np.all(np.std((again.removed - rhythm)[:, inner], axis=1) < 0.02)
    assert "regression" in again.describe()


def test_removal_takes_the_bands_of_a_search_and_checks_its_arguments():
    rng = np.random.default_rng(12)
    dff, _ = _session(rng, n_rois=20, n_frames=9000, rhythms=[(11.0, 0.15)])
    found = find_rhythms(dff, FRAME_RATE)
    removal = remove_rhythms(dff, FRAME_RATE, found)
    assert removal.bands_hz == tuple(found.bands_hz)
    assert find_rhythms(removal.cleaned, FRAME_RATE).rhythms == ()
    with pytest.raises(ValueError, match="Nyquist"):
        remove_rhythms(dff, FRAME_RATE, [(14.0, 16.0)])
    with pytest.raises(ValueError, match="method"):
        remove_rhythms(dff, FRAME_RATE, [(5.0, 6.0)], method="comb")
    with pytest.raises(ValueError, match="reference"):
        remove_rhythms(dff, FRAME_RATE, [(5.0, 6.0)], reference=dff[0])


# --------------------------------------------------------------------------- phase and phase locking
def test_rhythm_phase_is_the_hilbert_phase_of_the_zero_phase_band_pass():
    # Reference: scipy.signal.butter (band-pass, order 2, second-order sections), sosfiltfilt, and
    # scipy.signal.hilbert; the phase is the angle of the analytic signal.
    x = np.random.default_rng(13).normal(size=3000)
    result = rhythm_phase(x, FRAME_RATE, (4.0, 6.0))
    sos = ss.butter(2, (4.0, 6.0), btype="bandpass", fs=FRAME_RATE, output="sos")
    analytic = ss.hilbert(ss.sosfiltfilt(sos, x))
    np.testing.assert_allclose(result.phase, np.angle(analytic), atol=1e-9)
    np.testing.assert_allclose(result.amplitude, np.abs(analytic), atol=1e-9)
    assert not result.valid[:result.edge_frames].any() and result.valid[result.edge_frames + 1]


def test_spikes_at_one_phase_lock_perfectly_and_beat_every_surrogate():
    # Closed form: identical phases give PLV = |exp(i phi)| = 1; the p-value is then 1 / (B + 1), the smallest a
    # Monte Carlo test with B surrogates can give (Davison & Hinkley 1997).
    t = np.arange(9000) / FRAME_RATE
    rhythm = rhythm_phase(np.cos(2 * np.pi * 5.0 * t), FRAME_RATE, (4.5, 5.5))
    spikes = np.arange(20, 280) + 0.0            # every second: at the crests of the 5 Hz cosine
    result = phase_locking(spikes, rhythm, n_surrogates=199)
    assert isinstance(result, PhaseLocking)
    assert result.plv == pytest.approx(1.0, abs=1e-6) and result.preferred_phase == pytest.approx(0.0, abs=1e-3)
    assert result.p_value == pytest.approx(1 / 200) and result.n_spikes == spikes.size
    assert result.null_plv < 0.2 and result.describe().startswith("locked")


def test_spikes_at_random_phases_give_plv_near_one_over_root_n_and_uniform_p_values():
    # Rayleigh: for N independent uniform phases, N PLV^2 is exponential with mean 1 (Mardia & Jupp 2000), so
    # PLV is about 1/sqrt(N); a valid test rejects about 5 % of such trains at p <= 0.05.
    rng = np.random.default_rng(14)
    t = np.arange(9000) / FRAME_RATE
    rhythm = rhythm_phase(np.sin(2 * np.pi * 3.0 * t), FRAME_RATE, (2.7, 3.3))
    n = 60
    results = [phase_locking(rng.uniform(20, 280, n), rhythm, n_surrogates=99, seed=k) for k in range(150)]
    assert np.mean([n * r.plv ** 2 for r in results]) == pytest.approx(1.0, abs=0.25)
    assert np.median([r.plv for r in results]) == pytest.approx(np.sqrt(np.log(2) / n), rel=0.2)   # Rayleigh median
    assert np.mean([r.p_value <= 0.05 for r in results]) < 0.12


def test_spikes_at_missing_or_edge_frames_are_not_counted():
    t = np.arange(3000) / FRAME_RATE
    trace = np.sin(2 * np.pi * 5.0 * t)
    trace[1500:1510] = np.nan
    rhythm = rhythm_phase(trace, FRAME_RATE, (4.5, 5.5))
    result = phase_locking([0.1, 50.1, 60.0, 70.0], rhythm, n_surrogates=19)
    assert result.n_spikes == 2                   # 0.1 s is within the edge span, 50.1 s in the gap
    with pytest.raises(ValueError, match="RhythmPhase"):
        phase_locking([1.0], np.zeros(10))


# --------------------------------------------------------------------------- figures
def test_rhythm_figures_draw_from_plain_arrays_and_name_bad_arguments():
    from matplotlib.figure import Figure

    from calcium.report import rhythm_removal_figure, rhythm_spectrum_figure, time_frequency_figure

    rng = np.random.default_rng(15)
    dff, _ = _session(rng, n_rois=10, n_frames=3000, rhythms=[(6.0, 0.2)])
    found = find_rhythms(dff, FRAME_RATE)
    spectra = found.spectra
    fig = rhythm_spectrum_figure(spectra.freq_hz, spectra.median_power, background=found.median_background,
                                 low_power=spectra.quantile_power(0.1), high_power=spectra.quantile_power(0.9),
                                 coherence=spectra.median_coherence, coherence_null=0.05,
                                 peaks_hz=[r.frequency_hz for r in found.rhythms])
    assert isinstance(fig, Figure) and [ax.get_ylabel() for ax in fig.axes] == ["power (ΔF/F² / Hz)", "coherence"]
    with pytest.raises(ValueError, match="background"):
        rhythm_spectrum_figure(spectra.freq_hz, spectra.median_power, background=[1.0, 2.0])
    with pytest.raises(ValueError, match="peak_labels"):
        rhythm_spectrum_figure(spectra.freq_hz, spectra.median_power, peaks_hz=[6.0], peak_labels=["a", "b"])
    result = scalogram(dff.mean(axis=0), FRAME_RATE)
    fig = time_frequency_figure(result.time_s, result.freq_hz, result.amplitude, reliable=result.reliable,
                                resolution=result.describe(), log_frequency=True, max_columns=300)
    assert fig.axes[0].get_yscale() == "log" and fig.axes[0].get_ylabel() == "frequency (Hz)"
    with pytest.raises(ValueError, match="values"):
        time_frequency_figure(result.time_s, result.freq_hz, result.amplitude.T)
    fig = rhythm_removal_figure(FRAME_RATE, dff[0], dff[0] * 0.5, spikes_before=[1.0, 2.0], spikes_after=[2.0],
                                start_s=0.5, duration_s=10.0, roi_label="ROI 0")
    assert len(fig.axes) == 3 and fig.axes[0].get_ylabel() == "ΔF/F"
    with pytest.raises(ValueError, match="start_s"):
        rhythm_removal_figure(FRAME_RATE, dff[0], dff[0], start_s=1e4)


# --------------------------------------------------------------------------- the pipeline stage and the CLI
def test_configuration_defaults_are_the_defaults_of_find_rhythms():
    # Reference: the signature of the public function the [rhythms] section configures.
    import inspect

    from calcium.pipeline import config_from_dict

    section = config_from_dict({"inputs": {"traces": "t.npy"}}).rhythms
    defaults = {k: p.default for k, p in inspect.signature(find_rhythms).parameters.items()
                if p.default is not inspect.Parameter.empty}
    for key in ("segment_s", "min_share", "false_alarm", "lowest_hz"):
        assert getattr(section, key) == defaults[key], key
    assert (section.action, section.method) == ("report", "regression")


def _raw_session(tmp_path, n_rois=16, seconds=60.0, rate=20.0):
    """Raw fluorescence with a rhythm of 23 Hz (aliased to 3 Hz at 20 frames/s) in every ROI."""
    rng = np.random.default_rng(20)
    n = int(seconds * rate)
    dff, _ = _session(rng, n_rois=n_rois, n_frames=n, frame_rate=rate, rhythms=[(23.0, 0.15)])
    from calcium.io import write_traces

    return write_traces(tmp_path / "traces.h5", 100.0 * (1.0 + dff), frame_rate=rate), rate


def _run(tmp_path, traces, name, **rhythms):
    from calcium.pipeline import config_from_dict, run_pipeline

    config = config_from_dict({"inputs": {"traces": str(traces)}, "output": {"folder": str(tmp_path / name)},
                               "execution": {"backend": rhythms.pop("backend", "serial"), "chunk_rois": 4,
                                             "workers": 2},
                               "report": {"enabled": rhythms.pop("report", False), "n_examples": 0}, "rhythms": rhythms})
    return run_pipeline(config, progress=False)


def test_the_run_records_the_rhythm_and_keeps_it_out_of_every_rois_noise(tmp_path):
    # Reference: calcium.signal.estimate_noise called directly on each ROI's ΔF/F with the bands found, widened
    # by two bins of its 256-frame spectrum on each side.
    import json

    from calcium.pipeline import open_results

    traces, rate = _raw_session(tmp_path)
    summary = _run(tmp_path, traces, "report", report=True)
    assert "3.00 Hz" in summary.rhythms and "NOT removed" in summary.rhythms
    with open_results(summary.results_path) as results:
        record = json.loads(results.read("rhythms/summary_json")[0])
        dff = results.read("dff").astype(np.float64)
        noise = results.read("noise_sd")
        assert "dff_filtered" not in results
    (rhythm,) = record["rhythms"]
    assert rhythm["frequency_hz"] == pytest.approx(3.0, abs=0.05) and rhythm["share"] > 0.9
    margin = 2 * rate / 256
    bands = [(rhythm["band_hz"][0] - margin, rhythm["band_hz"][1] + margin)]
    np.testing.assert_allclose(noise, estimate_noise(dff, rate, exclude_hz=bands), rtol=2e-6)
    figures = {path.name for path in (summary.report_path.parent / "figures").iterdir()}
    assert {"rhythm-spectrum.png", "rhythm-scalogram.png", "rhythm-spectrogram.png",
            "rhythm-removal.png"} <= figures
    assert "Periodic artefacts" in summary.report_path.read_text(encoding="utf-8")


@pytest.mark.parametrize("method", ["notch", "regression"])
def test_a_run_that_removes_the_rhythm_gives_each_roi_what_remove_rhythms_gives(tmp_path, method):
    # Reference: calcium.signal.rhythms.remove_rhythms called directly on the ΔF/F of the results (regression:
    # against shared_component of the ROIs searched, as the stage hands it to the workers).
    import json

    from calcium.pipeline import open_results

    traces, rate = _raw_session(tmp_path)
    summary = _run(tmp_path, traces, method, action="remove", method=method, max_rois=7)   # (a part searched)
    assert "removed before the inference" in summary.rhythms
    with open_results(summary.results_path) as results:
        record = json.loads(results.read("rhythms/summary_json")[0])
        dff = results.read("dff").astype(np.float64)
        used = results.read("dff_filtered").astype(np.float64)
        after = results.read("rhythms/median_power_after")
    from calcium.pipeline.stages import calibration_rois

    assert record["rois"] == calibration_rois(16, 7).tolist() and len(record["rois"]) == 7
    bands = [tuple(r["band_hz"]) for r in record["rhythms"]]
    reference = shared_component(dff[record["rois"]], rate, bands) if method == "regression" else None
    expected = remove_rhythms(dff, rate, bands, method=method, reference=reference).cleaned
    np.testing.assert_allclose(used, expected, atol=2e-6)          # (float32 storage)
    band = (np.arange(after.size) * 0.1 >= bands[0][0]) & (np.arange(after.size) * 0.1 <= bands[0][1])
    assert np.isfinite(after).all() and np.nanmax(after[band]) < 3 * np.median(after)


def test_worker_processes_remove_the_rhythm_as_the_serial_run_does(tmp_path):
    from calcium.pipeline import read_results

    traces, _ = _raw_session(tmp_path)
    serial = _run(tmp_path, traces, "serial", action="remove")
    parallel = _run(tmp_path, traces, "processes", action="remove", backend="processes")
    first, second = read_results(serial.results_path)[0], read_results(parallel.results_path)[0]
    for name in ("dff_filtered", "spike_counts", "noise_sd", "rhythms/summary_json"):
        assert np.array_equal(first[name], second[name], equal_nan=first[name].dtype.kind == "f"), name


def test_with_the_search_off_nothing_is_searched_or_recorded(tmp_path):
    from calcium.pipeline import open_results

    traces, _ = _raw_session(tmp_path)
    summary = _run(tmp_path, traces, "off", action="off")
    assert summary.rhythms == ""
    with open_results(summary.results_path) as results:
        assert "rhythms/summary_json" not in results and "dff_filtered" not in results


def _cli(capsys, *args):
    """Run the command line in this process; (exit code, stdout, stderr)."""
    from calcium.cli import main

    try:
        code = main([str(a) for a in args])
    except SystemExit as exc:          # (argparse's usage errors)
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_finds_removes_and_reports_locking(tmp_path, capsys):
    # Reference: the public API called directly (find_rhythms, remove_rhythms) on the same file.
    from calcium.io import read_traces, write_spike_table, write_traces

    rng = np.random.default_rng(21)
    dff, _ = _session(rng, n_rois=12, n_frames=3600, rhythms=[(50.0, 0.15)])
    source = write_traces(tmp_path / "dff.h5", dff, frame_rate=FRAME_RATE)
    t = np.arange(20, 110, 0.1)                                  # at the 10 Hz rhythm's frames: locked
    spikes = write_spike_table(tmp_path / "spikes.csv", {0: t, 1: rng.uniform(5, 115, 300)})
    code, out, err = _cli(capsys, "rhythms", source, "--remove", "notch", "--out", tmp_path / "clean.h5", "--spikes",
                          spikes, "--surrogates", 99, "--figures", tmp_path / "figures", "--roi", 3, "--quiet")
    assert code == 0, err
    assert "1 shared rhythm(s)" in out and "10.00 Hz" in out
    assert "phase locking to 10.00 Hz" in out and "ROI 0: locked" in out
    found = find_rhythms(dff, FRAME_RATE)
    expected = remove_rhythms(dff, FRAME_RATE, found, method="notch").cleaned
    np.testing.assert_allclose(read_traces(tmp_path / "clean.h5").traces, expected, atol=1e-12)
    assert sorted(p.name for p in (tmp_path / "figures").iterdir()) == [
        "rhythm-scalogram.png", "rhythm-spectrogram.png", "rhythm-spectrum.png"]
    code, _, err = _cli(capsys, "rhythms", source, "--remove", "notch", "--out", tmp_path / "clean.h5")
    assert code == 1 and "--overwrite" in err
    for args in (("--out", tmp_path / "x.h5"), ("--remove", "notch"), ("--rhythm-trace", source), ("--roi", 12)):
        code, _, err = _cli(capsys, "rhythms", source, *args)
        assert code == 2 and "Traceback" not in err


def test_cli_alias_answers_both_ways(capsys):
    # Reference: the aliasing formula |f - fs round(f / fs)| (Oppenheim & Schafer 2010), worked by hand.
    code, out, err = _cli(capsys, "alias", "--frame-rate", 30, "--physical-hz", 50, 8.5, "--observed-hz", 10,
                          "--up-to-hz", 60)
    assert code == 0, err
    assert "50 Hz sampled at 30 frames/s appears at 10 Hz" in out
    assert "8.5 Hz sampled at 30 frames/s appears at 8.5 Hz" in out
    assert "can come from 10, 20, 40, 50 Hz" in out
    code, _, err = _cli(capsys, "alias", "--frame-rate", 30, "--observed-hz", 16)
    assert code == 2 and "--observed-hz" in err


def test_a_movie_run_takes_the_coherence_with_each_rois_neuropil(tmp_path):
    # A light source flickering at 3 Hz brightens the whole field, ROIs and neuropil rings alike: the ROIs are
    # coherent with their own rings at 3 Hz, and the rings' spectrum peaks there too.
    import json

    from calcium.io import write_masks, write_movie
    from calcium.pipeline import config_from_dict, open_results, run_pipeline

    rng = np.random.default_rng(22)
    rate, n = 20.0, 1200
    masks = np.zeros((4, 32, 32), dtype=bool)
    for k, (y, x) in enumerate([(8, 8), (8, 24), (24, 8), (24, 24)]):
        masks[k, y - 2:y + 2, x - 2:x + 2] = True
    flicker = 1.0 + 0.02 * np.sin(2 * np.pi * 3.0 * np.arange(n) / rate)
    movie = (100.0 + rng.normal(0.0, 2.0, (n, 32, 32))) * flicker[:, None, None]
    write_movie(tmp_path / "movie.tif", movie.astype(np.float32))
    write_masks(tmp_path / "masks.tif", masks)
    config = config_from_dict({"inputs": {"movie": str(tmp_path / "movie.tif"), "masks": str(tmp_path / "masks.tif"),
                                          "frame_rate": rate},
                               "output": {"folder": str(tmp_path / "out")}, "report": {"enabled": False},
                               "extraction": {"neuropil_radius_px": 6}, "execution": {"backend": "serial"}})
    summary = run_pipeline(config, progress=False)
    with open_results(summary.results_path) as results:
        record = json.loads(results.read("rhythms/summary_json")[0])
        freq = results.read("rhythms/freq_hz")
        neuropil_power = results.read("rhythms/neuropil_power")
        coherence = results.read("rhythms/coherence")
    assert record["reference"] == "neuropil"
    (rhythm,) = record["rhythms"]
    assert rhythm["frequency_hz"] == pytest.approx(3.0, abs=0.05)
    assert freq[np.argmax(neuropil_power)] == pytest.approx(3.0, abs=0.05)
    assert coherence[np.argmin(np.abs(freq - 3.0))] > 0.9
