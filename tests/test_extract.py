"""Tests for calcium/extract.py: ROI / neuropil traces from a movie, neuropil factor estimate."""
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.spatial.distance import cdist

from calcium.extract import estimate_neuropil_factor, extract_traces, neuropil_rings
from calcium.io.movie import open_movie, write_movie


def _two_square_rois(size=40):
    masks = np.zeros((2, size, size), dtype=bool)
    masks[0, 8:13, 8:13] = True
    masks[1, 25:31, 22:27] = True
    return masks


def _brute_force_rings(masks, gap, radius):
    """Ring definition evaluated directly: Euclidean distances between pixel centres (scipy cdist)."""
    n, h, w = masks.shape
    pixels = np.argwhere(np.ones((h, w), dtype=bool))
    dist = np.stack([cdist(pixels, np.argwhere(m)).min(axis=1).reshape(h, w) for m in masks])
    free = dist.min(axis=0) > gap  # outside every ROI and beyond the gap of every ROI
    return (dist > gap) & (dist <= radius) & free


def test_constant_roi_and_neuropil_give_a_minus_r_times_b(tmp_path):
    # F_corrected = F_roi - r * F_neuropil with r = 0.7 (common practice, no single source).
    rng = np.random.default_rng(0)
    masks = _two_square_rois()
    frames = 12
    background = rng.uniform(50, 150, size=frames)           # b(t): every non-ROI pixel
    roi_values = rng.uniform(200, 400, size=(2, frames))     # a_i(t): every pixel of ROI i
    movie = np.repeat(background[:, None, None], 40 * 40, axis=1).reshape(frames, 40, 40)
    for i in range(2):
        movie[:, masks[i]] = roi_values[i][:, None]
    result = extract_traces(movie, masks)
    np.testing.assert_allclose(result.roi_f, roi_values, rtol=1e-13)
    np.testing.assert_allclose(result.neuropil_f, np.tile(background, (2, 1)), rtol=1e-13)
    np.testing.assert_allclose(result.corrected, roi_values - 0.7 * background, rtol=1e-13)
    np.testing.assert_array_equal(result.neuropil_factor, [0.7, 0.7])
    np.testing.assert_array_equal(result.roi_pixels, [25, 30])
    assert not result.factor_estimated.any() and not result.missing.any


def test_ring_matches_a_direct_distance_computation():
    masks = _two_square_rois()
    masks[1, 14, 10] = True  # a second blob close to ROI 0: its gap must bite into ROI 0's ring
    rings = neuropil_rings(masks, neuropil_gap_px=2, neuropil_radius_px=7.5)
    np.testing.assert_array_equal(rings, _brute_force_rings(masks, 2, 7.5))
    assert not (rings & masks.any(axis=0)).any()


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 2**31 - 1), n_rois=st.integers(1, 3), gap=st.sampled_from([0, 1, 1.5, 2, 3]),
       extra=st.sampled_from([0.5, 1, 2.3, 4, 6]))
def test_rings_of_random_rois_match_the_direct_distance_computation(seed, n_rois, gap, extra):
    rng = np.random.default_rng(seed)
    masks = np.zeros((n_rois, 18, 16), dtype=bool)
    for mask in masks:
        r, c = rng.integers(0, 18), rng.integers(0, 16)
        mask[max(r - 1, 0):r + rng.integers(1, 4), max(c - 1, 0):c + rng.integers(1, 4)] = True
        mask[rng.integers(0, 18), rng.integers(0, 16)] |= rng.random() < 0.3  # sometimes a stray pixel
    expected = _brute_force_rings(masks, gap, gap + extra)
    if not expected.reshape(n_rois, -1).any(axis=1).all():
        with pytest.raises(ValueError, match="larger neuropil_radius_px"):
            extract_traces(np.zeros((1, 18, 16)), masks, neuropil_gap_px=gap, neuropil_radius_px=gap + extra)
    np.testing.assert_array_equal(neuropil_rings(masks, neuropil_gap_px=gap, neuropil_radius_px=gap + extra),
                                  expected)


