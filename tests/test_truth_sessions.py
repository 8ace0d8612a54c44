"""Sanity checks of scripts/truth_sessions.py, the independent ground truth of the calibration benchmark.

The generator imports nothing from `calcium`; these tests check it against closed forms only, not against
the package.
"""
import importlib.util
import math
import sys
from pathlib import Path

import numpy as np
import pytest

_PATH = Path(__file__).resolve().parent.parent / "scripts" / "truth_sessions.py"


@pytest.fixture(scope="module")
def truth():
    spec = importlib.util.spec_from_file_location("truth_sessions", _PATH)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


def _isolated(times, before_s, after_s):
    times = np.asarray(times)
    gap_before = np.diff(times, prepend=-np.inf)
    gap_after = np.diff(times, append=np.inf)
    return times[(gap_before > before_s) & (gap_after > after_s)]


def test_generator_does_not_import_calcium():
    # The point of the generator is independence from the package under test.
    source = _PATH.read_text()
    assert "import calcium" not in source and "from calcium" not in source


def test_spike_count_matches_integrated_rate(truth):
    # Closed form (compound Poisson process, e.g. Ross, Stochastic Processes, 1996, ch. 2): given the rate,
    # the number of events is Poisson with mean L_e = integral of the event rate, and the spike count has
    # mean L_e E[k] and variance L_e E[k^2], k the spikes per event (1, or 2/3/4 with equal odds in a burst).
    share = 0.25
    s = truth.make_session(n_rois=12, frame_rate=10.0, duration_s=300.0, rise_s=0.05, decay_s=0.5, snr=4.0,
                           mean_rate_hz=1.0, burst_share=share, seed=3)
    sizes = np.array(truth.BURST_SIZES, dtype=float)
    mean_k = (1 - share) + share * sizes.mean()
    mean_k2 = (1 - share) + share * np.mean(sizes ** 2)
    expected = float(s.rate_hz.sum() / s.frame_rate)  # integral of the expected spike rate, all ROIs
    events = expected / mean_k
    count = sum(t.size for t in s.spike_times)
    # the 2 ms dead time loses ~ event rate x (2 ms + burst span) of the events: < 1 %, well inside 4 s.d.
    assert abs(count - expected) < 4 * math.sqrt(events * mean_k2)
    for t in s.spike_times:
        assert np.all(np.diff(t) >= truth.REFRACTORY_S - 1e-12)  # refractory period
        assert t.min() >= 0 and t.max() < s.duration_s


def test_baseline_noise_sd_matches_requested_snr(truth):
    # Common practice: the ΔF/F noise s.d. at rest is the s.d. of (F - F0) / F0 over frames without a
    # transient; the generator promises its RMS over the session equals base size / snr.
    snr = 4.0
    s = truth.make_session(n_rois=12, frame_rate=30.0, duration_s=300.0, rise_s=0.05, decay_s=0.5, snr=snr,
                           mean_rate_hz=0.02, seed=5)
    assert np.allclose(s.noise_sd, s.noise_sd[0])
    base = s.noise_sd[0] * snr
    assert truth.BASE_SIZE[0] <= base <= truth.BASE_SIZE[1]
    assert np.all((s.spike_size >= 0.7 * base) & (s.spike_size <= 1.4 * base))
    residual = s.raw / s.f0 - 1.0
    quiet = s.clean_dff < 1e-3 * s.spike_size[:, None]  # signal far below the noise (s.d. = size / 4)
    assert quiet.mean() > 0.9
    rms = math.sqrt(float(np.mean(residual[quiet] ** 2)))
    # ~97,000 frames: the relative s.e. of an s.d. estimate is 1/sqrt(2n) ~ 0.2 %
    assert rms == pytest.approx(s.noise_sd[0], rel=0.03)
    # shot noise: the variance grows as F0 bleaches, (1/F0 + read share * photons / F0^2) per frame
    first, last = slice(0, 3000), slice(-3000, None)
    var_ratio = [np.mean(residual[i, last][quiet[i, last]] ** 2) / np.mean(residual[i, first][quiet[i, first]] ** 2)
                 for i in range(s.n_rois)]
    predicted = [np.mean(1 / s.f0[i, last]) / np.mean(1 / s.f0[i, first]) for i in range(s.n_rois)]
    assert np.median(np.array(var_ratio) / predicted) == pytest.approx(1.0, abs=0.1)


