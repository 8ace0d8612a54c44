"""Raw fluorescence from a movie and ROI masks, with neuropil correction.

For each ROI the mean pixel value in every frame is the raw trace ``roi_f``.
Out-of-focus light from the surrounding tissue (neuropil) adds to it; it is
estimated from a ring of pixels around the ROI and subtracted with a factor
``r``::

    corrected = roi_f - r * neuropil_f

The ring of a ROI holds the pixels whose Euclidean distance to the nearest
pixel of that ROI is > ``neuropil_gap_px`` and <= ``neuropil_radius_px``,
leaving out every pixel of every ROI and every pixel within the gap of any
ROI (so that no cell's own light enters another cell's neuropil).

The movie is read in chunks of frames; each ROI and ring is a list of flat
pixel indices, and a compiled loop (numba) sums the listed pixels of every
frame, so memory stays bounded, no temporary copy of a chunk is made, and
the cost is proportional to the number of ROI and ring pixels, not to the
frame size.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from numba import njit
from scipy import ndimage

from ._checks import MissingFrames, check_int, check_nonnegative, check_positive, find_missing
from .io.masks import check_masks
from .io.movie import as_movie

__all__ = ["Extraction", "extract_traces", "neuropil_rings", "estimate_neuropil_factor",
           "DEFAULT_NEUROPIL_FACTOR"]

# Neuropil contamination factor r in F - r F_neuropil: 0.7, the value Chen et al. 2013 (Nature 499:295, Methods)
# used for layer 2/3 cells imaged in vivo (from memory); values of about 0.5-1 are reported across preparations,
# and estimate_neuropil_factor measures it per ROI from the data instead.
DEFAULT_NEUROPIL_FACTOR = 0.7
# Range an estimated factor is clipped to: below 0 is unphysical, above 1.5
# would mean the ring is much dimmer than the light reaching the ROI.
_FACTOR_RANGE = (0.0, 1.5)
# Huber tuning constant: 95 % efficiency at Gaussian noise (Holland & Welsch 1977).
_HUBER_C = 1.345
# Bisquare rejection point, in noise scales. Holland & Welsch (1977) give 4.685
# for 95 % efficiency with symmetric outliers; transients are one-sided and
# their decaying tails sit just above the noise, so a tighter cut is used:
# 3.0 was chosen on simulated recordings (errors in r about half those at
# 4.685 when cells are active 10-30 % of the time; equal when they are silent).
_BISQUARE_C = 3.0
_MIN_FRAMES_FOR_ESTIMATE = 10
# A ROI (or ring) frame with non-finite pixels is estimated from the finite ones when at least this fraction of
# its pixels is finite (our own choice: with half the pixels the shot noise of the mean grows by at most sqrt(2),
# common practice; below that the estimate would rest on a minority of the ROI).
DEFAULT_MIN_FINITE_FRACTION = 0.5


@dataclass(frozen=True)
class Extraction:
    """Traces extracted from a movie.

    Attributes
    ----------
    roi_f : ndarray, shape (rois, frames)
        Mean pixel value of each ROI in each frame (raw fluorescence).
    neuropil_f : ndarray, shape (rois, frames)
        Mean pixel value of each ROI's neuropil ring.
    corrected : ndarray, shape (rois, frames)
        ``roi_f - neuropil_factor[:, None] * neuropil_f``.
    neuropil_factor : ndarray, shape (rois,)
        Factor r used for each ROI.
    neuropil_pixels : ndarray of int, shape (rois,)
        Number of pixels in each neuropil ring.
    roi_pixels : ndarray of int, shape (rois,)
        Number of pixels in each ROI.
    factor_estimated : ndarray of bool, shape (rois,)
        True where r was estimated from the data (``neuropil_factor="estimate"``
        and the estimate succeeded); False where a given or default value was used.
    neuropil_gap_px, neuropil_radius_px : float
        Ring geometry used.
    missing : MissingFrames
        Missing samples of ``corrected`` (NaN frames of a float movie, or
        too few finite pixels in a ROI or its ring).
    nan_pixel_frames : ndarray of int, shape (rois,)
        Frames in which the ROI or its ring held NaN (or inf) pixels.
    nan_pixel_missing : ndarray of int, shape (rois,)
        Of those, the frames left missing because fewer than
        ``min_finite_fraction`` of the ROI's (or the ring's) pixels were
        finite; the others were estimated from the finite pixels (see
        :func:`extract_traces`).
    """

    roi_f: np.ndarray
    neuropil_f: np.ndarray
    corrected: np.ndarray
    neuropil_factor: np.ndarray
    neuropil_pixels: np.ndarray
    roi_pixels: np.ndarray
    factor_estimated: np.ndarray
    neuropil_gap_px: float
    neuropil_radius_px: float
    missing: MissingFrames
    nan_pixel_frames: np.ndarray = None
    nan_pixel_missing: np.ndarray = None

    def __post_init__(self):
        for name in ("nan_pixel_frames", "nan_pixel_missing"):
            if getattr(self, name) is None:
                object.__setattr__(self, name, np.zeros(self.roi_f.shape[0], dtype=np.int64))

    @property
    def n_rois(self) -> int:
        return int(self.roi_f.shape[0])

    @property
    def n_frames(self) -> int:
        return int(self.roi_f.shape[1])


def _check_geometry(neuropil_gap_px, neuropil_radius_px) -> tuple[float, float]:
    gap = check_nonnegative(neuropil_gap_px, "neuropil_gap_px")
    radius = check_positive(neuropil_radius_px, "neuropil_radius_px")
    if radius <= gap:
        raise ValueError(f"neuropil_radius_px must be larger than neuropil_gap_px ({gap:g}), got {radius:g}")
    return gap, radius


def _ring_indices(stack: np.ndarray, gap: float, radius: float) -> list[np.ndarray]:
    """Flat pixel indices of every ROI's neuropil ring (see module notes).

    Distances come from :func:`scipy.ndimage.distance_transform_edt` (exact
    Euclidean distance transform) on a crop around each ROI, padded by the
    radius, so the cost grows with the ROI count, not with ROIs x frame size.
    """
    n_rois, height, width = stack.shape
    union = stack.any(axis=0)
    # Distance of every pixel to the nearest pixel of any ROI (0 inside ROIs).
    allowed = ndimage.distance_transform_edt(~union) > gap
    pad = int(math.ceil(radius)) + 1
    rings = []
    for mask in stack:
        rows = np.flatnonzero(mask.any(axis=1))
        cols = np.flatnonzero(mask.any(axis=0))
        r0, r1 = max(rows[0] - pad, 0), min(rows[-1] + pad + 1, height)
        c0, c1 = max(cols[0] - pad, 0), min(cols[-1] + pad + 1, width)
        distance = ndimage.distance_transform_edt(~mask[r0:r1, c0:c1])
        ring = (distance > gap) & (distance <= radius) & allowed[r0:r1, c0:c1]
        rr, cc = np.nonzero(ring)
        rings.append((rr + r0) * width + (cc + c0))
    return rings


def neuropil_rings(masks, *, neuropil_gap_px: float = 2, neuropil_radius_px: float = 15) -> np.ndarray:
    """Neuropil ring of every ROI, as a boolean stack.

    Parameters
    ----------
    masks : array_like
        Boolean stack (rois, height, width) or label image (height, width).
    neuropil_gap_px : float, default 2
        Pixels at distance <= gap from the ROI, or from any ROI, are left out.
    neuropil_radius_px : float, default 15
        Outer radius: pixels at distance <= radius from the ROI are included.

    Returns
    -------
    ndarray of bool, shape (rois, height, width)
        Ring i holds the pixels p with gap < d(p, ROI i) <= radius, that are
        in no ROI and at distance > gap from every ROI, where d is the
        Euclidean distance between pixel centres.

    Examples
    --------
    >>> masks = np.zeros((1, 7, 7), dtype=bool); masks[0, 3, 3] = True
    >>> neuropil_rings(masks, neuropil_gap_px=1, neuropil_radius_px=2)[0].sum()   # 4 at sqrt(2), 4 at 2
    np.int64(8)
    """
    stack = check_masks(masks)
    gap, radius = _check_geometry(neuropil_gap_px, neuropil_radius_px)
    out = np.zeros(stack.shape, dtype=bool)
    for i, index in enumerate(_ring_indices(stack, gap, radius)):
        out[i].flat[index] = True
    return out


def _lower_scale(resid: np.ndarray) -> float:
    """Noise scale from the residuals below the line only: 1.4826 x median(-r | r < 0).

    For zero-centred Gaussian noise, -r given r < 0 is half-normal with median
    0.6745 sigma, so this estimates sigma. Transients only push the ROI trace
    up, so the lower half is free of them, while a two-sided MAD is inflated
    by them and would let them keep their weight. Returns 0 when fewer than
    ``_MIN_FRAMES_FOR_ESTIMATE`` residuals are negative.
    """
    below = -resid[resid < 0]
    return 1.4826 * float(np.median(below)) if below.size >= _MIN_FRAMES_FOR_ESTIMATE else 0.0


def _robust_line(x: np.ndarray, y: np.ndarray, *, max_iter: int = 100, tol: float = 1e-9) -> np.ndarray:
    """Robust straight-line fit y = a + b x by IRLS: Huber weights, then Tukey bisquare weights.

    Huber's loss is convex, so its IRLS solution is unique and a safe start
    (scale: two-sided MAD); the bisquare iterations then give zero weight to
    residuals beyond ``_BISQUARE_C`` noise scales (here: calcium transients),
    the scale being taken from the residuals below the line
    (:func:`_lower_scale`). Returns (a, b).
    """
    design = np.column_stack([np.ones_like(x), x])
    beta = np.linalg.lstsq(design, y, rcond=None)[0]
    for kind in ("huber", "bisquare"):
        for _ in range(max_iter):
            resid = y - design @ beta
            if kind == "huber":
                scale = 1.4826 * float(np.median(np.abs(resid - np.median(resid))))
                if scale <= 0:
                    break
                w = 1.0 / np.maximum(np.abs(resid) / (_HUBER_C * scale), 1.0)
            else:
                scale = _lower_scale(resid)
                if scale <= 0:
                    break
                u = resid / (_BISQUARE_C * scale)
                w = np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)
            if np.count_nonzero(w) < _MIN_FRAMES_FOR_ESTIMATE:
                break
            sw = np.sqrt(w)
            new = np.linalg.lstsq(design * sw[:, None], y * sw, rcond=None)[0]
            done = np.all(np.abs(new - beta) <= tol * (1.0 + np.abs(beta)))
            beta = new
            if done:
                break
    return beta


def estimate_neuropil_factor(roi_f, neuropil_f, *, clip=_FACTOR_RANGE) -> np.ndarray:
    """Estimate the neuropil factor r of each ROI by robust regression.

    Fits ``roi_f = a + r * neuropil_f`` for each ROI by iteratively reweighted
    least squares [3]_: first with Huber's weights [1]_ (a convex problem, so a
    unique starting line), then with Tukey's bisquare weights [2]_, which give
    zero weight to frames more than 3 noise scales from the line, i.e. to the
    calcium transients. The noise scale is re-estimated at every step from the
    residuals *below* the line (1.4826 x their median magnitude), because
    transients only ever raise the ROI trace.

    Parameters
    ----------
    roi_f, neuropil_f : array_like, shape (rois, frames) or (frames,)
        ROI and neuropil traces; frames missing (NaN/inf) in either are skipped.
    clip : (float, float), default (0, 1.5)
        The estimate is clipped to this range.

    Returns
    -------
    ndarray, shape (rois,)
        Estimated r per ROI; NaN where it cannot be estimated (fewer than 10
        shared finite frames, or a constant neuropil trace).

    Notes
    -----
    The Huber constant 1.345 gives 95 % efficiency for Gaussian noise [3]_.
    The bisquare cut of 3 noise scales (instead of the 4.685 of [3]_, tuned
    for symmetric outliers) and the one-sided scale are this package's
    choices for one-sided contamination, set on simulated recordings.
    The estimate assumes the cell is silent in a good share of the frames at
    every neuropil level; a cell active most of the time leaves no baseline
    to fit, and r is then unreliable (hence the clip). Noise in the neuropil
    trace itself biases r towards 0 (regression dilution); a ring of many
    pixels keeps that noise small.

    References
    ----------
    .. [1] Huber, P. J. (1964). Robust estimation of a location parameter.
       Annals of Mathematical Statistics, 35(1), 73-101.
    .. [2] Beaton, A. E., & Tukey, J. W. (1974). The fitting of power series,
       meaning polynomials, illustrated on band-spectroscopic data.
       Technometrics, 16(2), 147-185.
    .. [3] Holland, P. W., & Welsch, R. E. (1977). Robust regression using
       iteratively reweighted least-squares. Communications in Statistics -
       Theory and Methods, 6(9), 813-827.

    Examples
    --------
    >>> t = np.arange(400)
    >>> neuropil = 100 + 10 * np.sin(t / 20)
    >>> roi = 30 + 0.8 * neuropil
    >>> roi[::25] += 50          # transients
    >>> float(np.round(estimate_neuropil_factor(roi, neuropil)[0], 6))
    0.8
    """
    y_all = np.atleast_2d(np.asarray(roi_f, dtype=np.float64))
    x_all = np.atleast_2d(np.asarray(neuropil_f, dtype=np.float64))
    if y_all.shape != x_all.shape or y_all.ndim != 2:
        raise ValueError(f"roi_f and neuropil_f must have the same shape (rois, frames), "
                         f"got {np.shape(roi_f)} and {np.shape(neuropil_f)}")
    low, high = (float(v) for v in clip)
    if not low <= high:
        raise ValueError(f"clip must be (low, high) with low <= high, got {clip!r}")
    out = np.full(y_all.shape[0], np.nan)
    for i, (y, x) in enumerate(zip(y_all, x_all)):
        keep = np.isfinite(x) & np.isfinite(y)
        x, y = x[keep], y[keep]
        if x.size < _MIN_FRAMES_FOR_ESTIMATE or np.ptp(x) == 0:
            continue
        # Centre and scale the regressor for a well-conditioned design matrix.
        centre, spread = np.median(x), np.std(x)
        beta = _robust_line((x - centre) / spread, y)
        out[i] = np.clip(beta[1] / spread, low, high)
    return out


class _PixelGroups:
    """ROI and ring pixel lists packed for the reduction: one index array plus group bounds."""

    def __init__(self, index_lists: list[np.ndarray]):
        self.counts = np.array([idx.size for idx in index_lists], dtype=np.int64)
        self.starts = np.concatenate([[0], np.cumsum(self.counts)[:-1]]).astype(np.int64)
        self.order = np.concatenate(index_lists).astype(np.int64)


@njit(cache=True)
def _group_means_numba(flat, order, starts, counts, out, first):  # pragma: no cover - compiled
    for t in range(flat.shape[0]):
        row = flat[t]
        for g in range(starts.size):
            total = 0.0
            for j in range(starts[g], starts[g] + counts[g]):
                total += row[order[j]]
            out[g, first + t] = total / counts[g]


def _group_means_python(flat, order, starts, counts, out, first):
    """Plain-Python reference of :func:`_group_means_numba` (same loops, same summation order)."""
    for t in range(flat.shape[0]):
        row = flat[t]
        for g in range(starts.size):
            total = 0.0
            for j in range(starts[g], starts[g] + counts[g]):
                total += float(row[order[j]])
            out[g, first + t] = total / counts[g]


# Pixel types the compiled loop reads directly; others (float16, big-endian, ...) are converted per chunk.
_DIRECT_TYPES = {np.dtype(t) for t in (np.bool_, np.uint8, np.uint16, np.uint32, np.int8, np.int16, np.int32,
                                       np.int64, np.uint64, np.float32, np.float64)}


def _chunk_rows(frames: np.ndarray) -> np.ndarray:
    """A chunk (k, h, w) as a C-contiguous (k, h * w) array of a type the compiled loop reads."""
    flat = np.asarray(frames).reshape(frames.shape[0], -1)
    if flat.dtype not in _DIRECT_TYPES or not flat.dtype.isnative:
        flat = flat.astype(np.float64)
    return np.ascontiguousarray(flat)


def _check_factor(neuropil_factor, n_rois: int):
    """Return (factors array, estimate?)."""
    if isinstance(neuropil_factor, str):
        if neuropil_factor != "estimate":
            raise ValueError(f"neuropil_factor must be a number >= 0, an array of one per ROI, or 'estimate'; "
                             f"got {neuropil_factor!r}")
        return np.full(n_rois, DEFAULT_NEUROPIL_FACTOR), True
    if np.ndim(neuropil_factor) == 0:
        return np.full(n_rois, check_nonnegative(neuropil_factor, "neuropil_factor")), False
    factors = np.asarray(neuropil_factor, dtype=np.float64)
    if factors.shape != (n_rois,) or not np.all(np.isfinite(factors)) or np.any(factors < 0):
        raise ValueError(f"neuropil_factor as an array must hold one finite value >= 0 per ROI "
                         f"({n_rois}), got shape {factors.shape}")
    return factors.copy(), False


def extract_traces(movie, masks, *, neuropil_gap_px: float = 2, neuropil_radius_px: float = 15,
                   neuropil_factor=DEFAULT_NEUROPIL_FACTOR, chunk_frames: int = 500,
                   min_finite_fraction: float = DEFAULT_MIN_FINITE_FRACTION, progress: bool = False) -> Extraction:
    """Mean ROI and neuropil fluorescence per frame, and the neuropil-corrected traces.

    Parameters
    ----------
    movie : Movie or array_like, shape (frames, height, width)
        From :func:`calcium.io.open_movie` (read in chunks) or in memory.
        NaN (or inf) pixels of a float movie mark missing data: see
        ``min_finite_fraction`` and Notes.
    masks : array_like
        Boolean stack (rois, height, width) or label image (height, width).
    neuropil_gap_px : float, default 2
        Pixels within this distance of any ROI are not neuropil.
    neuropil_radius_px : float, default 15
        Outer radius of each ROI's neuropil ring (distance to the ROI).
    neuropil_factor : float, array of shape (rois,), or "estimate", default 0.7
        Contamination factor r in ``corrected = roi_f - r * neuropil_f``.
        0.7 is common practice (no single source). ``"estimate"`` fits r per
        ROI with :func:`estimate_neuropil_factor`; where that is impossible a
        warning is issued and 0.7 is used (see ``factor_estimated``).
    chunk_frames : int, default 500
        Frames read and reduced at a time (memory ~ chunk_frames x frame size).
    min_finite_fraction : float in (0, 1], default 0.5
        A frame in which a ROI (or its ring) has NaN or inf pixels is
        estimated from its finite pixels when at least this fraction of the
        group's pixels is finite, and is missing otherwise (see Notes).
        1.0: any non-finite pixel makes the sample missing.
    progress : bool, default False
        Show a progress bar (tqdm).

    Returns
    -------
    Extraction

    Raises
    ------
    ValueError
        Masks and movie frames differ in size; an empty ROI; a ROI without
        neuropil pixels (use a larger ``neuropil_radius_px``); bad arguments.

    Notes
    -----
    With P_i the pixels of ROI i and N_i its ring, for frame t

    .. math:: F_i(t) = \\frac{1}{|P_i|} \\sum_{p \\in P_i} m_t(p), \\quad
              N_i(t) = \\frac{1}{|N_i|} \\sum_{p \\in N_i} m_t(p).

    Each ROI and ring is stored as a list of flat pixel indices and the sums
    run in a compiled loop over those lists, frame by frame (cost: one
    addition per listed pixel and frame).

    *NaN pixels.* A NaN (or inf) pixel of a float movie in P_i or N_i would
    make the whole sample missing; a single dead pixel in a ring of hundreds
    would then wipe out every frame. Instead, the frames with non-finite
    pixels are estimated from the finite ones when at least
    ``min_finite_fraction`` of the group's pixels are finite (else they are
    missing), by a ratio estimate (Cochran 1977, ch. 6): with
    :math:`\\bar m_p` the mean over the movie of pixel p (its finite frames),
    :math:`F = \\frac{\\sum_{p\\ finite} m_t(p)}{\\sum_{p\\ finite} \\bar m_p}
    \\cdot \\frac{1}{|L|}\\sum_{p \\in L} \\bar m_p`, L the group's pixels that
    are finite in some frame (a pixel never finite is left out of every
    frame). Where brightness varies within the ROI, a plain mean of the
    finite pixels would jump whenever the set of finite pixels changes; the
    ratio estimate does not when the pixels change in proportion to each
    other (it is exact then). Where some pixel mean is <= 0 (a movie with
    its background subtracted) the difference estimate
    :math:`\\mathrm{mean}_{finite} m_t(p) + \\mathrm{mean}_L \\bar m_p -
    \\mathrm{mean}_{finite} \\bar m_p` is used instead. A warning says how
    many frames were estimated and how many became missing
    (``nan_pixel_frames``, ``nan_pixel_missing``). These passes run only
    when a non-finite pixel was met; they read the movie once more (twice
    when a frame needs an estimate).

    References
    ----------
    Cochran WG (1977) Sampling Techniques, 3rd ed. Wiley (ch. 6, ratio
    estimators; ch. 7, difference estimators).

    Examples
    --------
    >>> movie = np.full((3, 20, 20), 10.0)
    >>> masks = np.zeros((1, 20, 20), dtype=bool); masks[0, 8:12, 8:12] = True
    >>> movie[:, masks[0]] = 50.0
    >>> result = extract_traces(movie, masks, neuropil_radius_px=5)
    >>> result.corrected[0].tolist()
    [43.0, 43.0, 43.0]
    """
    from tqdm.auto import tqdm

    movie = as_movie(movie)
    stack = check_masks(masks)
    gap, radius = _check_geometry(neuropil_gap_px, neuropil_radius_px)
    chunk_frames = check_int(chunk_frames, "chunk_frames", minimum=1)
    min_finite_fraction = check_positive(min_finite_fraction, "min_finite_fraction")
    if min_finite_fraction > 1:
        raise ValueError(f"min_finite_fraction must be in (0, 1], got {min_finite_fraction!r}")
    if stack.shape[1:] != movie.shape[1:]:
        raise ValueError(f"masks are {stack.shape[1]}x{stack.shape[2]} pixels but the movie frames are "
                         f"{movie.shape[1]}x{movie.shape[2]}")
    n_rois = stack.shape[0]
    factors, estimate = _check_factor(neuropil_factor, n_rois)
    rois = [np.flatnonzero(mask) for mask in stack]
    rings = _ring_indices(stack, gap, radius)
    empty = [i for i, ring in enumerate(rings) if ring.size == 0]
    if empty:
        raise ValueError(f"ROI(s) {', '.join(map(str, empty[:10]))} have no neuropil pixel with "
                         f"neuropil_gap_px={gap:g}, neuropil_radius_px={radius:g}: the surroundings are other "
                         f"ROIs or the frame edge; use a larger neuropil_radius_px")
    groups = _PixelGroups(rois + rings)
    n_frames = movie.n_frames
    means = np.empty((2 * n_rois, n_frames))
    with tqdm(total=n_frames, unit="frame", desc="extract", disable=not progress) as bar:
        # copy=False: views of the memory map (no copy of the chunk is made)
        for start, frames in movie.iter_chunks(chunk_frames, copy=False):
            _group_means_numba(_chunk_rows(frames), groups.order, groups.starts, groups.counts, means, start)
            bar.update(frames.shape[0])
    nan_frames = np.zeros(n_rois, dtype=np.int64)
    nan_missing = np.zeros(n_rois, dtype=np.int64)
    bad = ~np.isfinite(means)
    if bad.any():  # (only a float movie with NaN or inf pixels gets here)
        affected, lost = _repair_nan_pixels(movie, chunk_frames, rois + rings, means, bad, min_finite_fraction)
        nan_frames = (affected[:n_rois] | affected[n_rois:]).sum(axis=1)
        nan_missing = (lost[:n_rois] | lost[n_rois:]).sum(axis=1)
        _warn_nan_pixels(nan_frames, nan_missing, n_frames, min_finite_fraction)
    roi_f, neuropil_f = means[:n_rois], means[n_rois:]
    estimated = np.zeros(n_rois, dtype=bool)
    if estimate:
        fitted = estimate_neuropil_factor(roi_f, neuropil_f)
        estimated = np.isfinite(fitted)
        factors[estimated] = fitted[estimated]
        if not estimated.all():
            failed = np.flatnonzero(~estimated)
            warnings.warn(f"neuropil factor could not be estimated for ROI(s) "
                          f"{', '.join(str(int(i)) for i in failed[:10])} (fewer than {_MIN_FRAMES_FOR_ESTIMATE} "
                          f"usable frames or a constant neuropil); {DEFAULT_NEUROPIL_FACTOR} used instead",
                          stacklevel=2)
    corrected = roi_f - factors[:, None] * neuropil_f
    return Extraction(roi_f=roi_f, neuropil_f=neuropil_f, corrected=corrected, neuropil_factor=factors,
                      neuropil_pixels=np.array([r.size for r in rings]), roi_pixels=np.array([r.size for r in rois]),
                      factor_estimated=estimated, neuropil_gap_px=gap, neuropil_radius_px=radius,
                      missing=find_missing(corrected), nan_pixel_frames=nan_frames, nan_pixel_missing=nan_missing)


def _repair_nan_pixels(movie, chunk_frames, pixel_lists, means, bad, min_fraction):
    """Estimate from their finite pixels the group means that non-finite pixels spoiled (see extract_traces).

    ``means`` (groups, frames) is changed in place; ``bad`` marks its non-finite entries. Returns the boolean
    (groups, frames) arrays of the entries that had non-finite pixels and of those left missing.
    """
    groups = np.flatnonzero(bad.any(axis=1))
    lists = [pixel_lists[g] for g in groups]
    pixels, inverse = np.unique(np.concatenate(lists), return_inverse=True)
    where = np.split(inverse, np.cumsum([idx.size for idx in lists])[:-1])  # each group's columns in `pixels`
    total = np.zeros(pixels.size)
    count = np.zeros(pixels.size, dtype=np.int64)
    estimate = np.zeros(bad.shape, dtype=bool)  # enough finite pixels: estimated in the second pass
    for start, frames in movie.iter_chunks(chunk_frames, copy=False):
        values = _chunk_rows(frames)[:, pixels].astype(np.float64)
        finite = np.isfinite(values)
        for row in np.where(finite, values, 0.0):  # frame by frame: the same sums whatever the chunk size
            total += row
        count += finite.sum(axis=0)
        stop = start + frames.shape[0]
        for g, columns in zip(groups, where):
            spoiled = np.flatnonzero(bad[g, start:stop])
            if spoiled.size:
                enough = finite[np.ix_(spoiled, columns)].sum(axis=1) >= min_fraction * columns.size
                estimate[g, start + spoiled[enough]] = True
    with np.errstate(invalid="ignore", divide="ignore"):
        pixel_mean = total / count  # NaN for a pixel never finite
    lost = bad & ~estimate
    means[lost] = np.nan
    if estimate.any():
        need = np.flatnonzero(estimate.any(axis=0))
        for start, frames in movie.iter_chunks(chunk_frames, copy=False):
            stop = start + frames.shape[0]
            if not np.any((need >= start) & (need < stop)):
                continue
            values = _chunk_rows(frames)[:, pixels].astype(np.float64)
            for g, columns in zip(groups, where):
                for t in np.flatnonzero(estimate[g, start:stop]):
                    means[g, start + t] = _estimate_group(values[t, columns], pixel_mean[columns])
    return bad, lost


def _estimate_group(values, pixel_mean):
    """Ratio (or difference) estimate of a group's mean over its live pixels from the finite ones."""
    live = np.isfinite(pixel_mean)
    used = np.isfinite(values) & live
    if np.all(pixel_mean[live] > 0):
        return float(values[used].sum() / pixel_mean[used].sum() * pixel_mean[live].mean())
    return float(values[used].mean() + pixel_mean[live].mean() - pixel_mean[used].mean())


def _warn_nan_pixels(nan_frames, nan_missing, n_frames, min_fraction):
    rois = np.flatnonzero(nan_frames)
    worst = int(rois[np.argmax(nan_frames[rois])])
    text = (f"NaN or inf pixels in {rois.size} ROI(s) or their neuropil rings (e.g. ROI {worst}: in "
            f"{int(nan_frames[worst])} of {n_frames} frames): frames with at least {min_fraction:.0%} finite pixels "
            f"were estimated from those (a ratio estimate with each pixel's mean)")
    if nan_missing.any():
        worst_lost = int(np.argmax(nan_missing))
        text += (f"; {int(nan_missing.sum())} sample(s) in {np.count_nonzero(nan_missing)} ROI(s) had fewer and are "
                 f"missing (ROI {worst_lost}: {int(nan_missing[worst_lost])} of {n_frames} frames)")
    warnings.warn(text + "; see Extraction.nan_pixel_frames and nan_pixel_missing", UserWarning, stacklevel=3)
