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