def test_traces_are_the_pixel_means_of_each_roi_and_ring():
    # Reference: numpy means over boolean masks, frame by frame; ROIs overlap and are given as labels too.
    rng = np.random.default_rng(3)
    movie = rng.normal(100, 10, size=(30, 32, 30)).astype(np.float32)
    masks = np.zeros((3, 32, 30), dtype=bool)
    masks[0, 5:10, 5:11] = True
    masks[1, 8:12, 9:14] = True     # overlaps ROI 0
    masks[2, 20:26, 18:22] = True
    result = extract_traces(movie, masks, neuropil_gap_px=1, neuropil_radius_px=6, chunk_frames=7)
    rings = neuropil_rings(masks, neuropil_gap_px=1, neuropil_radius_px=6)
    for i in range(3):
        np.testing.assert_allclose(result.roi_f[i], movie[:, masks[i]].astype(float).mean(axis=1), rtol=1e-12)
        np.testing.assert_allclose(result.neuropil_f[i], movie[:, rings[i]].astype(float).mean(axis=1), rtol=1e-12)
    np.testing.assert_array_equal(result.neuropil_pixels, rings.sum(axis=(1, 2)))
    labels = np.zeros((32, 30), dtype=np.int32)
    labels[masks[2]] = 40
    labels[masks[0]] = 7
    one = extract_traces(movie, labels, neuropil_gap_px=1, neuropil_radius_px=6)
    np.testing.assert_allclose(one.roi_f[0], movie[:, masks[0]].astype(float).mean(axis=1), rtol=1e-12)


def test_chunk_size_and_file_backed_movies_do_not_change_the_result(tmp_path):
    rng = np.random.default_rng(4)
    movie = rng.integers(0, 60000, size=(23, 40, 40)).astype(np.uint16)
    masks = _two_square_rois()
    whole = extract_traces(movie, masks, chunk_frames=1000)
    with open_movie(write_movie(tmp_path / "m.tif", movie)) as on_disk:
        for chunk in (1, 7, 23):
            part = extract_traces(on_disk, masks, chunk_frames=chunk)
            np.testing.assert_array_equal(part.roi_f, whole.roi_f)
            np.testing.assert_array_equal(part.corrected, whole.corrected)


def test_missing_frames_stay_missing_and_a_bad_pixel_is_estimated_around_or_strictly_missing():
    movie = np.full((6, 40, 40), 10.0)
    masks = _two_square_rois()
    movie[2] = np.nan                    # a dropped frame
    movie[4, 9, 9] = np.nan              # one bad pixel inside ROI 0
    with pytest.warns(UserWarning, match=r"NaN or inf pixels in 2 ROI\(s\).*ROI 0: in 2 of 6 frames.*2 sample\(s\) "
                                         r"in 2 ROI\(s\) had fewer and are missing"):
        result = extract_traces(movie, masks)
    assert np.isnan(result.corrected[:, 2]).all()
    assert result.corrected[0, 4] == pytest.approx(10.0 - 0.7 * 10.0)  # 24 of 25 pixels finite: estimated
    assert result.missing.count == 2
    np.testing.assert_array_equal(result.nan_pixel_frames, [2, 1])
    np.testing.assert_array_equal(result.nan_pixel_missing, [1, 1])
    finite = np.isfinite(result.corrected)
    np.testing.assert_allclose(result.corrected[finite], 10.0 - 0.7 * 10.0)
    with pytest.warns(UserWarning):
        strict = extract_traces(movie, masks, min_finite_fraction=1.0)  # any bad pixel: the sample is missing
    assert np.isnan(strict.corrected[0, 4]) and np.isfinite(strict.corrected[1, 4]) and strict.missing.count == 3
    with pytest.raises(ValueError, match="min_finite_fraction"):
        extract_traces(movie, masks, min_finite_fraction=1.5)


