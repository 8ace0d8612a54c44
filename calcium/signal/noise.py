"""Noise level of a trace from the upper band of its power spectrum.

Calcium transients are slow: at high frequencies the power spectrum of a
fluorescence trace is flat, set by the white (shot and read-out) noise. The
level of that flat part gives the noise standard deviation.
"""
from __future__ import annotations

import functools
import math

import numpy as np
import scipy  # scipy loads its submodules on first use: the per-ROI path needs only special

from .._checks import as_traces, check_choice, check_frame_rate, require_some_data
from ._bands import frequency_pairs
from ._missing import finite_runs

__all__ = ["estimate_noise", "average_name", "MIN_FRAMES", "AVERAGES"]

MIN_FRAMES = 16          # shortest trace (or finite stretch) with a usable spectrum
_SEGMENT = 256           # Welch segment length (frames), shorter traces use their length
AVERAGES = ("arithmetic", "median", "geometric")
#: Former names of the averages, accepted for one release with a DeprecationWarning.
_OLD_AVERAGES = {"mean": "arithmetic", "logmeanexp": "geometric"}


def average_name(average) -> str:
    """The average's name, the former names mapped to the current ones (with a DeprecationWarning)."""
    if isinstance(average, str) and average in _OLD_AVERAGES:
        import warnings

        new = _OLD_AVERAGES[average]
        warnings.warn(f"average={average!r} is the former name of average={new!r}; it will be removed in a "
                      f"later release", DeprecationWarning, stacklevel=3)
        return new
    return check_choice(average, "average", AVERAGES)


def _check_band(band_hz, frame_rate: float) -> tuple[float, float]:
    nyquist = frame_rate / 2.0
    if band_hz is None:
        return frame_rate / 4.0, nyquist
    try:
        low, high = (float(b) for b in band_hz)
    except (TypeError, ValueError):
        raise ValueError(
            f"band_hz must be None or a (low, high) pair of frequencies in Hz; got {band_hz!r}") from None
    if not (0.0 <= low < high <= nyquist):
        raise ValueError(f"band_hz must be (low, high) with 0 <= low < high <= {nyquist:g} Hz (the Nyquist "
                         f"frequency frame_rate/2); got {band_hz!r}")
    return low, high


def _check_exclude(exclude_hz) -> tuple[tuple[float, float], ...]:
    """``exclude_hz`` as a tuple of (low, high) pairs in Hz (empty for None)."""
    if exclude_hz is None:
        return ()
    pairs = frequency_pairs(exclude_hz, "exclude_hz", "[(4.8, 5.2)] (or None)")
    for low, high in pairs:
        if not (math.isfinite(low) and math.isfinite(high) and 0.0 <= low < high):
            raise ValueError(f"exclude_hz holds ({low:g}, {high:g}); each band must be (low, high) with "
                             f"0 <= low < high, finite, in Hz")
    return pairs


def _segments(n: int, nperseg: int) -> int:
    """Number of Welch segments scipy uses (half-overlapping, trailing partial dropped)."""
    step = nperseg - nperseg // 2
    return (n - nperseg) // step + 1


@functools.lru_cache(maxsize=64)
def _hann(n: int) -> np.ndarray:
    """The periodic Hann window of n samples, 0.5 - 0.5 cos(2 pi k / n): the window of scipy.signal.welch
    (``get_window("hann", n)``; Harris 1978, Proc. IEEE 66, 51-83). Read-only (cached)."""
    window = 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(n) / n)
    window.flags.writeable = False
    return window


@functools.lru_cache(maxsize=256)
def _welch_dof(n_segments: int, nperseg: int) -> float:
    """Equivalent degrees of freedom of a Welch estimate (Hann window, half overlap).

    Percival & Walden (1993), eq. 292b: ν = 2 N / (1 + 2 Σ_m (1 − m/N) ρ(m)²),
    ρ(m) the overlap correlation of the normalised window at a shift of m
    segments.
    """
    window = _hann(nperseg)
    window = window / np.sqrt(np.sum(window ** 2))
    step = nperseg - nperseg // 2
    total = 0.0
    for m in range(1, n_segments):
        shift = m * step
        if shift >= nperseg:
            break
        total += (1.0 - m / n_segments) * float(np.dot(window[:-shift], window[shift:])) ** 2
    return 2.0 * n_segments / (1.0 + 2.0 * total)


