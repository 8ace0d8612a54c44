"""Tests for calcium.signal.baseline: running low-percentile F0 and ΔF/F."""
import numpy as np
import pytest
import scipy.ndimage as ndi
from hypothesis import given, settings
from hypothesis import strategies as st

from calcium._checks import MissingDataError
from calcium.signal import DeltaF, delta_f_over_f

FRAME_RATE = 30.0


def _recording(seed, n=36_000, rois=3, bleach=0.30, noise=0.02, rate_hz=0.2):
    """Known F0 with exponential bleaching (``bleach`` lost over the recording) and sparse transients."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FRAME_RATE
    decay_s = t[-1] / -np.log(1 - bleach)
    f0 = 200.0 * np.exp(-t / decay_s) * np.linspace(1.0, 1.3, rois)[:, None]
    events = (rng.random((rois, n)) < rate_hz / FRAME_RATE).astype(float)
    kernel = np.exp(-np.arange(int(5 * FRAME_RATE)) / FRAME_RATE / 0.7)
    transients = np.array([np.convolve(e, kernel)[:n] for e in events])
    raw = f0 * (1.0 + 0.5 * transients) + rng.normal(0.0, noise, (rois, n)) * f0
    return raw, f0


def test_known_bleaching_baseline_is_recovered_within_2_percent():
    # Reference: simulation ground truth (F0 loses 30 % over 20 min; transients 0.2/s, noise 2 % of F0).
    raw, f0 = _recording(1)
    result = delta_f_over_f(raw, FRAME_RATE)
    assert isinstance(result, DeltaF)
    relative = np.abs(result.f0 / f0 - 1.0)
    assert np.median(relative) < 0.02
    half_window = int(30 * FRAME_RATE)
    assert relative[:, half_window:-half_window].max() < 0.02


def test_f0_agrees_with_exact_running_percentile_of_the_moving_average():
    # Reference: scipy.ndimage.uniform_filter1d (1 s moving average) then scipy.ndimage.percentile_filter
    # (60 s window) at every frame; the coarse grid of delta_f_over_f approximates it.
    raw, _ = _recording(2, n=18_000, rois=2)
    result = delta_f_over_f(raw, FRAME_RATE)
    smooth = ndi.uniform_filter1d(raw, int(FRAME_RATE), axis=-1)
    exact = np.array([ndi.percentile_filter(row, 8, size=int(60 * FRAME_RATE), mode="nearest")
                      for row in smooth])
    inner = slice(int(30 * FRAME_RATE), -int(30 * FRAME_RATE))
    assert np.abs(result.f0[:, inner] / exact[:, inner] - 1).max() < 0.005


def test_dff_is_raw_minus_f0_over_f0():
    # Reference: the definition ΔF/F = (F - F0) / F0.
    raw, _ = _recording(3, n=6000, rois=2)
    result = delta_f_over_f(raw, FRAME_RATE)
    np.testing.assert_allclose(result.dff, (raw - result.f0) / result.f0, rtol=1e-12, atol=1e-15)
    assert result.window_s == 60.0 and result.percentile == 8.0


def test_one_d_and_two_d_inputs_give_equal_results():
    raw, _ = _recording(4, n=9000, rois=3)
    both = delta_f_over_f(raw, FRAME_RATE)
    for i in range(3):
        one = delta_f_over_f(raw[i], FRAME_RATE)
        np.testing.assert_array_equal(one.f0, both.f0[i])
        np.testing.assert_array_equal(one.dff, both.dff[i])
        assert one.dff.shape == (9000,)


def test_whole_trace_percentile_when_the_window_is_longer_than_the_recording():
    # Reference: numpy.percentile over the whole trace (no smoothing, one window).
    x = np.random.default_rng(5).normal(100.0, 3.0, 900)
    result = delta_f_over_f(x, FRAME_RATE, window_s=600.0, smooth_s=0.0, percentile=20.0)
    np.testing.assert_allclose(result.f0, np.percentile(x, 20.0), rtol=1e-14)
    assert result.window_s == pytest.approx(900 / FRAME_RATE)


def test_missing_frames_stay_nan_are_reported_and_do_not_disturb_f0():
    raw, f0 = _recording(6, n=18_000, rois=2)
    raw[0, 5000:5600] = np.nan          # a 20 s gap
    raw[1, 123] = np.inf
    raw[1, 9000:9003] = -np.inf
    result = delta_f_over_f(raw, FRAME_RATE)
    holes = ~np.isfinite(raw)
    np.testing.assert_array_equal(np.isnan(result.dff), holes)
    np.testing.assert_array_equal(result.missing.mask, holes)
    assert result.missing.count == 604
    np.testing.assert_array_equal(result.missing.per_roi, [600, 4])
    assert np.isfinite(result.f0).all()
    # Reference: simulation ground truth, also across the gap.
    inner = slice(int(30 * FRAME_RATE), -int(30 * FRAME_RATE))
    assert np.abs(result.f0[:, inner] / f0[:, inner] - 1).max() < 0.02


def test_window_with_no_finite_frame_takes_f0_from_its_neighbours():
    # A gap longer than the window: F0 is interpolated between the windows on either side.
    x = np.full(12_000, 100.0)
    x[6000:] = 110.0
    x[4000:8000] = np.nan
    result = delta_f_over_f(x, FRAME_RATE, window_s=20.0)
    assert np.isfinite(result.f0).all()
    assert result.f0[:3000].max() == pytest.approx(100.0)
    assert result.f0[9000:].min() == pytest.approx(110.0)
    assert np.all(np.diff(result.f0[4000:8000]) >= 0)


def test_all_missing_roi_is_refused():
    raw = np.ones((3, 500))
    raw[1] = np.nan
    with pytest.raises(MissingDataError, match="1"):
        delta_f_over_f(raw, FRAME_RATE)


def test_non_positive_f0_is_refused_naming_the_roi_and_the_fixes():
    raw = np.full((3, 3000), 50.0)
    raw[2] -= 80.0  # over-subtracted neuropil
    with pytest.raises(ValueError) as info:
        delta_f_over_f(raw, FRAME_RATE)
    message = str(info.value)
    assert "ROI(s) 2" in message and "neuropil" in message and "offset" in message and "floor" in message
    with pytest.raises(ValueError, match="the trace"):
        delta_f_over_f(raw[2], FRAME_RATE)


@pytest.mark.parametrize("dark", ["all zero", "zero most of the time"])
def test_f0_of_exactly_zero_is_refused_naming_the_roi_not_divided_by(dark):
    # A dark ROI (no photons most of the time) has F0 = 0 exactly: a ValueError naming it, never a division.
    raw = np.full((3, 3000), 50.0)
    raw[1] = 0.0
    if dark == "zero most of the time":
        raw[1, ::40] = 1.0  # a photon now and then: the 8th percentile stays 0
    with pytest.raises(ValueError, match=r"exactly 0 in ROI\(s\) 1 ") as info:
        delta_f_over_f(raw, FRAME_RATE, smooth_s=0.0)
    assert ("every frame is 0" in str(info.value)) == (dark == "all zero")
    with pytest.raises(ValueError, match="exactly 0 in the trace"):
        delta_f_over_f(raw[1], FRAME_RATE)
    result = delta_f_over_f(raw, FRAME_RATE, floor=1.0)  # the remedy the message names
    np.testing.assert_array_equal(result.f0[1], 1.0)


def test_floor_clips_f0_from_below_instead_of_failing():
    raw = np.full((2, 3000), 50.0)
    raw[1] = 2.0
    result = delta_f_over_f(raw, FRAME_RATE, floor=10.0)
    np.testing.assert_allclose(result.f0[0], 50.0)
    np.testing.assert_allclose(result.f0[1], 10.0)
    np.testing.assert_allclose(result.dff[1], (2.0 - 10.0) / 10.0)


def test_bad_arguments_are_refused_by_name():
    x = np.full(1000, 10.0)
    for kwargs, name in [(dict(window_s=0.0), "window_s"), (dict(percentile=101.0), "percentile"),
                         (dict(percentile=-1.0), "percentile"), (dict(smooth_s=-1.0), "smooth_s"),
                         (dict(floor=0.0), "floor"), (dict(floor=np.nan), "floor")]:
        with pytest.raises(ValueError, match=name):
            delta_f_over_f(x, FRAME_RATE, **kwargs)
    with pytest.raises(ValueError, match="frame_rate"):
        delta_f_over_f(x, np.inf)
    with pytest.raises(ValueError, match="raw"):
        delta_f_over_f(np.ones((2, 2, 10)), FRAME_RATE)


@settings(max_examples=60, deadline=None)
@given(rois=st.integers(1, 4), frames=st.integers(1, 500), seed=st.integers(0, 10_000),
       missing_fraction=st.floats(0.0, 0.9), two_d=st.booleans(),
       window_s=st.floats(0.1, 100.0), smooth_s=st.floats(0.0, 5.0), percentile=st.floats(0.0, 100.0))
def test_dff_has_the_input_shape_and_nan_exactly_at_missing_frames(rois, frames, seed, missing_fraction,
                                                                    two_d, window_s, smooth_s, percentile):
    rng = np.random.default_rng(seed)
    raw = rng.uniform(50.0, 150.0, (rois, frames))
    holes = rng.random(raw.shape) < missing_fraction
    holes[np.arange(rois), rng.integers(0, frames, rois)] = False  # every ROI keeps a finite frame
    raw[holes] = np.nan
    if not two_d:
        raw, holes = raw[0], holes[0]
    result = delta_f_over_f(raw, FRAME_RATE, window_s=window_s, smooth_s=smooth_s, percentile=percentile)
    assert result.dff.shape == result.f0.shape == raw.shape
    np.testing.assert_array_equal(np.isnan(result.dff), holes)
    np.testing.assert_array_equal(result.missing.mask, holes)
    # F0 lies within the range of the finite data: it is a percentile of averages of them.
    assert np.isfinite(result.f0).all()
    finite = raw[~holes]
    assert (result.f0 >= finite.min() - 1e-9).all() and (result.f0 <= finite.max() + 1e-9).all()


# ---------------------------------------------------------------------------
# compiled kernels against numpy (order statistics by np.sort, interpolation by np.interp)
# ---------------------------------------------------------------------------
@settings(max_examples=150, deadline=None)
@given(k=st.integers(1, 60), n_windows=st.integers(1, 25), step=st.integers(1, 60), rank_frac=st.floats(0, 1),
       seed=st.integers(0, 2**31), ties=st.booleans(), slope=st.floats(-5, 5))
def test_window_order_statistics_equal_those_of_a_full_sort(k, n_windows, step, rank_frac, seed, ties, slope):
    # Reference: numpy.sort of every window (ranks rank - 1 and rank); trends and ties exercise the pivot
    # and the buffer paths.
    from calcium.signal.baseline import _BUFFER_RANKS, _low_order_pair

    rng = np.random.default_rng(seed)
    step = min(step, k)
    starts = np.arange(n_windows) * step
    x = rng.normal(size=(2, starts[-1] + k)) + np.linspace(0.0, slope, starts[-1] + k)
    if ties:
        x = np.round(x, 1)
    rank = min(int(rank_frac * k), k - 1, _BUFFER_RANKS - 1)
    lower, upper = np.empty((2, n_windows)), np.empty((2, n_windows))
    _low_order_pair(x, starts, k, rank, lower, upper)
    ordered = np.sort(x[:, starts[:, None] + np.arange(k)], axis=-1)
    np.testing.assert_array_equal(upper, ordered[..., rank])
    np.testing.assert_array_equal(lower, ordered[..., max(rank - 1, 0)])


@settings(max_examples=150, deadline=None)
@given(n=st.integers(1, 400), n_knots=st.integers(1, 25), seed=st.integers(0, 2**31), hits=st.booleans(),
       odd=st.sampled_from(["none", "inf", "nan", "flat-inf"]))
def test_frame_by_frame_baseline_is_identical_to_numpy_interp(n, n_knots, seed, hits, odd):
    # Reference: numpy.interp at the frames 0..n-1, bit for bit (frames before, between, on and after the
    # knots; knots with non-finite values take numpy's per-point fallbacks), and ΔF/F = (F - F0) / F0 with NaN
    # where F is missing; the lowest F0 as ndarray.min, the frames at a floor as a count of F0 <= floor.
    from calcium.signal.baseline import _baseline_and_dff

    rng = np.random.default_rng(seed)
    gaps = rng.uniform(0.3, 3.0 * n / n_knots + 1.0, n_knots)
    if hits:
        gaps = np.ceil(gaps)  # knots on whole frames
    knots_at = np.cumsum(gaps) - rng.uniform(0.0, 0.5 * n)
    values = rng.normal(100.0, 20.0, (2, n_knots))
    if odd != "none" and n_knots > 1:
        j = int(rng.integers(n_knots))
        values[0, j] = {"inf": np.inf, "nan": np.nan, "flat-inf": np.inf}[odd]
        if odd == "flat-inf":
            values[0, min(j + 1, n_knots - 1)] = np.inf
            values[0, max(j - 1, 0)] = np.inf
    raw = rng.normal(120.0, 30.0, (2, n))
    raw[rng.random((2, n)) < 0.1] = np.nan
    raw[1, :: 7] = np.inf
    floor = 95.0
    f0 = np.empty((2, n))
    dff = np.empty((2, n))
    lowest = np.empty(2)
    at_floor = np.empty(2, dtype=np.int64)
    _baseline_and_dff(raw, values, knots_at, f0, dff, lowest, floor, at_floor)
    expected = np.array([np.interp(np.arange(n, dtype=np.float64), knots_at, v) for v in values])
    np.testing.assert_array_equal(f0, expected)
    with np.errstate(invalid="ignore", divide="ignore"):
        np.testing.assert_array_equal(dff, np.where(np.isfinite(raw), (raw - expected) / expected, np.nan))
    np.testing.assert_array_equal(lowest, expected.min(axis=1))
    np.testing.assert_array_equal(at_floor, np.count_nonzero(expected <= floor, axis=1))
    # without F0 kept (a scratch row only): the same ΔF/F, lowest F0 and counts
    dff2 = np.empty((2, n))
    lowest2 = np.empty(2)
    at_floor2 = np.empty(2, dtype=np.int64)
    _baseline_and_dff(raw, values, knots_at, np.empty((0, n)), dff2, lowest2, floor, at_floor2)
    np.testing.assert_array_equal(dff2, dff)
    np.testing.assert_array_equal(lowest2, lowest)
    np.testing.assert_array_equal(at_floor2, at_floor)


@pytest.mark.parametrize("floor", [None, 150.0])
@pytest.mark.parametrize("keep_f0", [True, False])
def test_rows_variant_equals_delta_f_over_f(floor, keep_f0):
    # Reference: delta_f_over_f itself (the same ΔF/F and F0, bit for bit), ndarray.min for the lowest F0
    # and a count of F0 <= floor for the frames at the floor.
    from calcium.signal import delta_f_over_f_rows

    raw, _ = _recording(8, n=9000, rois=4)
    raw[1, 2000:2600] = np.nan
    raw[2, ::11] = np.inf
    full = delta_f_over_f(raw, FRAME_RATE, floor=floor)
    rows = delta_f_over_f_rows(raw, FRAME_RATE, keep_f0=keep_f0, floor=floor)
    np.testing.assert_array_equal(rows.dff, full.dff)
    if keep_f0:
        np.testing.assert_array_equal(rows.f0, full.f0)
    else:
        assert rows.f0 is None
    np.testing.assert_array_equal(rows.f0_min, full.f0.min(axis=1))
    expected = np.count_nonzero(full.f0 <= floor, axis=1) if floor is not None else np.zeros(4, dtype=int)
    np.testing.assert_array_equal(rows.at_floor, expected)
    if floor is not None:
        assert rows.at_floor.max() > 0  # the floor is reached somewhere: the count is checked, not only zeros
    one = delta_f_over_f_rows(raw[0], FRAME_RATE, keep_f0=keep_f0, floor=floor)
    np.testing.assert_array_equal(one.dff, full.dff[:1])
    with pytest.raises(ValueError, match="F0 .* is <= 0 in the trace"):
        delta_f_over_f_rows(raw[0] - 1000.0, FRAME_RATE)


def test_high_percentiles_take_the_partition_path_with_the_same_definition():
    # Reference: numpy.percentile (linear interpolation) of each knot's window of smoothed samples; the
    # 8th percentile goes through the compiled order statistics, the 90th through np.partition.
    from calcium.signal.baseline import _plan_grid, _smoothed_samples, _window_percentile

    raw, _ = _recording(4, n=6000, rois=2)
    grid = _plan_grid(raw.shape[1], FRAME_RATE, 60.0, 1.0)
    samples = _smoothed_samples(raw, None, grid)
    windows = samples[:, grid.starts[:, None] + np.arange(grid.window)]
    for percentile in (8.0, 90.0):
        np.testing.assert_allclose(_window_percentile(samples, grid, percentile),
                                   np.percentile(windows, percentile, axis=-1), rtol=1e-13)