def _proportional_movie(rng, frames=200, size=40):
    """Every pixel p at frame t is gain_p * f(t): ROIs brighter than the background and uneven inside."""
    gain = rng.uniform(50.0, 150.0, size=(size, size))
    gain[8:13, 8:13] *= np.linspace(1.0, 4.0, 5)[None, :]  # ROI 0 brightens from left to right
    course = 1.0 + 0.5 * np.abs(np.sin(np.arange(frames) / 7.0))
    return gain[None] * course[:, None, None]


def test_a_dead_pixel_in_every_frame_no_longer_wipes_out_the_rois_and_is_reported():
    # The dead pixel sits in both rings; 198 of 200 frames also lose a ring pixel. Reference: the mean over the
    # pixels that are ever finite, computed with numpy (ratio estimates are exact for proportional pixels,
    # Cochran 1977, ch. 6).
    rng = np.random.default_rng(9)
    masks = _two_square_rois()
    movie = _proportional_movie(rng)
    truth = movie.copy()
    rings = neuropil_rings(masks)
    dead = tuple(np.argwhere(rings[0] & rings[1])[0])
    movie[:, dead[0], dead[1]] = np.nan
    with pytest.warns(UserWarning, match=r"NaN or inf pixels in 2 ROI\(s\).*in 200 of 200 frames"):
        result = extract_traces(movie, masks)
    assert not result.missing.any
    np.testing.assert_array_equal(result.nan_pixel_frames, [200, 200])
    np.testing.assert_array_equal(result.nan_pixel_missing, [0, 0])
    for i in range(2):
        live = rings[i].copy()
        live[dead] = False
        np.testing.assert_allclose(result.neuropil_f[i], truth[:, live].mean(axis=1), rtol=1e-12)
        np.testing.assert_allclose(result.roi_f[i], truth[:, masks[i]].mean(axis=1), rtol=1e-13)


def test_frames_with_part_of_an_uneven_roi_missing_are_estimated_without_a_jump():
    # Reference: the full-ROI mean of the movie before its pixels were hidden. Hiding the bright right half of
    # ROI 0 would drop a plain mean of the finite pixels by a third; the ratio estimate stays within 1 %.
    rng = np.random.default_rng(10)
    masks = _two_square_rois()
    movie = _proportional_movie(rng)
    truth = movie[:, masks[0]].mean(axis=1)
    hidden = np.zeros((40, 40), dtype=bool)
    hidden[8:13, 11:13] = True            # 10 of the 25 pixels of ROI 0 (the brightest two columns)
    frames = np.arange(40, 60)
    movie[np.ix_(frames, *np.nonzero(hidden))] = np.nan
    gone = movie[:, 8:13, 8:13].copy()
    gone[:, :3, :] = np.nan               # frame 100: 15 of 25 pixels hidden, fewer than half left: missing
    movie[100, 8:13, 8:13] = gone[100]
    with pytest.warns(UserWarning, match=r"ROI 0: in 21 of 200 frames.*1 sample\(s\) in 1 ROI\(s\)"):
        result = extract_traces(movie, masks)
    plain = np.nanmean(movie[frames][:, masks[0]], axis=1)
    assert np.all(np.abs(plain / truth[frames] - 1) > 0.15)
    np.testing.assert_allclose(result.roi_f[0, frames], truth[frames], rtol=0.01)
    assert np.isnan(result.roi_f[0, 100]) and result.nan_pixel_missing[0] == 1
    others = np.setdiff1d(np.arange(200), np.append(frames, 100))
    np.testing.assert_allclose(result.roi_f[0, others], truth[others], rtol=1e-13)