def test_bleaching_and_drift_stay_in_their_ranges(truth):
    s = truth.make_session(n_rois=12, frame_rate=15.0, duration_s=300.0, rise_s=0.1, decay_s=1.0, snr=4.0,
                           seed=7)
    ratio = s.f0[:, -1] / s.f0[:, 0]
    # 10-30 % bleaching times a drift of 2 % s.d. at each end
    assert np.all((ratio > 0.6) & (ratio < 0.98))


def _exposure_average(times, size, rise, decay, frame_rate, n_frames):
    """Closed form: the difference of exponentials integrated over each whole-frame exposure (calculus)."""
    t_peak = rise * decay / (decay - rise) * math.log(decay / rise)
    peak = math.exp(-t_peak / decay) - math.exp(-t_peak / rise)
    lo = (np.arange(n_frames) - 0.5) / frame_rate
    hi = lo + 1.0 / frame_rate
    out = np.zeros(n_frames)
    for s in times:
        a = np.maximum(lo - s, 0.0)
        b = np.maximum(hi - s, 0.0)
        # integral of exp(-u/tau) from a to b = tau (exp(-a/tau) - exp(-b/tau))
        out += (decay * (np.exp(-a / decay) - np.exp(-b / decay))
                - rise * (np.exp(-a / rise) - np.exp(-b / rise)))
    return size / peak * out * frame_rate


def test_linear_calcium_is_the_exact_exposure_average(truth):
    # Closed form (calculus): with a linear indicator the noise-free ΔF/F of a frame is the sum over spikes
    # of the difference of exponentials averaged over the frame's exposure; the fine-grid ODE must match it.
    s = truth.make_session(n_rois=3, frame_rate=30.0, duration_s=60.0, rise_s=0.04, decay_s=0.4, snr=4.0,
                           mean_rate_hz=1.0, seed=11)
    for i in range(s.n_rois):
        expected = _exposure_average(s.spike_times[i], s.spike_size[i], s.rise_s[i], s.decay_s[i], 30.0,
                                     s.raw.shape[1])
        # midpoint rule on a ~1 ms grid: error ~ (dt / rise)^2 / 24 of the signal
        assert np.max(np.abs(s.clean_dff[i] - expected)) < 1e-3 * s.spike_size[i]


def test_lone_spike_peak_is_the_spike_size(truth):
    # Definition (closed form: the jump is set so that the continuous peak is spike_size): at a high frame
    # rate, where the exposure average barely lowers the peak, a lone spike's peak ΔF/F is the ROI's size.
    s = truth.make_session(n_rois=6, frame_rate=200.0, duration_s=200.0, rise_s=0.05, decay_s=0.5, snr=4.0,
                           mean_rate_hz=0.05, burst_share=0.0, seed=13)
    checked = 0
    for i in range(s.n_rois):
        for t in _isolated(s.spike_times[i], 4.0, 4.0):
            k = int(round(t * 200.0))
            peak = s.clean_dff[i, k:k + 200].max()
            assert peak == pytest.approx(s.spike_size[i], rel=0.02)
            checked += 1
    assert checked >= 10


def test_saturation_keeps_single_spikes_and_compresses_bursts(truth):
    # Hill (1910): on the concave part of the binding curve summed calcium gives less than proportional
    # fluorescence.  Same seed, same spikes: an isolated single spike peaks at spike_size either way
    # (closed form), and every burst peaks lower with saturation than without.
    kwargs = dict(n_rois=4, frame_rate=200.0, duration_s=200.0, rise_s=0.05, decay_s=0.5, snr=4.0,
                  mean_rate_hz=0.3, burst_share=0.5, seed=17)
    linear = truth.make_session(**kwargs)
    saturating = truth.make_session(**kwargs, saturating=True)
    assert all(np.array_equal(a, b) for a, b in zip(linear.spike_times, saturating.spike_times))
    singles = bursts = 0
    for i in range(linear.n_rois):
        times = linear.spike_times[i]
        groups = np.split(times, np.flatnonzero(np.diff(times) > 0.05) + 1)
        for before, group, after in zip([None] + groups[:-1], groups, groups[1:] + [None]):
            crowded_before = before is not None and group[0] - before[-1] < 4.0
            crowded_after = after is not None and after[0] - group[-1] < 4.0
            if crowded_before or crowded_after:
                continue
            k = int(round(group[0] * 200.0))
            lin = linear.clean_dff[i, k:k + 200].max()
            sat = saturating.clean_dff[i, k:k + 200].max()
            if group.size == 1:
                assert sat == pytest.approx(saturating.spike_size[i], rel=0.02)
                singles += 1
            else:
                assert sat < 0.97 * lin
                bursts += 1
    assert singles >= 3 and bursts >= 3