def _band_average(psd: np.ndarray, average: str, dof: np.ndarray) -> np.ndarray:
    """Average PSD values over the band (last axis), corrected to estimate their mean."""
    if average == "arithmetic":
        return psd.mean(axis=-1)
    if average == "median":
        # Each Welch value is ~ (mean level) · χ²_ν / ν; the median of χ²_ν / ν is below 1.
        # (the median of χ²_ν is 2 P⁻¹(ν/2, 1/2), P the regularised lower incomplete gamma function)
        return np.median(psd, axis=-1) / (2.0 * scipy.special.gammaincinv(dof / 2.0, 0.5) / dof)
    # geometric: exp(mean(log PSD)); E[log(χ²_ν / ν)] = ψ(ν/2) − log(ν/2).
    with np.errstate(divide="ignore"):
        log_mean = np.log(psd).mean(axis=-1)
    return np.exp(log_mean - (scipy.special.digamma(dof / 2.0) - np.log(dof / 2.0)))


def _band_bins(freq: np.ndarray, band: tuple[float, float], frame_rate: float, nperseg: int,
               exclude: tuple = ()) -> np.ndarray:
    nyquist = frame_rate / 2.0
    # DC and Nyquist are left out: scipy does not double them in a one-sided
    # density, so their expected level is half that of the other bins.
    keep = (freq >= band[0]) & (freq <= band[1]) & (freq > 0) & (freq < nyquist)
    for low, high in exclude:  # narrow peaks (periodic artefacts) are not flat noise
        keep &= ~((freq >= low) & (freq <= high))
    if not keep.any():
        left = f" once exclude_hz {list(exclude)} is left out" if exclude else ""
        raise ValueError(f"band_hz {band} holds no frequency of the spectrum{left} (resolution "
                         f"{frame_rate / nperseg:.4g} Hz with {nperseg}-frame segments, DC and Nyquist "
                         f"excluded); widen the band" + (" or exclude less" if exclude else ""))
    return keep


def _remove_segment_mean(keep: np.ndarray) -> bool:
    # The DFT of a periodic Hann window is zero beyond bin 1, so a segment's mean reaches only
    # bins 0 and 1: removing it is a wasted pass when the band starts above bin 1.
    return bool(np.flatnonzero(keep)[0] < 2)


def _masked_welch_level(block: np.ndarray, hole: np.ndarray, frame_rate: float, nperseg: int,
                        keep: np.ndarray, average: str, scratch: dict | None = None) -> np.ndarray:
    """Band level per row from the Welch segments that hold no missing sample (NaN where none does).

    The segments are those of :func:`scipy.signal.welch` (Hann window, half
    overlap, same scaling); a segment touching a missing sample is dropped
    from the average. ``scratch`` keeps the large temporaries for the next call (see :func:`_segment_power`).
    """
    if not hole.any():
        return _welch_level(block, frame_rate, nperseg, keep, average, scratch)
    n = block.shape[-1]
    step = nperseg - nperseg // 2
    starts = np.arange(_segments(n, nperseg)) * step
    holes_before = np.zeros((hole.shape[0], n + 1), np.int64)
    np.cumsum(hole, axis=-1, out=holes_before[:, 1:])
    usable = (holes_before[:, starts + nperseg] - holes_before[:, starts]) == 0   # (rows, segments)
    n_ok = usable.sum(axis=-1)
    # Only the usable segments are copied and transformed; they hold no missing sample.
    seg_row, seg_index = np.nonzero(usable)
    segments = np.lib.stride_tricks.sliding_window_view(block, nperseg, axis=-1)[seg_row, starts[seg_index]]
    power = _segment_power(segments, keep, nperseg, scratch)                      # (usable segments, bins)
    psd = np.zeros((block.shape[0], power.shape[1]))
    has = n_ok > 0
    if has.any():
        first = np.concatenate([[0], np.cumsum(n_ok[has])[:-1]])
        psd[has] = np.add.reduceat(power, first, axis=0)
    psd *= _density_scale(frame_rate, nperseg) / np.maximum(n_ok, 1)[:, None]
    dof = np.array([_welch_dof(int(k), nperseg) if k else 2.0 for k in n_ok])
    level = _band_average(psd, average, dof)
    level[n_ok == 0] = np.nan
    return level


