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


def _bleaching(seed, rois=20, seconds=600.0, lost=0.25, tau_s=120.0, noise=0.02, rate_hz=0.2):
    """F0 = 100 (1 - lost + lost exp(-t / tau_s)): a quarter of the light lost to bleaching, fastest at the start
    (the shape of simulate_recording's bleaching), with sparse transients (0.7 s decay) and 2 % noise per frame."""
    rng = np.random.default_rng(seed)
    n = int(seconds * FRAME_RATE)
    t = np.arange(n) / FRAME_RATE
    f0 = 100.0 * (1.0 - lost + lost * np.exp(-t / tau_s)) * np.ones((rois, 1))
    events = (rng.random((rois, n)) < rate_hz / FRAME_RATE).astype(float)
    events[:, : int(10 * FRAME_RATE)] = 0.0  # the first 10 s are quiet: any spike there is spurious
    kernel = np.exp(-np.arange(int(5 * FRAME_RATE)) / FRAME_RATE / 0.7)
    transients = np.array([np.convolve(e, kernel)[:n] for e in events])
    return f0 * (1.0 + 0.5 * transients) + rng.normal(0.0, noise, (rois, n)) * f0, f0


def test_f0_follows_a_bleaching_baseline_to_both_edges_of_the_recording():
    # Reference: simulation ground truth. F0 falls 4.5 % in the first half window (30 s); holding the outermost
    # knot (window centre) there, as the running percentile did, put F0 at t = 0 about 8 % low.
    # Tolerance at the edge frames, 1.5 % (median over ROIs; 2.5 % for the worst): the 8th percentile of the
    # smoothed noise lies 1.4 of its s.d. below the mean (0.02 / sqrt(30 frames) * 1.4 = 0.5 %, Gaussian quantile),
    # and a line fitted over one window W misses the exponential's curvature by about (A / 2 tau^2) W^2 / 6 =
    # 0.5 % at the window's end (the least-squares line of t^2 on [0, W] is W t - W^2 / 6, closed form); the rest
    # is sampling noise of a percentile of 120 smoothed samples.
    raw, f0 = _bleaching(11)
    error = np.abs(delta_f_over_f(raw, FRAME_RATE).f0 / f0 - 1.0)
    for frame in (0, -1):
        assert np.median(error[:, frame]) < 0.015 and error[:, frame].max() < 0.025
    # Between an edge and the outermost window centre F0 goes from the edge's value to the centre's: no worse
    # than the running percentile next to it, whose own lag on the bleaching slope (up to 0.42 W times the slope
    # for the 8th percentile: the 8 % point of a ramp over the window) dominates there; 2 % in the median, the
    # tolerance of the interior (test above).
    half = int(30 * FRAME_RATE)
    for edge, inside in ((slice(0, half), slice(half, 2 * half)), (slice(-half, None), slice(-2 * half, -half))):
        assert np.median(error[:, edge]) < 0.02
        assert error[:, edge].max() <= error[:, inside].max() + 0.005  # (+ the noise offset, above)


def test_no_spurious_spike_at_the_start_of_a_bleaching_recording():
    # Reference: simulation ground truth (no transient in the first 10 s of any ROI). With F0 held at the
    # outermost knot, ΔF/F started about 0.08 too high and decayed with the bleaching: a "spike" at t = 0 in most
    # cells (36 of 40 in a user's session).
    from calcium.infer import infer_spikes

    raw, _ = _bleaching(12)
    dff = delta_f_over_f(raw, FRAME_RATE).dff
    early = [np.count_nonzero(infer_spikes(row, FRAME_RATE, indicator="GCaMP6s").spike_times < 2.0) for row in dff]
    assert sum(n > 0 for n in early) <= 2, early  # (a noise spike now and then: at most 10 % of the ROIs)