def test_nan_pixel_estimates_do_not_depend_on_the_chunk_size():
    rng = np.random.default_rng(11)
    masks = _two_square_rois()
    movie = _proportional_movie(rng, frames=30)
    movie[rng.random(movie.shape) < 0.05] = np.nan
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        whole = extract_traces(movie, masks, chunk_frames=1000)
        for chunk in (1, 7):
            part = extract_traces(movie, masks, chunk_frames=chunk)
            np.testing.assert_array_equal(part.roi_f, whole.roi_f)
            np.testing.assert_array_equal(part.neuropil_f, whole.neuropil_f)


def test_a_roi_without_neuropil_pixels_asks_for_a_larger_radius():
    masks = np.zeros((2, 9, 9), dtype=bool)
    masks[0] = True
    masks[0, 4, 4] = False
    masks[1, 4, 4] = True  # ROI 1 is enclosed by ROI 0, which fills the frame
    with pytest.raises(ValueError, match=r"ROI\(s\) 0, 1 have no neuropil.*larger neuropil_radius_px"):
        extract_traces(np.ones((2, 9, 9)), masks)


def test_bad_arguments_name_the_argument():
    movie, masks = np.ones((2, 40, 40)), _two_square_rois()
    with pytest.raises(ValueError, match="masks are 40x40 pixels but the movie frames are 40x39"):
        extract_traces(movie[:, :, :39], masks)
    with pytest.raises(ValueError, match="neuropil_radius_px must be larger than neuropil_gap_px"):
        extract_traces(movie, masks, neuropil_gap_px=3, neuropil_radius_px=3)
    with pytest.raises(ValueError, match="neuropil_factor must be"):
        extract_traces(movie, masks, neuropil_factor="auto")
    with pytest.raises(ValueError, match="neuropil_factor must be a finite number >= 0"):
        extract_traces(movie, masks, neuropil_factor=-0.1)
    with pytest.raises(ValueError, match="one finite value >= 0 per ROI"):
        extract_traces(movie, masks, neuropil_factor=[0.5])
    with pytest.raises(ValueError, match="chunk_frames"):
        extract_traces(movie, masks, chunk_frames=0)
    with pytest.raises(ValueError, match="ROI 1 is empty"):
        extract_traces(movie, np.stack([masks[0], np.zeros((40, 40), bool)]))


def test_a_factor_per_roi_is_used_as_given():
    movie = np.full((3, 40, 40), 10.0)
    masks = _two_square_rois()
    movie[:, masks[0]] = 30.0
    result = extract_traces(movie, masks, neuropil_factor=[0.0, 1.2])
    np.testing.assert_allclose(result.corrected, [[30.0] * 3, [10.0 - 12.0] * 3])


def _neuropil(rng, n, frame_rate=30.0):
    """Slow neuropil fluctuations: smoothed random walk plus a 20 s oscillation."""
    t = np.arange(n) / frame_rate
    slow = np.convolve(rng.normal(size=n + 300), np.ones(300) / np.sqrt(300), mode="valid")[:n]
    return 200 + 8 * slow + 15 * np.sin(2 * np.pi * t / 20)


def _contaminated_roi(r, neuropil, rng):
    """ROI = baseline + r * neuropil + positive transients (exponential decays, 1 s) + noise.

    Events are twice as frequent while the neuropil is above its median (activity correlated with the
    surrounding network), which biases an ordinary least-squares slope upwards.
    """
    n = neuropil.size
    rate = 0.003 * (1 + (neuropil > np.median(neuropil)))
    events = (rng.random(n) < rate) * rng.uniform(40, 120, n)
    transients = np.convolve(events, np.exp(-np.arange(240) / 30.0))[:n]
    return 80 + r * neuropil + transients + rng.normal(0, 2, n)


def _contaminated_trace(r, seed, n=3000):
    rng = np.random.default_rng(seed)
    neuropil = _neuropil(rng, n)
    return _contaminated_roi(r, neuropil, rng), neuropil + rng.normal(0, 0.5, n)


