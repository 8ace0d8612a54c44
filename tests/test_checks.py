"""Tests for calcium/_checks.py: the shared plausibility checks (frame rate, orientation, ΔF/F, memory)."""
import math
import warnings

import numpy as np
import pytest

from calcium._checks import (DFF_BASELINE_LIMIT, MAX_FRAME_RATE_HZ, MIN_FRAME_RATE_HZ, CalciumInputError,
                             available_memory, check_dff_like, check_frame_rate, check_memory, check_orientation)
from calcium.forward import simulate_recording


# --------------------------------------------------------------------------- frame rate
@pytest.mark.parametrize("rate", [MIN_FRAME_RATE_HZ, 0.8, 7.5, 30.0, 1000.0, MAX_FRAME_RATE_HZ])
def test_frame_rates_of_real_imaging_are_accepted(rate):
    # 0.8 Hz: whole-brain light-sheet volumes; 1 kHz: line scans (from memory, see the constants' sources)
    assert check_frame_rate(rate) == rate


@pytest.mark.parametrize("rate, fragment", [
    (1 / 30, r"frame_rate=0.0333+ Hz is below.*frame period in seconds, the frame rate is 1/0.0333+ = 30 Hz"),
    (0.0333, r"1/0.0333 = 30.03 Hz"),
    (1e-300, r"below the range.*give the number of frames per second"),
    (1e6, r"frame_rate=1000000.0 Hz is above the range.*0.1 Hz.*20000 Hz"),
    (20000.5, r"above the range"),
    (math.nan, r"frame_rate must be a positive finite number"),
    (-30.0, r"frame_rate must be a positive finite number"),
    (True, r"frame_rate must be a positive finite number"),
])
def test_implausible_frame_rates_are_refused_with_the_reciprocal_when_it_is_plausible(rate, fragment):
    with pytest.raises(ValueError, match=fragment):
        check_frame_rate(rate)


def test_the_frame_rate_message_names_the_argument_given():
    with pytest.raises(ValueError, match=r"^frame_rates=0.05 Hz"):
        check_frame_rate(0.05, "frame_rates")


# --------------------------------------------------------------------------- orientation
def test_ten_times_more_rois_than_frames_is_refused_with_the_way_to_insist():
    with pytest.raises(CalciumInputError, match=r"x.npy has 600 ROIs of 5 frame\(s\).*Transpose it.*or pass "
                                                r"orientation_check=False if it really has 600 ROIs"):
        check_orientation(np.zeros((600, 5)), "x.npy", remedy="pass orientation_check=False")


def test_more_rois_than_frames_warns_and_fewer_passes_silently():
    with pytest.warns(UserWarning, match=r"90 ROIs of 10 frame\(s\).*more ROIs than frames"):
        assert check_orientation(np.zeros((90, 10))) is True
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert check_orientation(np.zeros((10, 10))) is False
        assert check_orientation(np.zeros((10, 90))) is False
        assert check_orientation(np.zeros(7)) is False


# --------------------------------------------------------------------------- ΔF/F
def test_simulated_dff_passes_and_raw_fluorescence_of_the_same_cells_is_refused():
    # Reference: the definition ΔF/F = F / F0 - 1 (the simulator's dff is raw / f0 - 1 with the true F0).
    rec = simulate_recording(4, 60.0, 30.0, indicator="GCaMP6f", rate_hz=1.0, noise_sd=0.05, f0=500.0, seed=2)
    assert not check_dff_like(rec.dff).any()
    raw = rec.raw.copy()
    before = raw.copy()
    with pytest.raises(ValueError, match=r"dff looks like raw fluorescence, not ΔF/F: in ROI\(s\) 0, 1, 2, 3 "
                                         r"\(4 of 4; ROI 0: 10th percentile 4\d\d\.?\d*\).*calcium.delta_f_over_f"
                                         r".*pass allow_raw=True"):
        check_dff_like(raw)
    np.testing.assert_array_equal(raw, before)


def test_only_the_raw_looking_rois_are_named_and_allow_raw_returns_them():
    rng = np.random.default_rng(3)
    mixed = rng.normal(0.0, 0.05, size=(5, 2000))
    mixed[[1, 3]] += 250.0
    with pytest.raises(ValueError, match=r"ROI\(s\) 1, 3 \(2 of 5"):
        check_dff_like(mixed, "dff")
    np.testing.assert_array_equal(check_dff_like(mixed, allow_raw=True), [False, True, False, True, False])
    with pytest.raises(ValueError, match=r"or use --allow-raw if these"):
        check_dff_like(mixed, remedy="use --allow-raw")


def test_the_raw_fluorescence_criterion_is_the_tenth_percentile_above_one():
    # Reference: numpy's quantile of the same values (the criterion as documented).
    rng = np.random.default_rng(4)
    trace = rng.normal(0.0, 0.1, 4000)
    trace[: int(0.85 * trace.size)] += 1.5   # 85 % of the frames above 1: the 10th percentile is near 0
    assert np.quantile(trace, 0.1) < DFF_BASELINE_LIMIT and not check_dff_like(trace)[0]
    trace[int(0.85 * trace.size): int(0.95 * trace.size)] += 1.5   # now 95 %: the 10th percentile is above 1
    assert np.quantile(trace, 0.1) > DFF_BASELINE_LIMIT
    with pytest.raises(ValueError, match="the trace"):
        check_dff_like(trace)


def test_booleans_and_zero_one_rasters_are_not_dff():
    raster = np.random.default_rng(5).random((3, 300)) < 0.05
    with pytest.raises(ValueError, match=r"boolean \(True/False\).*spike raster or a mask"):
        check_dff_like(raster)
    as_float = raster.astype(float)
    as_float[0, 7] = np.nan  # missing samples do not hide a raster
    with pytest.raises(ValueError, match=r"only the values 0 and 1"):
        check_dff_like(as_float)


def test_missing_samples_and_an_all_missing_roi_do_not_trip_the_check():
    dff = np.random.default_rng(6).normal(0.0, 0.05, size=(2, 500))
    dff[0, ::3] = np.nan
    dff[1] = np.nan
    assert not check_dff_like(dff).any()


# --------------------------------------------------------------------------- memory
def test_available_memory_is_what_the_kernel_reports():
    # Reference: the MemAvailable line of /proc/meminfo (Linux kernel documentation, Documentation/filesystems/
    # proc.rst); it moves while other processes run, so within 20 % (no control-group limit on the test machine
    # is assumed: with one, ours is lower).
    try:
        with open("/proc/meminfo") as handle:
            line = next(ln for ln in handle if ln.startswith("MemAvailable:"))
    except (OSError, StopIteration):
        pytest.skip("no /proc/meminfo MemAvailable on this system")
    reported = int(line.split()[1]) * 1024
    ours = available_memory()
    assert 0 < ours <= 1.2 * reported


def test_a_request_beyond_the_machine_is_refused_naming_it_and_a_small_one_passes():
    with pytest.raises(ValueError, match=r"^n_rois=1e9 would need about 2 EB of memory, more than the .* available "
                                         r"on this machine; simulate fewer ROIs$"):
        check_memory(2e18, "n_rois=1e9", remedy="simulate fewer ROIs")
    check_memory(1000, "a small array")