def test_edges_change_nothing_between_the_outermost_window_centres():
    # Reference: numpy.interp of the window percentiles (the knots) at the frames between the first and the last
    # knot: there F0 is what it was before the edges got lines of their own, bit for bit.
    from calcium.signal.baseline import _plan_grid, _smoothed_samples, _window_percentile

    raw, _ = _bleaching(13, rois=3, seconds=300.0)
    grid = _plan_grid(raw.shape[1], FRAME_RATE, 60.0, 1.0)
    knots = _window_percentile(_smoothed_samples(raw, None, grid), grid, 8.0)
    inside = np.arange(int(np.ceil(grid.knot_frames[0])), int(np.floor(grid.knot_frames[-1])) + 1)
    expected = np.array([np.interp(inside.astype(float), grid.knot_frames, row) for row in knots])
    np.testing.assert_array_equal(delta_f_over_f(raw, FRAME_RATE).f0[:, inside], expected)


def test_edge_line_solves_the_quantile_regression_of_its_window():
    # Reference: the linear quantile regression (Koenker & Bassett 1978, Econometrica 46:33-50) as a linear
    # program solved by scipy.optimize.linprog (HiGHS): minimise sum tau u+ + (1 - tau) u- with
    # y = a + b x + u+ - u-. The edge line balances the m lowest residuals, which is the optimality condition at
    # tau = m / n: its check loss (intercept at the m-th lowest residual) equals the optimum.
    from scipy.optimize import linprog

    from calcium.signal.baseline import _EDGE_PRECISION, _edge_slopes, _quantile_line_at

    rng = np.random.default_rng(14)
    n, percentile = 60, 8.0
    offsets = np.arange(n) * 15.0 + 7.5
    values = 100.0 - 0.02 * offsets + rng.normal(0.0, 1.0, (4, n)) + 5.0 * (rng.random((4, n)) < 0.1)
    m = int(np.floor(percentile / 100.0 * (n - 1))) + 1
    tau = m / n
    doubled = np.rint(2.0 * offsets).astype(np.int64)
    steepest = np.ptp(values, axis=1) / 15.0
    slopes = np.empty(4)
    _edge_slopes(values, doubled, m, int(np.ceil(np.log2(2.0 * n / _EDGE_PRECISION))), steepest, slopes)
    for row, slope in zip(values, slopes):
        residual = row - slope * offsets
        intercept = np.sort(residual)[m - 1]
        ours = np.sum((residual - intercept) * (tau - (residual < intercept)))
        cost = np.concatenate([[0.0, 0.0], np.full(n, tau), np.full(n, 1.0 - tau)])
        equality = np.hstack([np.ones((n, 1)), offsets[:, None], np.eye(n), -np.eye(n)])
        best = linprog(cost, A_eq=equality, b_eq=row, bounds=[(None, None)] * 2 + [(0, None)] * (2 * n),
                       method="highs")
        assert best.status == 0 and ours == pytest.approx(best.fun, rel=1e-6)
    # and F0 at the edge is the percentile of the residuals, within the range of the values
    level = _quantile_line_at(values, offsets, percentile)
    assert np.all((level >= values.min(axis=1)) & (level <= values.max(axis=1)))


@settings(max_examples=80, deadline=None)
@given(n=st.integers(4, 150), rows=st.integers(1, 4), seed=st.integers(0, 2**31), percentile=st.floats(0.5, 99.5),
       quantised=st.booleans(), slope=st.floats(-3, 3), late=st.booleans(), half=st.booleans())
def test_compiled_edge_slopes_equal_the_numpy_reference(n, rows, seed, percentile, quantised, slope, late, half):
    # Reference: the numpy version of the same bisection (np.partition for the m-th lowest residual, matrix
    # products for the sums), bit for bit; quantised values (photon counts) make ties at the m-th residual.
    from calcium.signal.baseline import _quantile_line_at

    rng = np.random.default_rng(seed)
    step = float(rng.integers(1, 8))
    offsets = np.arange(n) * step + (0.5 if half else 0.0) - (n * step if late else 0.0)
    values = rng.normal(0.0, 2.0, (rows, n)) + slope * offsets / step
    if quantised:
        values = np.round(values)
    compiled = _quantile_line_at(values, offsets, percentile)
    reference = _quantile_line_at(values, offsets, percentile, compiled=False)
    np.testing.assert_array_equal(compiled, reference)


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