@pytest.mark.parametrize("r", [0.4, 0.8, 1.1])
def test_robust_estimate_recovers_the_neuropil_factor_despite_transients(r):
    roi, neuropil = _contaminated_trace(r, seed=int(r * 10))
    estimate = estimate_neuropil_factor(roi, neuropil)[0]
    assert abs(estimate - r) < 0.05
    # The same data fool ordinary least squares (numpy.polyfit): the transients matter here.
    assert abs(np.polyfit(neuropil, roi, 1)[0] - r) > 0.1


def test_estimate_is_clipped_and_skips_missing_frames():
    roi, neuropil = _contaminated_trace(0.8, seed=5)
    roi[100:400] = np.nan
    neuropil[50] = np.inf
    assert abs(estimate_neuropil_factor(roi, neuropil)[0] - 0.8) < 0.05
    steep = estimate_neuropil_factor(10 + 3.0 * neuropil[:500], neuropil[:500])
    np.testing.assert_array_equal(steep, [1.5])
    assert np.isnan(estimate_neuropil_factor(np.ones(50), np.full(50, 3.0))[0])


def test_extraction_estimates_the_factor_per_roi_from_the_movie():
    rng = np.random.default_rng(7)
    masks = _two_square_rois()
    factors, frames = (0.5, 0.9), 1500
    neuropil = _neuropil(rng, frames)
    movie = neuropil[:, None, None] + rng.normal(0, 1, size=(frames, 40, 40))
    for mask, r in zip(masks, factors):
        movie[:, mask] += _contaminated_roi(r, neuropil, rng)[:, None] - neuropil[:, None]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # every ROI can be estimated: no fallback warning
        result = extract_traces(movie, masks, neuropil_factor="estimate", chunk_frames=400)
    assert result.factor_estimated.all()
    np.testing.assert_allclose(result.neuropil_factor, factors, atol=0.05)
    np.testing.assert_allclose(result.corrected, result.roi_f - result.neuropil_factor[:, None] * result.neuropil_f)


def test_a_factor_that_cannot_be_estimated_falls_back_with_a_warning():
    movie = np.full((20, 40, 40), 10.0)   # constant neuropil: no slope to fit
    with pytest.warns(UserWarning, match=r"ROI\(s\) 0, 1.*0.7 used instead"):
        result = extract_traces(movie, _two_square_rois(), neuropil_factor="estimate")
    np.testing.assert_array_equal(result.neuropil_factor, [0.7, 0.7])
    assert not result.factor_estimated.any()


def test_progress_bar_reports_frames(capsys):
    extract_traces(np.ones((5, 40, 40)), _two_square_rois(), progress=True, chunk_frames=2)
    assert "5/5" in capsys.readouterr().err



@pytest.mark.parametrize("dtype", [np.uint16, np.float32, np.float64, bool, ">u2", np.float16])
def test_compiled_reduction_equals_its_plain_python_reference(dtype):
    # The numba kernel and the plain-Python loop run the same sums in the same order: equal to the bit.
    from calcium.extract import _PixelGroups, _chunk_rows, _group_means_numba, _group_means_python

    rng = np.random.default_rng(8)
    frames = (rng.random((5, 12, 11)) * 50).astype(dtype)
    if np.dtype(dtype).kind == "f":
        frames[1, 3, 4] = np.nan
    groups = _PixelGroups([np.array([0, 5, 17]), np.array([3]), rng.choice(132, 40, replace=False), np.array([5, 6])])
    fast, slow = np.full((4, 7), -1.0), np.full((4, 7), -1.0)
    rows = _chunk_rows(frames)
    _group_means_numba(rows, groups.order, groups.starts, groups.counts, fast, 2)
    _group_means_python(rows, groups.order, groups.starts, groups.counts, slow, 2)
    np.testing.assert_array_equal(fast, slow)
    # Reference: numpy means of the listed pixels.
    flat = frames.reshape(5, -1).astype(float)
    np.testing.assert_allclose(fast[2, 2:], flat[:, groups.order[4:44]].mean(axis=1), rtol=1e-12)
