"""Session calibration (calcium.calibrate) on data the project's own forward model did not make.

The sessions come from scripts/truth_sessions.py, an independent generator (its own calcium ODE on a fine time
grid, exposure-averaged frames, bursts, bleaching, drift, shot noise, per-ROI expression and kinetics); it
imports nothing from calcium.  The checks are against its ground truth.
"""
import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest

import calcium
from calcium.calibrate import SessionCalibration, calibrate_session, infer_session, load_calibration
from calcium.infer.api import recount

_PATH = Path(__file__).resolve().parent.parent / "scripts" / "truth_sessions.py"


@pytest.fixture(scope="module")
def truth():
    spec = importlib.util.spec_from_file_location("truth_sessions", _PATH)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def session(truth):
    s = truth.make_session(n_rois=8, frame_rate=30.0, duration_s=200.0, rise_s=0.06, decay_s=0.8, snr=5.0, seed=21)
    dff = calcium.delta_f_over_f(s.raw, s.frame_rate).dff
    return s, dff


def _ratios(s, results):
    return np.array([r.n_spikes / t.size for r, t in zip(results, s.spike_times)])


def test_blind_calibration_gives_counts_near_the_truth(session):
    s, dff = session
    out = infer_session(dff, s.frame_rate)
    cal = out.calibration
    assert cal.source == "blind" and cal.n_kinetics_rois >= 4
    # kinetics pooled across ROIs: within 25 % of the generator's median time constants
    assert abs(cal.decay_s / np.median(s.decay_s) - 1) < 0.25
    ratios = _ratios(s, out.results)
    assert np.all((ratios > 0.67) & (ratios < 1.5)), ratios
    assert abs(np.median(ratios) - 1) < 0.15
    # every calibrated size interval holds its count, and the count interval the count
    counts = out.spike_counts
    assert np.all((out.count_low <= counts) & (counts <= out.count_high))
    assert np.all(cal.spike_size_low <= cal.spike_size) and np.all(cal.spike_size <= cal.spike_size_high)
    sizes = cal.spike_size / s.spike_size
    assert np.all(np.abs(sizes[cal.calibrated] - 1) < 0.3), sizes


def test_paired_cells_set_the_kinetics_and_the_sizes_of_the_others(session, truth):
    s, dff = session
    paired = s.electrical_spikes((0, 1, 2), clock_offset_s=0.004)
    cal = calibrate_session(dff, s.frame_rate, electrical_spikes=paired)
    assert cal.source == "paired" and cal.paired_rois == (0, 1, 2)
    assert abs(cal.decay_s / np.median(s.decay_s) - 1) < 0.25
    # the paired ROIs' sizes are fitted from their own spikes: within 20 % of the truth
    np.testing.assert_allclose(cal.spike_size[:3], s.spike_size[:3], rtol=0.2)
    results = [calcium.infer_spikes(dff[i], s.frame_rate, kernel=cal.kernel(i)) for i in range(3, 8)]
    ratios = np.array([r.n_spikes / s.spike_times[i].size for i, r in zip(range(3, 8), results)])
    assert np.all((ratios > 0.67) & (ratios < 1.5)), ratios


def test_a_session_of_pure_noise_gets_flags_not_counts():
    rng = np.random.default_rng(4)
    noise = rng.normal(0.0, 0.05, (6, 6000))
    with pytest.raises(ValueError, match="no ROI shows calcium transients"):
        calibrate_session(noise, 30.0)
    out = infer_session(noise, 30.0, indicator="GCaMP6s")
    assert out.calibration.source == "indicator"
    assert not out.calibrated.any()
    assert all(reason for reason in out.reasons)
    assert "UNCALIBRATED" in out.calibration.summary()


def test_recount_equals_inference_with_the_scaled_kernel(session):
    s, dff = session
    shape = calcium.Kernel(0.06, 0.8, 1.0)
    for i in range(3):
        size = float(s.spike_size[i])
        direct = calcium.infer_spikes(dff[i], s.frame_rate, kernel=shape.scaled(size))
        counted = recount(calcium.infer_spikes(dff[i], s.frame_rate, kernel=shape), s.frame_rate, size)
        # (recount does not see the activity of the first lag frames, which infer_spikes puts at time 0)
        late = direct.spike_times > 0.5
        np.testing.assert_allclose(counted.spike_times[counted.spike_times > 0.5], direct.spike_times[late],
                                   rtol=0, atol=1e-12)
        np.testing.assert_allclose(counted.activity, direct.activity, rtol=1e-12, atol=1e-12)


def test_calibration_file_round_trip(session, tmp_path):
    s, dff = session
    cal = calibrate_session(dff[:3], s.frame_rate)
    path = cal.save(tmp_path / "calibration.json")
    again = load_calibration(path)
    assert isinstance(again, SessionCalibration)
    np.testing.assert_array_equal(again.spike_size, cal.spike_size)
    assert (again.source, again.rise_s, again.decay_s, again.reasons) == (cal.source, cal.rise_s, cal.decay_s,
                                                                        cal.reasons)
    # the saved calibration counts the same session the same way
    a = infer_session(dff[:3], s.frame_rate, calibration=again)
    b = infer_session(dff[:3], s.frame_rate, calibration=cal)
    np.testing.assert_array_equal(a.spike_counts, b.spike_counts)


def test_a_calibration_of_another_session_is_refused(session):
    s, dff = session
    cal = calibrate_session(dff[:3], s.frame_rate)
    with pytest.raises(ValueError, match="calibration is of 3 ROIs"):
        infer_session(dff, s.frame_rate, calibration=cal)
    with pytest.raises(ValueError, match="not a calibration file"):
        load_calibration(Path(__file__))


def test_raw_fluorescence_is_refused_as_a_session_of_dff():
    # ΔF/F is 0 at rest by definition (Grienberger & Konnerth 2012): raw counts far above 1 are not ΔF/F
    rng = np.random.default_rng(1)
    with pytest.raises(ValueError, match="looks like raw fluorescence"):
        calibrate_session(1000.0 + rng.normal(0, 10, (3, 3000)), 30.0)