def _welch_level(block: np.ndarray, frame_rate: float, nperseg: int, keep: np.ndarray, average: str,
                 scratch: dict | None = None) -> np.ndarray:
    """:func:`_masked_welch_level` of rows without missing samples: every segment is used, and the windowed
    copy is made straight from a strided view of the rows (no copy of the segments first)."""
    step = nperseg - nperseg // 2
    n_seg = _segments(block.shape[-1], nperseg)
    segments = np.lib.stride_tricks.sliding_window_view(block, nperseg, axis=-1)[:, ::step][:, :n_seg]
    power = _segment_power(segments, keep, nperseg, scratch)                      # (rows, segments, bins)
    psd = power.sum(axis=1) * (_density_scale(frame_rate, nperseg) / n_seg)
    return _band_average(psd, average, np.full(block.shape[0], _welch_dof(n_seg, nperseg)))


def _segment_power(segments: np.ndarray, keep: np.ndarray, nperseg: int, scratch: dict | None = None) -> np.ndarray:
    """|X|^2 at the ``keep`` bins of each Hann-windowed segment (last axis), its mean removed when that matters.

    The windowed segments and their spectra (the two large temporaries) are written into arrays kept in
    ``scratch`` from one call to the next: fresh arrays of that size would be new memory at every call, and
    on a virtual machine the page faults cost more than the transform (3.5x slower, measured).
    """
    if _remove_segment_mean(keep):
        segments = segments - segments.mean(axis=-1, keepdims=True)
    scratch = {} if scratch is None else scratch
    windowed = np.multiply(segments, _hann(nperseg), out=_scratch_array(scratch, "windowed", segments.shape,
                                                                         np.float64))
    spectrum = np.fft.rfft(windowed, axis=-1, out=_scratch_array(scratch, "spectrum", segments.shape[:-1] +
                                                                 (nperseg // 2 + 1,), np.complex128))[..., keep]
    return spectrum.real ** 2 + spectrum.imag ** 2


def _scratch_array(scratch: dict, name: str, shape: tuple, dtype) -> np.ndarray:
    """An uninitialised array of ``shape``: the front of the one kept as ``scratch[name]`` when it is large
    enough (a new, larger one is kept otherwise)."""
    size = math.prod(shape)
    kept = scratch.get(name)
    if kept is None or kept.size < size:
        kept = scratch[name] = np.empty(size, dtype=dtype)
    return kept[:size].reshape(shape)


def _density_scale(frame_rate: float, nperseg: int) -> float:
    """One-sided density, as scipy.signal.welch: 2 |X|^2 / (fs * sum(window^2)) away from DC and Nyquist."""
    return 2.0 / (frame_rate * np.sum(_hann(nperseg) ** 2))


def _noise_with_gaps(row: np.ndarray, frame_rate: float, band, average: str, roi: str, exclude: tuple = ()) -> float:
    """Welch spectrum over the finite stretches of one trace, with segments as long as they allow.

    For traces whose gaps leave no whole 256-frame segment.
    """
    starts, stops = finite_runs(np.isfinite(row))
    lengths = stops - starts
    longest = int(lengths.max())
    if longest < MIN_FRAMES:
        raise ValueError(f"{roi} has no stretch of at least {MIN_FRAMES} consecutive finite frames "
                         f"(longest {longest}); estimate_noise needs one")
    nperseg = min(_SEGMENT, longest)
    total = None
    count = 0
    dof = 0.0
    for start, stop in zip(starts, stops):
        if stop - start < nperseg:
            continue
        freq, psd = scipy.signal.welch(row[start:stop], frame_rate, nperseg=nperseg)
        k = _segments(stop - start, nperseg)
        total = psd * k if total is None else total + psd * k
        count += k
        dof += _welch_dof(k, nperseg)
    keep = _band_bins(freq, band, frame_rate, nperseg, exclude)
    level = _band_average((total / count)[keep], average, np.asarray(dof))
    return float(level)


def estimate_noise(trace, frame_rate, *, band_hz=None, average="arithmetic", exclude_hz=None):
    """Standard deviation of the white-noise part of trace(s), from the power spectrum.

    Parameters
    ----------
    trace : array_like, shape (frames,) or (rois, frames)
        Time is the last axis. NaN or inf mark missing samples.
    frame_rate : float
        Frames per second (Hz).
    band_hz : (float, float), optional
        Frequency band (Hz) where the spectrum is taken to be flat noise;
        default ``(frame_rate / 4, frame_rate / 2)``, the upper half of the
        spectrum, where calcium transients (slower than a few Hz) leave only
        the noise (Pnevmatikakis et al. 2016).
    average : {'arithmetic', 'median', 'geometric'}, optional
        How the power spectral density is averaged over the band: the
        arithmetic mean, the median, or the geometric mean
        (exp(mean(log PSD))). 'median' and 'geometric' resist narrow peaks
        in the band; both are corrected for their bias (see Notes). The
        former names 'mean' and 'logmeanexp' are accepted for one release.
    exclude_hz : sequence of (float, float), optional
        Frequency bands (Hz) left out of ``band_hz``: narrow spectral peaks
        such as the shared rhythms found by
        :func:`calcium.signal.rhythms.find_rhythms` (a periodic artefact is
        not flat noise and would inflate the estimate).

    Returns
    -------
    float or ndarray
        The noise standard deviation in the units of ``trace``: a float for
        a 1-D trace, an array of shape (rois,) for 2-D input.

    Raises
    ------
    ValueError
        For bad arguments, a trace shorter than 16 frames, or a band that
        holds no frequency of the spectrum.
    calcium._checks.MissingDataError
        If a ROI has no finite sample.

    Notes
    -----
    The power spectral density is estimated with Welch's method
    (:func:`scipy.signal.welch`: Hann window, 256-frame segments or the
    trace length if shorter, half overlap, segment means removed,
    one-sided density). For white noise of variance σ² the one-sided density
    is flat at 2σ²/fs, so

        σ² = (average PSD over the band) · fs / 2.

    DC and the Nyquist bin are never used (their one-sided density is not
    doubled). Each Welch value is distributed approximately as
    (mean level)·χ²_ν/ν, with ν the equivalent degrees of freedom of the
    Welch average (Percival & Walden 1993, eq. 292b). The 'median' is
    divided by median(χ²_ν)/ν, and the 'geometric' mean by exp(ψ(ν/2) − log(ν/2)),
    the bias of the mean of a log χ²_ν/ν variable, so that all three
    averages estimate the same level.

    Missing samples are neither filled nor dropped and joined (joining
    would put steps into the trace): the spectrum is the Welch average over
    the segments that hold no missing sample. If gaps leave no such segment,
    the trace is cut into its finite stretches and the longest stretch (at
    least 16 frames) sets a shorter segment length. The degrees of freedom
    ν then assume the kept segments are consecutive, which slightly
    understates ν where segments were dropped.

    Any signal power in the band (fast transients, coloured noise) adds to
    the estimate; choose ``band_hz`` above the frequencies of the signal,
    and leave narrow peaks out with ``exclude_hz``.

    References
    ----------
    Pnevmatikakis EA, Soudry D, Gao Y, Machado TA, Merel J, Pfau D,
    Reardon T, Mu Y, Lacefield C, Yang W, Ahrens M, Bruno R, Jessell TM,
    Peterka DS, Yuste R, Paninski L (2016), "Simultaneous denoising,
    deconvolution, and demixing of calcium imaging data", Neuron
    89(2):285–299 (noise level from the upper half of the power spectrum).
    Welch PD (1967), "The use of fast Fourier transform for the estimation
    of power spectra", IEEE Transactions on Audio and Electroacoustics
    15(2):70–73.
    Percival DB, Walden AT (1993), Spectral Analysis for Physical
    Applications, Cambridge University Press.

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal import estimate_noise
    >>> noise = np.random.default_rng(0).normal(scale=2.0, size=20000)
    >>> round(estimate_noise(noise, 30.0), 1)
    2.0
    """
    frame_rate = check_frame_rate(frame_rate)
    average = average_name(average)
    band = _check_band(band_hz, frame_rate)
    exclude = _check_exclude(exclude_hz)
    x = as_traces(trace, "trace")
    n = x.shape[-1]
    if n < MIN_FRAMES:
        raise ValueError(f"trace has {n} frame(s); estimate_noise needs at least {MIN_FRAMES}")
    missing = require_some_data(x, "trace")

    rows = x.reshape(-1, n)
    holes = missing.mask.reshape(-1, n)
    sd = np.empty(rows.shape[0])
    nperseg = min(_SEGMENT, n)
    keep = _band_bins(np.fft.rfftfreq(nperseg, 1.0 / frame_rate), band, frame_rate, nperseg, exclude)
    # One vectorised Welch over all segments of a row (a per-segment FFT loop, as a 1-D scipy.signal.welch
    # call makes, costs more than the transform itself). Row by row: a row's estimate is then the same
    # whichever rows share the call (a transform batched over several rows can differ in the last bit), its
    # windowed segments and spectra stay in the processor's cache (1.7x faster than blocks of 2**20 values
    # on 36,000-frame rows, measured), in arrays reused from row to row.
    scratch: dict = {}
    with np.errstate(over="ignore", under="ignore"):  # (rows of extreme magnitude are estimated again below)
        for i in range(rows.shape[0]):
            sd[i] = _masked_welch_level(rows[i:i + 1], holes[i:i + 1], frame_rate, nperseg, keep, average,
                                        scratch)[0]
        gappy = np.flatnonzero(missing.per_roi)
        for i in gappy[np.isnan(sd[gappy])]:
            roi = "the trace" if x.ndim == 1 else f"ROI {i}"
            sd[i] = _noise_with_gaps(rows[i], frame_rate, band, average, roi, exclude)
        sd = np.sqrt(sd * frame_rate / 2.0)
    # Power is the square of the values: beyond about 1e154 it overflows (inf), below about 1e-154 it underflows
    # and loses digits. Such rows are estimated again scaled by a power of two, which is exact, and scaled back.
    for i in np.flatnonzero(~(np.isfinite(sd) & (sd > _SMALLEST_SD))):
        sd[i] = _rescaled_estimate(rows[i], sd[i], frame_rate, band_hz, average, exclude_hz)
    return float(sd[0]) if x.ndim == 1 else sd


# Below this s.d. the squares of a trace's values lie under about 1e-300, near where they underflow.
_SMALLEST_SD = 1e-150
# Rows whose largest magnitude is beyond 2**±480 (about 1e±144) are scaled: their squares, summed over a
# segment, would come within a few powers of ten of the float64 limits (about 1e±308).
_SAFE_EXPONENT = 480


def _rescaled_estimate(row: np.ndarray, sd: float, frame_rate: float, band_hz, average: str,
                       exclude_hz=None) -> float:
    """Noise s.d. of a row of extreme magnitude, computed on the row scaled by a power of two (exact) and scaled
    back; ``sd`` (the plain estimate) is kept for rows of ordinary magnitude (a constant row: no noise)."""
    finite = np.abs(row[np.isfinite(row)])
    largest = float(finite.max()) if finite.size else 0.0
    if largest == 0.0:
        return 0.0  # a row of zeros has no noise
    exponent = int(np.frexp(largest)[1])  # largest = m 2**exponent with m in [0.5, 1)
    if abs(exponent) <= _SAFE_EXPONENT:
        return float(sd)
    scaled = estimate_noise(np.ldexp(row, -exponent), frame_rate, band_hz=band_hz, average=average,
                            exclude_hz=exclude_hz)
    return float(np.ldexp(scaled, exponent))
