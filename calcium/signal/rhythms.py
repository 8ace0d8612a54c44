"""Periodic components shared across a session: find them, show them in time and frequency, remove them.

Imaging traces pick up rhythms that are not the cells' activity: heartbeat and
breathing moving the tissue, light-source or scanner flicker, mains pickup in
the detector, the cadence of a treadmill. Sampled at a few tens of frames per
second, the fast ones alias to lower frequencies. A shared rhythm fakes small
events, hides others and biases the noise estimate (which takes the upper band
of the spectrum to be flat).

What this module offers, from description to decision:

* :func:`session_spectra` -- Welch power spectrum of every ROI (and of its
  neuropil), the session median, and the magnitude-squared coherence of each
  ROI with the session average of the other ROIs (or with its neuropil);
* :func:`spectrogram` (short-time Fourier transform) and :func:`scalogram`
  (Morlet wavelets) of one trace, each stating its time and frequency
  resolution;
* :func:`find_rhythms` -- narrow-band peaks above the aperiodic background
  that many ROIs share, each described (frequency, band, power above the
  background, share of ROIs, coherence, steadiness over the session) and
  judged in plain words;
* :func:`apparent_frequency` and :func:`physical_frequencies` -- where a
  physical rhythm appears once sampled, and which physical rhythms could be
  behind an observed peak;
* :func:`remove_rhythms` -- zero-phase notch or band-stop filters at the
  peaks (:func:`calcium.signal.design_filter`, with the span they disturb at
  the edges and around gaps), or regression of the shared component in each
  band;
* :func:`rhythm_phase` and :func:`phase_locking` -- the phase of a rhythm
  (band-pass + Hilbert transform), and how strongly spikes lock to it, with a
  surrogate test: an artefact that fakes events locks the inferred spikes to
  it until it is removed; cells that are entrained stay locked after removal.

Every function takes ``frame_rate`` in Hz and arrays (rois, frames) or
(frames,); missing frames (NaN/inf) are left out of every spectrum (a Welch
segment that holds one is dropped) and are NaN again in every output trace.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy  # submodules (signal, special, stats, ndimage) load on first use

from .._checks import as_traces, check_choice, check_frame_rate, check_int, check_positive, require_some_data
from ._bands import frequency_pairs
from ._missing import fill_gaps_linear, grow_mask, row_chunks
from .filters import ZeroPhaseFilter, design_filter

__all__ = [
    "SessionSpectra",
    "session_spectra",
    "Spectrogram",
    "spectrogram",
    "Scalogram",
    "scalogram",
    "Rhythm",
    "SessionRhythms",
    "find_rhythms",
    "apparent_frequency",
    "physical_frequencies",
    "RhythmRemoval",
    "remove_rhythms",
    "shared_component",
    "notch_edges_hz",
    "RhythmPhase",
    "rhythm_phase",
    "PhaseLocking",
    "phase_locking",
    "segment_frames",
    "SEGMENT_S",
    "N_CYCLES",
    "N_SURROGATES",
]

#: Welch segment (and spectrogram window) length, seconds: a resolution of 0.1 Hz. Measured in
#: scripts/bench_rhythms.py (10-minute sessions of 60 ROIs, 40 per amplitude, steady and drifting rhythms, aliased
#: or not): 10-s segments found every rhythm of 1-2.5 noise s.d. (100 %), 2.5-s segments 94 %, missing rhythms
#: below 1.7 Hz, which their 0.4-Hz resolution cannot tell from the calcium background (docs/benchmarks.md).
SEGMENT_S = 10.0
#: Cycles of the Morlet wavelet, f0 / sigma_f = 7: the wavelet family of Tallon-Baudry et al. (1996).
N_CYCLES = 7.0
#: Surrogates of the phase-locking test: with B = 999, (B + 1) alpha is a whole number for alpha = 0.05, 0.01 and
#: 0.001, as a Monte Carlo test needs (Davison & Hinkley 1997, ch. 4).
N_SURROGATES = 999
#: Segments of the session searched separately to say whether a rhythm holds steady.
N_BLOCKS = 6
#: Smallest Welch segment, frames.
_MIN_SEGMENT = 32
#: Mains frequencies named in the verdicts when an observed peak could be their alias (common practice).
_MAINS_HZ = (50.0, 60.0)


# ---------------------------------------------------------------------------
# Welch spectra, coherence (one pass over the segments of every ROI)
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SessionSpectra:
    """Power spectra of a session's ROIs and their coherence with a shared reference.

    Built by :func:`session_spectra` (and by :func:`find_rhythms`).

    Attributes
    ----------
    freq_hz : ndarray, shape (bins,)
        Frequencies from 0 to the Nyquist frequency ``frame_rate / 2``.
    power : ndarray, shape (rois, bins)
        One-sided power spectral density of each ROI (units² / Hz), the
        Welch average over the segments that hold no missing frame.
    median_power : ndarray, shape (bins,)
        Median of ``power`` over the ROIs.
    reference_power : ndarray, shape (bins,)
        Power spectral density of the session average (the mean of the ROIs
        at each frame).
    coherence : ndarray, shape (rois, bins)
        Magnitude-squared coherence of each ROI with its reference: the
        average of the *other* ROIs (``reference = "session average"``), or
        the ROI's own neuropil (``reference = "neuropil"``). NaN with a single
        ROI and no neuropil.
    reference : str
        "session average" or "neuropil".
    neuropil_power : ndarray, shape (rois, bins), or None
        Power spectral density of each ROI's neuropil, when given.
    block_power : ndarray, shape (blocks, rois, bins)
        ``power`` over consecutive stretches of the session (:data:`N_BLOCKS`
        of them, fewer in short sessions): how the spectrum changes in time.
    block_edges_s : ndarray, shape (blocks + 1,)
        Start of each stretch and end of the last, seconds.
    frame_rate : float
        Hz.
    segment_frames : int
        Frames per Welch segment (Hann window, half overlap).
    n_segments : ndarray of int, shape (rois,)
        Segments averaged for each ROI (those without missing frames).
    dof : float
        Equivalent degrees of freedom of a spectrum averaged over every
        segment of the session (Percival & Walden 1993, eq. 292c).
    """

    freq_hz: np.ndarray
    power: np.ndarray
    median_power: np.ndarray
    reference_power: np.ndarray
    coherence: np.ndarray
    reference: str
    neuropil_power: np.ndarray | None
    block_power: np.ndarray
    block_edges_s: np.ndarray
    frame_rate: float
    segment_frames: int
    n_segments: np.ndarray
    dof: float

    @property
    def segment_s(self) -> float:
        """Length of a Welch segment in seconds (the time over which a spectrum is resolved)."""
        return self.segment_frames / self.frame_rate

    @property
    def resolution_hz(self) -> float:
        """Spacing of the frequency bins, ``frame_rate / segment_frames``."""
        return self.frame_rate / self.segment_frames

    @property
    def bandwidth_hz(self) -> float:
        """Equivalent noise bandwidth of a bin: 1.5 bins for the Hann window (Harris 1978)."""
        return 1.5 * self.resolution_hz

    def quantile_power(self, q: float) -> np.ndarray:
        """The ``q`` quantile over ROIs of :attr:`power` at each frequency (e.g. 0.1 and 0.9 for a range)."""
        return np.nanquantile(self.power, q, axis=0)

    @property
    def median_coherence(self) -> np.ndarray:
        """Median over ROIs of :attr:`coherence` at each frequency (NaN where undefined, as at 0 Hz)."""
        defined = np.isfinite(self.coherence).any(axis=0)
        out = np.full(self.freq_hz.size, np.nan)
        out[defined] = np.nanmedian(self.coherence[:, defined], axis=0)
        return out


def _hann(n: int) -> np.ndarray:
    """The periodic Hann window of scipy.signal.welch and stft (``get_window('hann', n)``)."""
    return scipy.signal.get_window("hann", n)


def _welch_dof(n_segments) -> np.ndarray:
    """Equivalent degrees of freedom of a Welch average of Hann segments with half overlap.

    Percival & Walden (1993), eq. 292c: ν ≈ 36 K² / (19 K − 1) for K segments.
    """
    k = np.maximum(np.asarray(n_segments, dtype=np.float64), 1.0)
    return 36.0 * k ** 2 / (19.0 * k - 1.0)


def segment_frames(segment_s, frame_rate, n_frames) -> int:
    """Frames per Welch segment that :func:`session_spectra` and :func:`find_rhythms` use for a recording.

    ``segment_s`` seconds, shortened to a quarter of the recording when it is longer (at least 7 half-overlapping
    segments); a ValueError when that leaves fewer than 32 frames.
    """
    segment_s = check_positive(segment_s, "segment_s")
    frame_rate = check_frame_rate(frame_rate)
    n_frames = check_int(n_frames, "n_frames", minimum=1)
    wanted = int(round(segment_s * frame_rate))
    nperseg = min(wanted, n_frames // 4)
    if nperseg < _MIN_SEGMENT:
        raise ValueError(f"segment_s={segment_s:g} gives {wanted} frame(s) per segment at {frame_rate:g} Hz and the "
                         f"recording has {n_frames} frames; the spectra need segments of at least {_MIN_SEGMENT} "
                         f"frames and at least 4 segments' worth of frames: use a longer segment_s or a longer "
                         f"recording (at least {4 * _MIN_SEGMENT} frames)")
    return nperseg


def _segment_starts(n_frames: int, nperseg: int) -> np.ndarray:
    """First frame of each Welch segment (half overlap; a trailing partial segment is dropped, as scipy does)."""
    step = nperseg - nperseg // 2
    return np.arange((n_frames - nperseg) // step + 1) * step


def _density_scale(frame_rate: float, nperseg: int) -> np.ndarray:
    """Per bin: |X|² -> one-sided density, as scipy.signal.welch (DC and an even Nyquist bin not doubled)."""
    scale = np.full(nperseg // 2 + 1, 2.0 / (frame_rate * np.sum(_hann(nperseg) ** 2)))
    scale[0] /= 2.0
    if nperseg % 2 == 0:
        scale[-1] /= 2.0
    return scale


def _usable_segments(missing: np.ndarray, starts: np.ndarray, nperseg: int) -> np.ndarray:
    """(rows, segments): True where a segment holds no missing frame."""
    before = np.zeros((missing.shape[0], missing.shape[1] + 1), np.int64)
    np.cumsum(missing, axis=-1, out=before[:, 1:])
    return (before[:, starts + nperseg] - before[:, starts]) == 0


def _segment_spectra(rows: np.ndarray, missing: np.ndarray, starts: np.ndarray, nperseg: int):
    """Fourier transforms of the Hann-windowed, mean-removed segments of each row: (rows, segments, bins), and
    the (rows, segments) mask of the segments without missing frames (their transform is set to 0)."""
    usable = _usable_segments(missing, starts, nperseg)
    step = starts[1] - starts[0] if starts.size > 1 else nperseg
    if missing.any():
        rows = np.where(missing, 0.0, rows)
    segments = np.lib.stride_tricks.sliding_window_view(rows, nperseg, axis=-1)[:, ::step][:, :starts.size]
    # (segment means removed, as scipy.signal.welch's detrend='constant' does)
    windowed = (segments - segments.mean(axis=-1, keepdims=True)) * _hann(nperseg)
    spectra = np.fft.rfft(windowed, axis=-1)
    spectra[~usable] = 0.0
    return spectra, usable


def _session_average(x: np.ndarray, missing: np.ndarray) -> np.ndarray:
    """Mean of the ROIs at each frame over the ROIs present there (NaN where no ROI is)."""
    present = (~missing).sum(axis=0)
    total = np.where(missing, 0.0, x).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(present > 0, total / np.maximum(present, 1), np.nan)


def _blocks(n_segments: int) -> np.ndarray:
    """Segment index where each block starts, and the end: at most N_BLOCKS blocks of at least 4 segments."""
    n_blocks = max(1, min(N_BLOCKS, n_segments // 4))
    return np.linspace(0, n_segments, n_blocks + 1).round().astype(np.int64)


def _spectral_pass(x: np.ndarray, missing: np.ndarray, frame_rate: float, nperseg: int, neuropil=None,
                   neuropil_missing=None) -> SessionSpectra:
    """Every spectrum of :class:`SessionSpectra` from one Fourier transform of each segment of each ROI."""
    n_rois, n_frames = x.shape
    starts = _segment_starts(n_frames, nperseg)
    bounds = _blocks(starts.size)
    n_blocks = bounds.size - 1
    scale = _density_scale(frame_rate, nperseg)
    n_bins = scale.size
    average = _session_average(x, missing)
    avg_spectra, avg_usable = _segment_spectra(average[None, :], ~np.isfinite(average)[None, :], starts, nperseg)
    avg_spectra, avg_usable = avg_spectra[0], avg_usable[0]
    avg_power = np.abs(avg_spectra) ** 2                                   # (segments, bins)

    power = np.zeros((n_rois, n_bins))
    block_power = np.zeros((n_blocks, n_rois, n_bins))
    cross = np.zeros((n_rois, n_bins), np.complex128)
    ref_power = np.zeros((n_rois, n_bins))
    n_used = np.zeros(n_rois, np.int64)
    neuropil_power = None if neuropil is None else np.zeros((n_rois, n_bins))
    for rows in row_chunks(n_rois, starts.size * nperseg, elements=1 << 21):
        spectra, usable = _segment_spectra(x[rows], missing[rows], starts, nperseg)
        if neuropil is None:
            usable &= avg_usable
        else:
            ref_spectra, ref_usable = _segment_spectra(neuropil[rows], neuropil_missing[rows], starts, nperseg)
            ref_sq = ref_spectra.real ** 2 + ref_spectra.imag ** 2
            neuropil_power[rows] = ref_sq.sum(axis=1) * scale / np.maximum(ref_usable.sum(axis=1), 1)[:, None]
            usable &= ref_usable
            ref_spectra[~usable] = 0.0
            ref_power[rows] = np.where(usable[..., None], ref_sq, 0.0).sum(axis=1)
        spectra[~usable] = 0.0
        sq = spectra.real ** 2 + spectra.imag ** 2                          # (rows, segments, bins)
        n_used[rows] = usable.sum(axis=1)
        power[rows] = sq.sum(axis=1)
        for b in range(n_blocks):
            part = usable[:, bounds[b]:bounds[b + 1]].sum(axis=1)
            values = sq[:, bounds[b]:bounds[b + 1]].sum(axis=1) / np.maximum(part, 1)[:, None]
            values[part == 0] = np.nan
            block_power[b, rows] = values
        if neuropil is not None:
            cross[rows] = np.einsum("rsb,rsb->rb", np.conj(spectra), ref_spectra)
        elif n_rois > 1:
            # the average of the other ROIs, A_i = (N A - X_i) / (N - 1), from the sums with the whole average
            with_avg = np.einsum("rsb,sb->rb", np.conj(spectra), avg_spectra)
            avg_sq = usable.astype(np.float64) @ avg_power
            cross[rows] = (n_rois * with_avg - power[rows]) / (n_rois - 1)
            ref_power[rows] = (n_rois ** 2 * avg_sq - 2 * n_rois * with_avg.real + power[rows]) / (n_rois - 1) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        coherence = np.abs(cross) ** 2 / (power * ref_power)
    if neuropil is None and n_rois == 1:
        coherence[:] = np.nan
    coherence[:, 0] = np.nan                    # (DC: the segment means were removed)
    power *= scale / np.maximum(n_used, 1)[:, None]
    power[n_used == 0] = np.nan
    block_power *= scale
    reference_power = avg_power[avg_usable].mean(axis=0) * scale if avg_usable.any() else np.full(n_bins, np.nan)
    edges_s = np.append(starts[bounds[:-1]], starts[bounds[-1] - 1] + nperseg) / frame_rate
    return SessionSpectra(freq_hz=np.fft.rfftfreq(nperseg, 1.0 / frame_rate), power=power,
                          median_power=np.nanmedian(power, axis=0), reference_power=reference_power,
                          coherence=coherence, reference="session average" if neuropil is None else "neuropil",
                          neuropil_power=neuropil_power, block_power=block_power, block_edges_s=edges_s,
                          frame_rate=frame_rate, segment_frames=nperseg, n_segments=n_used,
                          dof=float(_welch_dof(starts.size)))


def _neuropil_rows(neuropil, shape, name="neuropil"):
    """``neuropil`` as (rois, frames) float64 of ``shape`` with its missing mask (None, None when not given)."""
    if neuropil is None:
        return None, None
    arr = as_traces(neuropil, name)
    arr = arr.reshape(-1, arr.shape[-1])
    if arr.shape != shape:
        raise ValueError(f"{name} must have the shape of the traces, {shape} (one neuropil trace per ROI), got "
                         f"{arr.shape}")
    return arr, require_some_data(arr, name).mask


def session_spectra(traces, frame_rate, *, segment_s=SEGMENT_S, neuropil=None) -> SessionSpectra:
    """Welch spectra of every ROI, their median, and their coherence with the session (or the neuropil).

    Parameters
    ----------
    traces : array_like, shape (rois, frames) or (frames,)
        ΔF/F (or any traces); NaN/inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    segment_s : float, optional
        Welch segment length in seconds (default :data:`SEGMENT_S`); the
        frequency resolution is ``1 / segment_s``. Shortened when the
        recording holds fewer than 4 segments.
    neuropil : array_like, shape like ``traces``, optional
        The neuropil trace of each ROI (from :func:`calcium.extract_traces`):
        its spectrum is returned too, and each ROI's coherence is taken with
        its own neuropil instead of the session average.

    Returns
    -------
    SessionSpectra

    Notes
    -----
    The spectra are Welch averages (Welch 1967) exactly as
    :func:`scipy.signal.welch` computes them (periodic Hann window,
    ``segment_frames`` per segment, half overlap, segment means removed,
    one-sided density), over the segments that hold no missing frame. The
    magnitude-squared coherence (Carter 1987; Bendat & Piersol 2010, ch. 9)
    of a ROI x with its reference r is

        C(f) = |S_xr(f)|² / (S_xx(f) S_rr(f)),

    the cross- and auto-spectra averaged over the same segments, as
    :func:`scipy.signal.coherence` does. The session reference of ROI i is
    the average of the *other* N − 1 ROIs, (N·A − x_i) / (N − 1) with A the
    average of all N, so that a ROI's own noise does not make it coherent
    with the reference; its spectra follow from those of x_i and A without
    another transform. C is invariant to a fixed phase shift between a ROI
    and its reference, so a rhythm that reaches the ROIs with different
    phases (a scanned artefact, motion in different directions) is still
    coherent. With missing frames the average at a frame is taken over the
    ROIs present there, and the leave-one-out formula is then approximate.

    Under independence, with K segments, P(C > c) = (1 − c)^(K − 1)
    (Carter 1987), so C rarely exceeds a few times 1/K by chance.

    References
    ----------
    Welch PD (1967), "The use of fast Fourier transform for the estimation
    of power spectra", IEEE Trans. Audio Electroacoust. 15(2):70–73.
    Carter GC (1987), "Coherence and time delay estimation", Proc. IEEE
    75(2):236–255.
    Bendat JS, Piersol AG (2010), Random Data: Analysis and Measurement
    Procedures, 4th ed., Wiley.
    Percival DB, Walden AT (1993), Spectral Analysis for Physical
    Applications, Cambridge University Press.
    Harris FJ (1978), "On the use of windows for harmonic analysis with the
    discrete Fourier transform", Proc. IEEE 66(1):51–83.

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal.rhythms import session_spectra
    >>> rng = np.random.default_rng(0)
    >>> t = np.arange(9000) / 30.0
    >>> x = rng.normal(size=(20, t.size)) + np.sin(2 * np.pi * 7.0 * t)
    >>> spectra = session_spectra(x, 30.0)
    >>> float(spectra.freq_hz[np.argmax(spectra.median_power)])
    7.0
    >>> bool(np.median(spectra.coherence[:, 70]) > 0.9)
    True
    """
    frame_rate = check_frame_rate(frame_rate)
    x = as_traces(traces, "traces")
    x = x.reshape(-1, x.shape[-1])
    missing = require_some_data(x, "traces").mask
    nperseg = segment_frames(segment_s, frame_rate, x.shape[-1])
    neuropil, neuropil_missing = _neuropil_rows(neuropil, x.shape)
    return _spectral_pass(x, missing, frame_rate, nperseg, neuropil, neuropil_missing)


# ---------------------------------------------------------------------------
# time and frequency: short-time Fourier transform and Morlet scalogram
# ---------------------------------------------------------------------------
def _one_trace(trace, name: str = "trace") -> tuple[np.ndarray, np.ndarray]:
    """A 1-D trace as float64 and its missing mask (refused when every frame is missing)."""
    x = as_traces(trace, name)
    if x.ndim != 1:
        raise ValueError(f"{name} must be one trace, shape (frames,), got shape {x.shape}; pass one row (for the "
                         f"session average: the mean of the ROIs at each frame)")
    return x, require_some_data(x, name).mask


@dataclass(frozen=True, eq=False)
class Spectrogram:
    """Result of :func:`spectrogram`: power spectral density over time.

    Attributes
    ----------
    time_s : ndarray, shape (windows,)
        Centre of each window, seconds from the first frame.
    freq_hz : ndarray, shape (bins,)
    power : ndarray, shape (bins, windows)
        One-sided power spectral density in each window (units² / Hz); NaN
        for a window that holds a missing frame.
    window_s : float
        Length of a window: the time resolution.
    step_s : float
        Time between the centres of consecutive windows.
    resolution_hz : float
        Spacing of the frequency bins, ``1 / window_s``.
    bandwidth_hz : float
        Equivalent noise bandwidth of a bin, 1.5 bins for the Hann window
        (Harris 1978): the frequency resolution.
    frame_rate : float
    """

    time_s: np.ndarray
    freq_hz: np.ndarray
    power: np.ndarray
    window_s: float
    step_s: float
    resolution_hz: float
    bandwidth_hz: float
    frame_rate: float

    def describe(self) -> str:
        """One line: the time and frequency resolution."""
        return (f"short-time Fourier transform: Hann windows of {self.window_s:.3g} s every {self.step_s:.3g} s; "
                f"resolution {self.window_s:.3g} s in time, {self.bandwidth_hz:.3g} Hz in frequency (bins every "
                f"{self.resolution_hz:.3g} Hz)")


def spectrogram(trace, frame_rate, *, window_s=SEGMENT_S, overlap=0.5) -> Spectrogram:
    """Power spectral density of one trace in consecutive windows (short-time Fourier transform).

    Parameters
    ----------
    trace : array_like, shape (frames,)
        One trace (a ROI, or the session average); NaN/inf mark missing
        frames.
    frame_rate : float
        Frames per second (Hz).
    window_s : float, optional
        Window length in seconds (default :data:`SEGMENT_S`, the segment of
        the session spectra, so that a peak they resolve is resolved here).
    overlap : float, optional
        Fraction of a window shared with the next, in [0, 1).

    Returns
    -------
    Spectrogram

    Notes
    -----
    Each window of N = ``window_s · frame_rate`` frames is multiplied by a
    periodic Hann window w and transformed (Gabor 1946; Allen 1977):
    X_m(f) = Σ_n w[n] x[n + mR] e^(−2πi f n / fs), R the step. The density
    is 2|X_m(f)|² / (fs Σ w²) (not doubled at DC and at an even Nyquist
    bin), so that its integral over frequency is the variance of the
    windowed trace, as in :func:`scipy.signal.welch`; it is
    :func:`scipy.signal.stft` (``boundary=None, padded=False``) rescaled.
    Time and frequency resolution trade against each other: the window
    resolves ``window_s`` in time and 1.5 / ``window_s`` Hz in frequency.

    References
    ----------
    Gabor D (1946), "Theory of communication", J. IEE 93(26):429–457.
    Allen JB (1977), "Short term spectral analysis, synthesis, and
    modification by discrete Fourier transform", IEEE Trans. Acoust. Speech
    Signal Process. 25(3):235–238.
    Harris FJ (1978), Proc. IEEE 66(1):51–83 (the Hann window's bandwidth).
    """
    frame_rate = check_frame_rate(frame_rate)
    x, missing = _one_trace(trace)
    window_s = check_positive(window_s, "window_s")
    if not (isinstance(overlap, (int, float)) and not isinstance(overlap, bool) and 0.0 <= overlap < 1.0):
        raise ValueError(f"overlap must be a fraction in [0, 1), got {overlap!r}")
    nperseg = int(round(window_s * frame_rate))
    if not (4 <= nperseg <= x.size):
        raise ValueError(f"window_s={window_s:g} s is {nperseg} frame(s) at {frame_rate:g} Hz; it must hold at least "
                         f"4 frames and at most the {x.size} frames of the trace")
    step = max(1, nperseg - int(round(overlap * nperseg)))
    starts = np.arange(0, x.size - nperseg + 1, step)
    segments = np.lib.stride_tricks.sliding_window_view(np.where(missing, 0.0, x), nperseg)[starts]
    spectra = np.fft.rfft(segments * _hann(nperseg), axis=-1)
    power = (spectra.real ** 2 + spectra.imag ** 2) * _density_scale(frame_rate, nperseg)
    power[~_usable_segments(missing[None, :], starts, nperseg)[0]] = np.nan
    return Spectrogram(time_s=(starts + nperseg / 2.0) / frame_rate, freq_hz=np.fft.rfftfreq(nperseg, 1 / frame_rate),
                       power=power.T.copy(), window_s=nperseg / frame_rate, step_s=step / frame_rate,
                       resolution_hz=frame_rate / nperseg, bandwidth_hz=1.5 * frame_rate / nperseg,
                       frame_rate=frame_rate)


@dataclass(frozen=True, eq=False)
class Scalogram:
    """Result of :func:`scalogram`: the amplitude of one trace at each frequency and time (Morlet wavelets).

    Attributes
    ----------
    time_s : ndarray, shape (frames,)
        Frame times, k / frame_rate.
    freq_hz : ndarray, shape (freqs,)
        Centre frequencies of the wavelets.
    amplitude : ndarray, shape (freqs, frames)
        |W(f, t)|: a sinusoid of amplitude a at frequency f gives a (in the
        units of the trace); NaN at missing frames.
    phase : ndarray, shape (freqs, frames)
        Phase of W(f, t), radians (0 at the crests of a cosine).
    reliable : ndarray of bool, shape (freqs, frames)
        False within the cone of influence: within ``edge_s`` of either end
        or of a missing frame.
    n_cycles : float
        Cycles of each wavelet, f / σ_f.
    time_resolution_s : ndarray, shape (freqs,)
        σ_t = n_cycles / (2π f): standard deviation of each wavelet's
        Gaussian envelope.
    frequency_resolution_hz : ndarray, shape (freqs,)
        σ_f = f / n_cycles = 1 / (2π σ_t): standard deviation of each
        wavelet's Gaussian spectrum.
    edge_s : ndarray, shape (freqs,)
        √2 σ_t: the e-folding time of the wavelet power, the half-width of
        the cone of influence (Torrence & Compo 1998).
    frame_rate : float
    """

    time_s: np.ndarray
    freq_hz: np.ndarray
    amplitude: np.ndarray
    phase: np.ndarray
    reliable: np.ndarray
    n_cycles: float
    time_resolution_s: np.ndarray
    frequency_resolution_hz: np.ndarray
    edge_s: np.ndarray
    frame_rate: float

    def describe(self) -> str:
        """One line: the wavelets and their resolution at the ends of the frequency range."""
        lo, hi = 0, self.freq_hz.size - 1
        return (f"Morlet wavelets of {self.n_cycles:g} cycles: at {self.freq_hz[lo]:.3g} Hz they resolve "
                f"{self.time_resolution_s[lo]:.3g} s and {self.frequency_resolution_hz[lo]:.3g} Hz (s.d.), at "
                f"{self.freq_hz[hi]:.3g} Hz {self.time_resolution_s[hi]:.3g} s and "
                f"{self.frequency_resolution_hz[hi]:.3g} Hz")


def _default_wavelet_frequencies(n_frames: int, frame_rate: float, n_cycles: float) -> np.ndarray:
    """Eight frequencies per octave, from the lowest whose wavelet (±3 σ_t) fits in a quarter of the trace to
    0.9 × Nyquist (the wavelet's σ_f = f/7 spans 0.2 octaves, so 1/8-octave steps sample it densely)."""
    duration = n_frames / frame_rate
    lowest = max(6.0 * n_cycles / (2 * np.pi * duration / 4.0), 2.0 * frame_rate / n_frames)
    highest = 0.9 * frame_rate / 2.0
    if lowest >= highest:
        raise ValueError(f"the trace ({n_frames} frames, {duration:.3g} s) is too short for wavelets of {n_cycles:g} "
                         f"cycles; use fewer n_cycles or a longer trace")
    return lowest * 2.0 ** (np.arange(int(np.floor(8 * np.log2(highest / lowest))) + 1) / 8.0)


def scalogram(trace, frame_rate, *, freq_hz=None, n_cycles=N_CYCLES) -> Scalogram:
    """Amplitude and phase of one trace at each frequency and time, with Morlet wavelets.

    Parameters
    ----------
    trace : array_like, shape (frames,)
        One trace (a ROI, or the session average); NaN/inf mark missing
        frames.
    frame_rate : float
        Frames per second (Hz).
    freq_hz : array_like, optional
        Centre frequencies (Hz), each in (0, frame_rate / 2). Default: eight
        per octave from the lowest frequency whose wavelet fits in a quarter
        of the trace to 0.9 × the Nyquist frequency.
    n_cycles : float, optional
        f / σ_f of every wavelet (default 7, :data:`N_CYCLES`: Tallon-Baudry
        et al. 1996). More cycles resolve frequency better and time worse.

    Returns
    -------
    Scalogram

    Notes
    -----
    The Morlet wavelet at frequency f is a complex sinusoid under a Gaussian
    envelope (Morlet et al. 1982; Torrence & Compo 1998),

        ψ_f(t) ∝ exp(2πi f t) exp(−t² / (2 σ_t²)),   σ_t = n / (2π f),

    whose spectrum is a Gaussian of standard deviation σ_f = 1 / (2π σ_t) =
    f / n around f (Tallon-Baudry et al. 1996): time and frequency
    resolution are tied by σ_t σ_f = 1 / (2π) (Gabor 1946). The transform is
    computed as Torrence & Compo (1998) do, by multiplying the trace's
    Fourier transform by the wavelet's, here 2 exp(−(ν − f)² / (2σ_f²)) for
    ν > 0 and 0 for ν < 0, so that a sinusoid of amplitude a at f gives
    |W| = a. The trace is zero-padded beyond 5 σ_t of the longest wavelet
    (no wrap-around); missing frames are linearly interpolated for the
    transform only and are NaN again in ``amplitude`` and ``phase``. Within
    √2 σ_t of an end or of a missing frame (the cone of influence, where
    the wavelet power has not fallen by e, Torrence & Compo 1998) the values
    are marked unreliable.

    References
    ----------
    Torrence C, Compo GP (1998), "A practical guide to wavelet analysis",
    Bull. Am. Meteorol. Soc. 79(1):61–78.
    Tallon-Baudry C, Bertrand O, Delpuech C, Pernier J (1996), "Stimulus
    specificity of phase-locked and non-phase-locked 40 Hz visual responses
    in human", J. Neurosci. 16(13):4240–4249.
    Morlet J, Arens G, Fourgeau E, Giard D (1982), "Wave propagation and
    sampling theory", Geophysics 47(2):203–221.
    Gabor D (1946), "Theory of communication", J. IEE 93(26):429–457.

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal.rhythms import scalogram
    >>> t = np.arange(3000) / 30.0
    >>> result = scalogram(2.0 * np.cos(2 * np.pi * 5.0 * t), 30.0, freq_hz=[5.0])
    >>> round(float(np.median(result.amplitude[0][result.reliable[0]])), 3)
    2.0
    """
    frame_rate = check_frame_rate(frame_rate)
    x, missing = _one_trace(trace)
    n_cycles = check_positive(n_cycles, "n_cycles")
    nyquist = frame_rate / 2.0
    if freq_hz is None:
        freq = _default_wavelet_frequencies(x.size, frame_rate, n_cycles)
    else:
        freq = np.atleast_1d(np.asarray(freq_hz, dtype=np.float64))
        if freq.ndim != 1 or freq.size == 0 or not np.all((freq > 0) & (freq < nyquist)):
            raise ValueError(f"freq_hz must hold frequencies in (0, {nyquist:g}) Hz (below the Nyquist frequency "
                             f"frame_rate/2), got {freq_hz!r}")
    sigma_t = n_cycles / (2 * np.pi * freq)
    sigma_f = freq / n_cycles
    filled = fill_gaps_linear(x, missing) if missing.any() else x
    pad = int(np.ceil(5.0 * sigma_t.max() * frame_rate))
    length = scipy.fft.next_fast_len(x.size + 2 * pad)
    spectrum = np.fft.fft(filled - filled.mean(), length)
    nu = np.fft.fftfreq(length, 1.0 / frame_rate)
    amplitude = np.empty((freq.size, x.size))
    phase = np.empty((freq.size, x.size))
    reliable = np.empty((freq.size, x.size), dtype=bool)
    edge_s = np.sqrt(2.0) * sigma_t
    for k in range(freq.size):
        gain = np.where(nu > 0, 2.0 * np.exp(-0.5 * ((nu - freq[k]) / sigma_f[k]) ** 2), 0.0)
        values = np.fft.ifft(spectrum * gain)[:x.size]
        amplitude[k] = np.abs(values)
        phase[k] = np.angle(values)
        reach = int(np.ceil(edge_s[k] * frame_rate))
        unreliable = grow_mask(missing, reach)
        unreliable[:reach] = True
        unreliable[max(x.size - reach, 0):] = True
        reliable[k] = ~unreliable
    amplitude[:, missing] = np.nan
    phase[:, missing] = np.nan
    return Scalogram(time_s=np.arange(x.size) / frame_rate, freq_hz=freq, amplitude=amplitude, phase=phase,
                     reliable=reliable, n_cycles=n_cycles, time_resolution_s=sigma_t,
                     frequency_resolution_hz=sigma_f, edge_s=edge_s, frame_rate=frame_rate)


# ---------------------------------------------------------------------------
# aliasing
# ---------------------------------------------------------------------------
def _frequencies(values, name: str) -> np.ndarray:
    arr = np.asarray(values, dtype=np.float64)
    if arr.size == 0 or not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise ValueError(f"{name} must hold finite frequencies >= 0 in Hz, got {values!r}")
    return arr


def apparent_frequency(physical_hz, frame_rate):
    """Where a rhythm of ``physical_hz`` appears once sampled at ``frame_rate`` (its alias in [0, Nyquist]).

    Parameters
    ----------
    physical_hz : float or array_like
        Frequency of the rhythm (Hz), e.g. a heart rate or the mains.
    frame_rate : float
        Frames per second (Hz).

    Returns
    -------
    float or ndarray
        | f − fs · round(f / fs) |, between 0 and fs / 2.

    Notes
    -----
    Sampling at fs cannot tell f from f + k·fs or from k·fs − f (k whole):
    their samples are the same (Oppenheim & Schafer 2010, sec. 4.2). A
    rhythm above the Nyquist frequency fs / 2 therefore appears at the one
    frequency of that family between 0 and fs / 2.

    References
    ----------
    Oppenheim AV, Schafer RW (2010), Discrete-Time Signal Processing, 3rd
    ed., Prentice Hall.

    Examples
    --------
    >>> from calcium.signal.rhythms import apparent_frequency
    >>> apparent_frequency(50.0, 30.0)     # mains at 30 frames/s
    10.0
    >>> apparent_frequency(7.5, 15.0)      # exactly at Nyquist
    7.5
    """
    frame_rate = check_frame_rate(frame_rate)
    f = _frequencies(physical_hz, "physical_hz")
    out = np.abs(f - frame_rate * np.round(f / frame_rate))
    return float(out) if np.ndim(physical_hz) == 0 else out


def physical_frequencies(observed_hz, frame_rate, *, up_to_hz=None) -> np.ndarray:
    """Physical frequencies that would appear at ``observed_hz`` when sampled at ``frame_rate``.

    Parameters
    ----------
    observed_hz : float
        Frequency of a peak in the spectrum, between 0 and ``frame_rate / 2``.
    frame_rate : float
        Frames per second (Hz).
    up_to_hz : float, optional
        Highest candidate returned (default ``5 · frame_rate``).

    Returns
    -------
    ndarray
        Sorted candidates k·fs ± f (k = 0, 1, ...) up to ``up_to_hz``, the
        observed frequency itself first among them.

    Notes
    -----
    The inverse of :func:`apparent_frequency` (Oppenheim & Schafer 2010,
    sec. 4.2): every member of the family is as likely from the samples
    alone; knowing the source (a heart rate, the mains, a scanner's line
    rate) picks one.

    Examples
    --------
    >>> from calcium.signal.rhythms import physical_frequencies
    >>> physical_frequencies(10.0, 30.0, up_to_hz=75.0).tolist()
    [10.0, 20.0, 40.0, 50.0, 70.0]
    """
    frame_rate = check_frame_rate(frame_rate)
    observed = float(_frequencies(observed_hz, "observed_hz"))
    if observed > frame_rate / 2.0 * (1 + 1e-12):
        raise ValueError(f"observed_hz={observed:g} is above the Nyquist frequency {frame_rate / 2:g} Hz (frame_rate/2):"
                         f" a sampled spectrum holds no such frequency; give a frequency read from the spectrum")
    top = 5.0 * frame_rate if up_to_hz is None else check_positive(up_to_hz, "up_to_hz")
    k = np.arange(int(np.ceil(top / frame_rate)) + 2)
    candidates = np.concatenate([k * frame_rate + observed, k[1:] * frame_rate - observed])
    return np.unique(np.round(candidates[(candidates >= 0) & (candidates <= top)], 12))


# ---------------------------------------------------------------------------
# detection of shared narrow-band peaks
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Rhythm:
    """One periodic component shared by ROIs of a session (an item of :attr:`SessionRhythms.rhythms`).

    Attributes
    ----------
    frequency_hz : float
        Where its peak is (interpolated between bins).
    band_hz : (float, float)
        The band it occupies: where its power above the background exceeds
        half the peak's, widened by one bin on each side. The band removed
        and left out of the noise.
    power_ratio : float
        Power over the aperiodic background at the peak, in the ROIs that
        share it most (the quantile ``1 − min_share`` over ROIs).
    z : float
        How far that ratio stands above the ratios of the other frequencies,
        in robust standard deviations.
    share : float
        Fraction of the ROIs in which the peak is significant on its own.
    amplitude : float
        Median, over those ROIs, of the amplitude of a sinusoid with the
        peak's power above the background (units of the traces: ΔF/F).
    amplitude_to_noise : float
        Median, over those ROIs, of that amplitude over the ROI's noise s.d.
    roi_amplitude : ndarray, shape (rois,)
        That amplitude for every ROI (0 where nothing stands above the
        background).
    roi_significant : ndarray of bool, shape (rois,)
        The ROIs in which the peak is significant on its own.
    coherence : float
        Median over ROIs of the magnitude-squared coherence at the peak with
        the reference of :class:`SessionSpectra` (the other ROIs' average, or
        the neuropil).
    coherence_null : float
        Coherence that independent traces exceed with probability 0.01
        (Carter 1987), for comparison.
    present : ndarray of bool, shape (blocks,)
        Whether the peak stands out in each stretch of the session
        (:attr:`SessionSpectra.block_edges_s`).
    block_frequency_hz : ndarray, shape (blocks,)
        Its frequency in each stretch (NaN where absent).
    stability : str
        "steady", "drifting" (present throughout, its frequency moving by
        more than two bins), "intermittent" (absent from some stretches) or
        "too weak to follow in time".
    harmonic_of : float or None
        The frequency of a stronger rhythm of which this is a harmonic (its
        k-th multiple, aliased), if any.
    physical_hz : ndarray
        Candidate physical frequencies up to 5 × the frame rate
        (:func:`physical_frequencies`).
    verdict : str
        All of the above in plain words, with what to do.
    """

    frequency_hz: float
    band_hz: tuple[float, float]
    power_ratio: float
    z: float
    share: float
    amplitude: float
    amplitude_to_noise: float
    roi_amplitude: np.ndarray
    roi_significant: np.ndarray
    coherence: float
    coherence_null: float
    present: np.ndarray
    block_frequency_hz: np.ndarray
    stability: str
    harmonic_of: float | None
    physical_hz: np.ndarray
    verdict: str

    @property
    def bandwidth_hz(self) -> float:
        """Width of :attr:`band_hz`."""
        return self.band_hz[1] - self.band_hz[0]

    @property
    def coherent(self) -> bool:
        """True when the ROIs follow the rhythm in a fixed phase relation with their reference."""
        return bool(self.coherence > self.coherence_null)


@dataclass(frozen=True, eq=False)
class SessionRhythms:
    """Result of :func:`find_rhythms`.

    Attributes
    ----------
    rhythms : tuple of Rhythm
        The shared peaks found, strongest first.
    spectra : SessionSpectra
        The spectra they were found in.
    background : ndarray, shape (rois, bins)
        The aperiodic background of each ROI's spectrum (units² / Hz).
    statistic : ndarray, shape (bins,)
        Power over background in the ROIs that share a peak most (the
        quantile ``1 − min_share`` over ROIs of power / background).
    threshold : ndarray, shape (bins,)
        The value of ``statistic`` a peak had to exceed (NaN outside the
        searched frequencies).
    noise_sd : ndarray, shape (rois,)
        Each ROI's noise s.d. from the flat upper band of its spectrum
        (``frame_rate / 4`` to ``frame_rate / 2``), the peaks left out.
    min_share, false_alarm, lowest_hz : float
        The settings of the search.
    """

    rhythms: tuple
    spectra: SessionSpectra
    background: np.ndarray
    statistic: np.ndarray
    threshold: np.ndarray
    noise_sd: np.ndarray
    min_share: float
    false_alarm: float
    lowest_hz: float

    @property
    def bands_hz(self) -> list[tuple[float, float]]:
        """The band of every rhythm, for :func:`remove_rhythms` and ``estimate_noise(exclude_hz=...)``."""
        return [r.band_hz for r in self.rhythms]

    @property
    def median_background(self) -> np.ndarray:
        """Median over ROIs of :attr:`background`."""
        return np.nanmedian(self.background, axis=0)

    def summary(self) -> str:
        """The verdicts, one paragraph per rhythm (or a line saying none was found)."""
        spectra = self.spectra
        head = (f"{spectra.power.shape[0]} ROIs, spectra of {spectra.segment_s:.3g}-s segments (resolution "
                f"{spectra.resolution_hz:.3g} Hz) from {self.lowest_hz:.3g} to {spectra.frame_rate / 2:.3g} Hz, "
                f"peaks shared by at least {self.min_share:.0%} of the ROIs at a false-alarm rate of "
                f"{self.false_alarm:g} per session")
        if not self.rhythms:
            return head + ":\nno shared rhythm found."
        return head + f":\n{len(self.rhythms)} shared rhythm(s).\n" + "\n".join(
            f"- {r.verdict}" for r in self.rhythms)


def _median_bias(dof: float) -> float:
    """Median of χ²_ν / ν: what a running median of Welch values reads for a level of 1."""
    return float(2.0 * scipy.special.gammaincinv(dof / 2.0, 0.5) / dof)


def _background(power: np.ndarray, resolution_hz: float, dof: float) -> np.ndarray:
    """Aperiodic background of each row: a running median over ±1 Hz (±0.8 f below 1.25 Hz, at least ±2 bins),
    divided by the median of χ²_ν/ν so that it estimates the mean level."""
    half = max(2, int(round(_BACKGROUND_HALF_WIDTH_HZ / resolution_hz)))
    # (mode 'mirror': the spectrum of a real trace is even about 0 and about the Nyquist frequency)
    smooth = scipy.ndimage.median_filter(power, size=(1, 2 * half + 1), mode="mirror")
    # Near 0 Hz a window reaching across 0 would read the spectrum's maximum at 0 Hz on both sides: the window
    # shrinks so that it ends short of 0 Hz, keeping its centre.
    for k in range(1, min(half, power.shape[1])):
        reach = max(min(int(0.8 * k), half), 1)
        smooth[:, k] = np.median(power[:, k - reach:k + reach + 1], axis=1)
    return smooth / _median_bias(dof)


def _lowest_searched(resolution_hz: float) -> float:
    """Below this frequency the background window holds fewer than ±2 bins: no search there."""
    return 3.0 * resolution_hz / 0.8


def _interpolated_peak(values: np.ndarray, k: int, freq: np.ndarray) -> float:
    """Frequency of the peak at bin k, refined by a parabola through the log values of bins k-1, k, k+1."""
    if 0 < k < values.size - 1 and np.all(values[k - 1:k + 2] > 0):
        a, b, c = np.log(values[k - 1:k + 2])
        denominator = a - 2 * b + c
        if denominator < 0:
            return float(freq[k] + 0.5 * (a - c) / denominator * (freq[1] - freq[0]))
    return float(freq[k])


def _check_fraction(value, name: str, *, low=0.0, high=1.0) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.floating)) or not (low < value < high):
        raise ValueError(f"{name} must be a number strictly between {low:g} and {high:g}, got {value!r}")
    return float(value)


def find_rhythms(traces, frame_rate, *, segment_s=SEGMENT_S, min_share=0.25, false_alarm=0.01, lowest_hz=0.5,
                 neuropil=None) -> SessionRhythms:
    """Narrow-band peaks above the aperiodic background that many ROIs of a session share.

    Parameters
    ----------
    traces : array_like, shape (rois, frames)
        ΔF/F of the session's ROIs (all of them, or an even sample);
        NaN/inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    segment_s : float, optional
        Welch segment length, seconds (default :data:`SEGMENT_S`).
    min_share : float, optional
        Smallest fraction of the ROIs a peak must stand out in (default
        0.25: a quarter of the field).
    false_alarm : float, optional
        Probability that a session without any shared rhythm shows one
        (default 0.01).
    lowest_hz : float, optional
        Lowest frequency searched (default 0.5 Hz; it is raised to the
        background window's half-width when that is larger).
    neuropil : array_like, shape like ``traces``, optional
        Each ROI's neuropil trace: the coherence is then taken with it (see
        :func:`session_spectra`).

    Returns
    -------
    SessionRhythms

    Notes
    -----
    1. Spectra: :func:`session_spectra`.
    2. Background: each ROI's aperiodic background B_i(f) is the running
       median of its spectrum over ±1 Hz (at least ±2 bins), divided by the
       median of χ²_ν/ν so that it estimates the mean level (ν the
       equivalent degrees of freedom, Percival & Walden 1993). A running
       median ignores a peak narrower than half its window, and for a
       background that falls monotonically (calcium transients, coloured
       noise) it is unbiased whatever the curvature.
    3. Statistic: r_i(f) = P_i(f) / B_i(f), and s(f) its quantile
       1 − ``min_share`` over ROIs: s(f) stands above 1 only where at least
       ``min_share`` of the ROIs have a peak.
    4. Threshold: s(f) is compared with its own spread over the searched
       frequencies, robustly (median and 1.4826 × median absolute
       deviation), which takes in the correlations between ROIs and the
       errors of the background. A frequency is retained when s(f) exceeds
       median + z × spread, z the normal quantile of ``false_alarm``
       divided by the number of frequencies searched (Bonferroni), and when
       its excess over the background is at least 0.5 (power 1.5 times the
       background). That floor is ours, from measurements on the rhythm-free
       sessions of scripts/bench_rhythms.py: their statistic reached 1.07
       (20-minute sessions of 200 ROIs) to 1.23 (5-minute sessions of 30
       ROIs), and up to 1.63 in 2-minute sessions of 10 ROIs (where the
       robust threshold is higher anyway); it keeps tiny features that are
       consistent across a large session from counting, and above the
       calcium band it lets through a sinusoid of about a tenth of the noise
       s.d. (A² N / 6 = 0.5 with N = 300 frames per segment, from the
       closed form of a sinusoid's Welch peak). Neighbouring retained bins
       form one peak.
    5. Description of each peak: its band (half the peak's excess, plus a
       bin each side), the share of ROIs whose own ratio at the peak exceeds
       the χ²_ν/ν quantile of 0.01 / (bins in the band), the amplitude of a
       sinusoid with the excess power (a = √(2 Σ_band (P − B) Δf)) and its
       ratio to the ROI's noise s.d., the median coherence against the
       level independent traces exceed with probability 0.01 with K
       segments, 1 − 0.01^(1/(K−1)) (Carter 1987), and its presence and
       frequency in each stretch of the session (present where its excess
       there reaches half the session's).

    References
    ----------
    Welch PD (1967), IEEE Trans. Audio Electroacoust. 15(2):70–73.
    Percival DB, Walden AT (1993), Spectral Analysis for Physical
    Applications, Cambridge University Press.
    Carter GC (1987), "Coherence and time delay estimation", Proc. IEEE
    75(2):236–255.
    Hampel FR (1974), "The influence curve and its role in robust
    estimation", J. Am. Stat. Assoc. 69(346):383–393 (the median absolute
    deviation as a scale estimate).

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal.rhythms import find_rhythms
    >>> rng = np.random.default_rng(1)
    >>> t = np.arange(18000) / 30.0
    >>> dff = rng.normal(0, 0.1, (40, t.size)) + 0.1 * np.sin(2 * np.pi * 50.0 * t)   # mains, aliased
    >>> found = find_rhythms(dff, 30.0)
    >>> [round(r.frequency_hz, 1) for r in found.rhythms]
    [10.0]
    """
    frame_rate = check_frame_rate(frame_rate)
    x = as_traces(traces, "traces")
    x = x.reshape(-1, x.shape[-1])
    missing = require_some_data(x, "traces").mask
    min_share = _check_fraction(min_share, "min_share")
    false_alarm = _check_fraction(false_alarm, "false_alarm")
    lowest_hz = check_positive(lowest_hz, "lowest_hz")
    nperseg = segment_frames(segment_s, frame_rate, x.shape[-1])
    neuropil, neuropil_missing = _neuropil_rows(neuropil, x.shape)
    spectra = _spectral_pass(x, missing, frame_rate, nperseg, neuropil, neuropil_missing)
    return _search(spectra, min_share=min_share, false_alarm=false_alarm, lowest_hz=lowest_hz)


_MIN_EXCESS = 0.5            # see find_rhythms, Notes 4
# Half-width of the running median: it ignores peaks narrower than itself (half its window); the drifting rhythms
# of scripts/bench_rhythms.py spread over up to 0.6 Hz.
_BACKGROUND_HALF_WIDTH_HZ = 1.0
# Level at which a single ROI's peak counts as its own (Bonferroni over the band's bins): common practice.
_ROI_ALPHA = 0.01
# Bins added on each side of the half-excess band (see _peaks).
_LOBE = 1


def _search(spectra: SessionSpectra, *, min_share: float, false_alarm: float, lowest_hz: float) -> SessionRhythms:
    freq, power = spectra.freq_hz, spectra.power
    background = _background(power, spectra.resolution_hz, spectra.dof)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = power / background
    quantile = 1.0 - min_share
    statistic = np.nanquantile(ratio, quantile, axis=0)
    lowest = max(lowest_hz, _lowest_searched(spectra.resolution_hz))
    searched = (freq >= lowest) & (freq < spectra.frame_rate / 2.0) & np.isfinite(statistic)
    threshold = np.full(freq.size, np.nan)
    rhythms: list = []
    if searched.sum() >= 8:
        # (in logarithms: a ratio of spectra is skewed to the right, its logarithm nearly symmetric)
        logs = np.log(np.maximum(statistic[searched], 1e-300))
        centre = float(np.median(logs))
        spread = 1.4826 * float(np.median(np.abs(logs - centre)))
        z_crit = float(scipy.stats.norm.isf(false_alarm / searched.sum()))
        level = max(float(np.exp(centre + z_crit * spread)), 1.0 + _MIN_EXCESS)
        threshold[searched] = level
        above = searched & (statistic > level)
        found = [_describe_peak(spectra, background, ratio, statistic, k, bins, quantile, centre, spread)
                 for k, bins in _peaks(above, statistic)]
        rhythms = _finish(found, spectra, _noise_from_spectra(spectra, [item["band_hz"] for item in found]))
    return SessionRhythms(rhythms=tuple(rhythms), spectra=spectra, background=background, statistic=statistic,
                          threshold=threshold, noise_sd=_noise_from_spectra(spectra, [r.band_hz for r in rhythms]),
                          min_share=min_share, false_alarm=false_alarm, lowest_hz=lowest)


def _peaks(above: np.ndarray, statistic: np.ndarray) -> list[tuple[int, tuple[int, int]]]:
    """(peak bin, (first, last) bin of its band) of each peak, strongest first.

    Retained bins at most two bins apart form one peak; its band holds the neighbouring bins whose excess over
    the background is more than half the peak's, plus one bin each side (_LOBE: a steady line lies within a bin
    of the interpolated peak, and the narrower the band, the less of the cells' own activity a removal takes).
    Peaks whose bands overlap (a drifting rhythm can rise above the threshold in several places) are one.
    """
    index = np.flatnonzero(above)
    if index.size == 0:
        return []
    n_bins = statistic.size
    found = []
    for group in np.split(index, np.flatnonzero(np.diff(index) > 2) + 1):
        k = int(group[np.argmax(statistic[group])])
        half = 0.5 * (statistic[k] - 1.0)
        low, high = int(group[0]), int(group[-1])
        while low > 1 and statistic[low - 1] - 1.0 > half:
            low -= 1
        while high < n_bins - 2 and statistic[high + 1] - 1.0 > half:
            high += 1
        found.append([k, max(low - _LOBE, 1), min(high + _LOBE, n_bins - 1)])
    merged = [found[0]]
    for k, low, high in found[1:]:
        last = merged[-1]
        if low <= last[2]:
            last[0] = k if statistic[k] > statistic[last[0]] else last[0]
            last[2] = max(last[2], high)
        else:
            merged.append([k, low, high])
    return [(k, (low, high)) for k, low, high in sorted(merged, key=lambda m: -statistic[m[0]])]


def _describe_peak(spectra: SessionSpectra, background, ratio, statistic, k: int, bins: tuple[int, int],
                   quantile: float, centre: float, spread: float) -> dict:
    """Share, amplitude, coherence and steadiness of the peak at bin k with band ``bins`` (a dict for _finish)."""
    freq, df = spectra.freq_hz, spectra.resolution_hz
    n_bins = freq.size
    excess = statistic[k] - 1.0
    low, high = bins
    band = slice(low, high + 1)
    # each ROI's ratio at the peak against the chi-square quantile (Bonferroni over the band's bins)
    dof = _welch_dof(spectra.n_segments)
    limit = scipy.stats.chi2.isf(_ROI_ALPHA / (high - low + 1), dof) / dof / _median_bias(spectra.dof)
    significant = np.nanmax(ratio[:, band], axis=1) > limit
    excess_power = np.nansum(spectra.power[:, band] - background[:, band], axis=1) * df
    amplitude = np.sqrt(2.0 * np.maximum(excess_power, 0.0))
    coherence = float(np.nanmedian(np.nanmax(spectra.coherence[:, band], axis=1)))
    # presence and frequency in each stretch of the session
    n_blocks = spectra.block_power.shape[0]
    present = np.zeros(n_blocks, dtype=bool)
    block_freq = np.full(n_blocks, np.nan)
    wide = slice(max(low - (high - low), 1), min(high + (high - low), n_bins - 1) + 1)
    weak = False
    for b in range(n_blocks):
        with np.errstate(invalid="ignore", divide="ignore"):
            block_stat = np.nanquantile(spectra.block_power[b] / background, quantile, axis=0)
        block_spread = 1.4826 * float(np.nanmedian(np.abs(block_stat - np.nanmedian(block_stat))))
        if 0.5 * excess < 2.0 * block_spread:
            weak = True
        j = wide.start + int(np.nanargmax(block_stat[wide]))
        if block_stat[j] - 1.0 >= 0.5 * excess:
            present[b] = True
            block_freq[b] = _interpolated_peak(block_stat, j, freq)
    return {"k": k, "frequency_hz": _interpolated_peak(statistic, k, freq),
            "band_hz": (float(freq[low]), float(freq[high])), "power_ratio": float(statistic[k]),
            "z": float((np.log(statistic[k]) - centre) / spread) if spread > 0 else float("inf"),
            "roi_significant": significant, "roi_amplitude": amplitude,
            "share": float(np.mean(significant)), "coherence": coherence,
            "coherence_null": float(1.0 - 0.01 ** (1.0 / max(np.median(spectra.n_segments) - 1, 1))),
            "present": present, "block_frequency_hz": block_freq, "weak": weak}


def _noise_from_spectra(spectra: SessionSpectra, bands) -> np.ndarray:
    """Noise s.d. of each ROI: mean density over [fs/4, fs/2) without the bands, times fs/2 (as estimate_noise)."""
    freq, fs = spectra.freq_hz, spectra.frame_rate
    keep = (freq >= fs / 4.0) & (freq < fs / 2.0)
    for low, high in bands:
        keep &= ~((freq >= low) & (freq <= high))
    if not keep.any():
        keep = (freq >= fs / 4.0) & (freq < fs / 2.0)
    return np.sqrt(np.nanmean(spectra.power[:, keep], axis=1) * fs / 2.0)


def _stability(item: dict, df: float) -> str:
    present = item["present"]
    if item["weak"] and not present.all():
        return "too weak to follow in time"
    if not present.all():
        return "intermittent"
    freqs = item["block_frequency_hz"]
    return "drifting" if np.nanmax(freqs) - np.nanmin(freqs) > 2.0 * df else "steady"


def _finish(found: list, spectra: SessionSpectra, noise_sd: np.ndarray) -> list:
    """Rhythm objects with harmonics, alias candidates and verdicts (strongest first)."""
    fs, df = spectra.frame_rate, spectra.resolution_hz
    rhythms = []
    for n, item in enumerate(found):
        significant = item["roi_significant"]
        amplitude = item["roi_amplitude"]
        with np.errstate(invalid="ignore", divide="ignore"):
            to_noise = amplitude / noise_sd
        chosen = significant if significant.any() else np.ones_like(significant)
        harmonic_of = None
        for stronger in found[:n]:
            for k in range(2, 7):
                if abs(apparent_frequency(k * stronger["frequency_hz"], fs) - item["frequency_hz"]) <= 2.0 * df:
                    harmonic_of = stronger["frequency_hz"]
                    break
            if harmonic_of is not None:
                break
        stability = _stability(item, df)
        physical = physical_frequencies(min(item["frequency_hz"], fs / 2.0), fs)
        rhythm = dict(frequency_hz=item["frequency_hz"], band_hz=item["band_hz"], power_ratio=item["power_ratio"],
                      z=item["z"], share=item["share"], amplitude=float(np.nanmedian(amplitude[chosen])),
                      amplitude_to_noise=float(np.nanmedian(to_noise[chosen])), roi_amplitude=amplitude,
                      roi_significant=significant, coherence=item["coherence"],
                      coherence_null=item["coherence_null"], present=item["present"],
                      block_frequency_hz=item["block_frequency_hz"], stability=stability, harmonic_of=harmonic_of,
                      physical_hz=physical)
        rhythms.append(Rhythm(**rhythm, verdict=_verdict(rhythm, fs)))
    return rhythms


def _verdict(r: dict, frame_rate: float) -> str:
    """A rhythm described in plain words, with what to do about it."""
    low, high = r["band_hz"]
    text = (f"{r['frequency_hz']:.2f} Hz (band {low:.2f}-{high:.2f} Hz): stands out in {r['share']:.0%} of the ROIs, "
            f"{r['power_ratio']:.1f}x the background; amplitude {r['amplitude']:.2g} "
            f"({r['amplitude_to_noise']:.2g}x the noise s.d.)")
    if r["coherence"] > r["coherence_null"]:
        text += f"; coherent across the field (coherence {r['coherence']:.2f})"
    else:
        text += f"; not coherent across the field (coherence {r['coherence']:.2f}, chance level {r['coherence_null']:.2f})"
    text += {"steady": "; steady over the session",
             "drifting": "; present throughout but drifting in frequency (by {:.2g} Hz)".format(
                 np.nanmax(r["block_frequency_hz"]) - np.nanmin(r["block_frequency_hz"])),
             "intermittent": f"; intermittent (in {int(r['present'].sum())} of {r['present'].size} stretches)",
             "too weak to follow in time": "; too weak to follow over time"}[r["stability"]]
    if r["harmonic_of"] is not None:
        text += f"; a harmonic of the {r['harmonic_of']:.2f} Hz rhythm"
    aliases = r["physical_hz"][r["physical_hz"] > frame_rate / 2.0][:4]
    if aliases.size:
        text += (". If it comes from above the Nyquist frequency it could be " +
                 ", ".join(f"{a:.4g}" for a in aliases) + " Hz")
        mains = [m for m in _MAINS_HZ if any(abs(apparent_frequency(k * m, frame_rate) - r["frequency_hz"]) <= high - low
                                             for k in (1, 2))]
        if mains:
            text += f" (mains at {' or '.join(f'{m:g}' for m in mains)} Hz, or a harmonic, would appear here)"
    if r["share"] >= 0.5 and r["coherence"] > r["coherence_null"]:
        advice = ("Shared by most of the field in a fixed phase relation: most likely an artefact (motion, light, "
                  "electrical pickup); remove it before inference and check that the spikes do not lock to it.")
    elif r["share"] >= 0.5:
        advice = ("Shared by most of the field, but not in a fixed phase: an artefact whose phase varies across the "
                  "field or over time; a notch or band-stop removes it whatever its phase.")
    else:
        advice = ("Shared by part of the field: an artefact of one region, or cells entrained by a rhythm; compare "
                  "the phase locking of their spikes before and after removing it.")
    return text + ". " + advice


# ---------------------------------------------------------------------------
# removal
# ---------------------------------------------------------------------------
REMOVAL_METHODS = ("notch", "bandstop", "regression")
#: Relative size under which the disturbance of a zero-phase filter's impulse response is taken as ended.
_EDGE_TOLERANCE = 1e-3


@dataclass(frozen=True, eq=False)
class RhythmRemoval:
    """Result of :func:`remove_rhythms`.

    Attributes
    ----------
    cleaned : ndarray
        The traces without the rhythms, shape of the input, NaN at missing
        frames.
    removed : ndarray
        What was taken out (input − cleaned).
    method : str
        "notch", "bandstop" or "regression".
    bands_hz : tuple of (float, float)
        The bands treated.
    filters : tuple of ZeroPhaseFilter
        The filters applied (notch/band-stop), or the band-pass filters that
        isolated each band (regression).
    edge_frames : int
        Frames at each end, and on each side of a gap, that the filters
        disturb: the span of their zero-phase impulse response (what they
        add around a frame) until it stays below 0.1 % of its peak,
        measured on it rather than taken from a rule of thumb (a narrow
        notch rings for about 1 / (π × width) seconds).
    affected : ndarray of bool
        True within ``edge_frames`` of either end or of a missing frame.
    coefficients : ndarray or None
        Regression only: (rois, bands) complex weights of the reference's
        analytic signal in each band (modulus: gain, angle: phase lag).
    reference : str
        Regression only: what the shared component was taken from.
    """

    cleaned: np.ndarray
    removed: np.ndarray
    method: str
    bands_hz: tuple
    filters: tuple
    edge_frames: int
    affected: np.ndarray
    coefficients: np.ndarray | None = None
    reference: str = ""

    def describe(self) -> str:
        """One line for people: what was removed, how, and the span disturbed at the edges."""
        if not self.bands_hz:
            return "no rhythm removed"
        bands = ", ".join(f"{low:.3g}-{high:.3g} Hz" for low, high in self.bands_hz)
        how = {"notch": "zero-phase notch filter(s)", "bandstop": "zero-phase band-stop filter(s)",
               "regression": f"regression of the shared component ({self.reference}) in each band"}[self.method]
        seconds = self.edge_frames / self.filters[0].frame_rate
        return (f"removed {bands} by {how}; {self.edge_frames} frame(s) ({seconds:.3g} s) at each end and beside "
                f"each gap are disturbed")


def _band_list(bands_hz, frame_rate: float) -> tuple:
    """The bands as (low, high) pairs within (0, Nyquist]; a SessionRhythms gives its own."""
    if isinstance(bands_hz, SessionRhythms):
        bands_hz = bands_hz.bands_hz
    nyquist = frame_rate / 2.0
    bands = frequency_pairs(bands_hz, "bands_hz", "[(9.8, 10.2)] (or the result of find_rhythms)")
    for low, high in bands:
        if not (0.0 < low < high <= nyquist):
            raise ValueError(f"bands_hz holds ({low:g}, {high:g}); each band must satisfy 0 < low < high <= "
                             f"{nyquist:g} Hz (the Nyquist frequency frame_rate/2)")
    return bands


def notch_edges_hz(centre_hz: float, width_hz: float, frame_rate: float) -> tuple[float, float]:
    """Band edges of the first-order Butterworth band-stop that is the second-order notch at ``centre_hz`` whose
    -3 dB width is ``width_hz`` (the design of scipy.signal.iirnotch with Q = centre / width).

    Both are the bilinear transform of s² + Ω0² over s² + B s + Ω0² (Oppenheim & Schafer 2010, sec. 7.2):
    with ω = 2π f / fs, the band-stop's digital -3 dB edges ω1 < ω2 satisfy tan(ω1/2) tan(ω2/2) = tan²(ω0/2),
    i.e. cos((ω1 + ω2)/2) = cos((ω2 − ω1)/2) cos ω0, and ω2 − ω1 = 2π width / fs.
    """
    w0 = 2 * np.pi * centre_hz / frame_rate
    half = np.pi * width_hz / frame_rate
    middle = np.arccos(np.cos(half) * np.cos(w0))
    return float((middle - half) * frame_rate / (2 * np.pi)), float((middle + half) * frame_rate / (2 * np.pi))


def _band_filter(kind: str, band: tuple[float, float], frame_rate: float, order: int) -> ZeroPhaseFilter:
    """The zero-phase filter treating one band: a notch, a band-stop, or the band-pass of a regression."""
    low, high = band
    nyquist = frame_rate / 2.0
    if kind == "notch":
        low, high = notch_edges_hz(0.5 * (low + high), high - low, frame_rate)
        order = 1
    if high >= nyquist:  # a band that reaches the Nyquist frequency: everything above its lower edge
        return design_filter("lowpass" if kind != "bandpass" else "highpass", low, frame_rate, order=max(order, 2))
    kind = "bandpass" if kind == "bandpass" else "bandstop"
    return design_filter(kind, (max(low, 1e-6 * nyquist), high), frame_rate, order=order)


def _edge_frames(filt: ZeroPhaseFilter, width_hz: float) -> int:
    """Frames from its centre beyond which the zero-phase impulse response of ``filt`` stays within
    _EDGE_TOLERANCE of its largest value. For a filter that removes a band (band-stop, notch, the low-pass of a
    band at the Nyquist frequency) the response is taken without the impulse that passes through it: what the
    filter adds around a frame."""
    reach = int(np.ceil(4.0 * filt.frame_rate / max(width_hz, 1e-3))) + 8
    largest = int(3600 * filt.frame_rate)  # (an hour: beyond any filter designed here)
    while True:
        impulse = np.zeros(2 * reach + 1)
        impulse[reach] = 1.0
        response = filt.apply(impulse, padtype=None)
        if filt.kind in ("bandstop", "lowpass"):
            response[reach] -= 1.0
        size = np.abs(response)
        outside = np.flatnonzero(size > _EDGE_TOLERANCE * size.max())
        span = int(np.max(np.abs(outside - reach))) if outside.size else 0
        if span < 0.9 * reach or reach >= largest:
            return span
        reach = min(2 * reach, largest)


def remove_rhythms(traces, frame_rate, bands_hz, *, method="notch", order=2, reference=None) -> RhythmRemoval:
    """Remove periodic components in given bands without shifting anything in time.

    Parameters
    ----------
    traces : array_like, shape (rois, frames) or (frames,)
        ΔF/F; NaN/inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    bands_hz : sequence of (float, float), or SessionRhythms
        The bands to remove (Hz), e.g. ``find_rhythms(...).bands_hz``.
    method : {'notch', 'bandstop', 'regression'}, optional
        'notch': a second-order notch per band, centred in it, its -3 dB
        width the band's (a first-order Butterworth band-stop; identical to
        :func:`scipy.signal.iirnotch`). 'bandstop': a Butterworth band-stop
        of ``order`` over each band (flatter, for the wide band of a
        drifting rhythm). 'regression': in each band, the component that
        follows the shared reference is fitted and subtracted, leaving the
        rest of the band.
    order : int, optional
        Order of the band-stop ('bandstop') or of the band-pass isolating
        each band ('regression'); forward-backward doubles it.
    reference : array_like, optional
        'regression' only: the shared signal, (frames,) for all ROIs (e.g.
        :func:`shared_component` of the session) or shape like ``traces``
        (one per ROI, e.g. each ROI's neuropil). Default: for each ROI the
        phase-aligned average of the other ROIs (:func:`shared_component`).

    Returns
    -------
    RhythmRemoval

    Notes
    -----
    Every filter is applied forward and backward
    (:meth:`calcium.signal.ZeroPhaseFilter.apply`): zero phase, so events
    keep their times, and the gain is |H|² (Oppenheim & Schafer 2010;
    Gustafsson 1996). A notch of width w rings for about 1 / (π w) s, so
    the edges it disturbs are longer than its order suggests:
    ``edge_frames`` is measured on the zero-phase impulse response.

    Regression: the reference r and the trace x are band-passed to the band
    widened by a quarter of its width on each side (zero-phase Butterworth), the analytic signal z = r_b + i H[r_b] is
    formed with the Hilbert transform (Gabor 1946; :func:`scipy.signal.hilbert`),
    and the least-squares fit x_b ≈ Re(c* z) over the frames away from
    edges and gaps gives the complex weight c = a − ib: a ROI that follows
    the reference with any gain and phase lag has that component removed,
    x − (a r_b + b H[r_b]). What is not shared with the reference stays.
    Missing frames are NaN in ``cleaned``.

    References
    ----------
    Oppenheim AV, Schafer RW (2010), Discrete-Time Signal Processing, 3rd
    ed., Prentice Hall (notch filters, zero-phase filtering, the bilinear
    transform).
    Gustafsson F (1996), "Determining the initial states in forward-backward
    filtering", IEEE Trans. Signal Process. 44(4):988–992.
    Gabor D (1946), "Theory of communication", J. IEE 93(26):429–457 (the
    analytic signal).

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal.rhythms import remove_rhythms
    >>> t = np.arange(6000) / 30.0
    >>> noise = np.random.default_rng(0).normal(0, 0.1, t.size)
    >>> removal = remove_rhythms(noise + 0.3 * np.sin(2 * np.pi * 10.0 * t), 30.0, [(9.8, 10.2)])
    >>> middle = slice(removal.edge_frames, -removal.edge_frames)
    >>> bool(np.std(removal.cleaned[middle] - noise[middle]) < 0.02)
    True
    """
    frame_rate = check_frame_rate(frame_rate)
    check_choice(method, "method", REMOVAL_METHODS)
    order = check_int(order, "order", minimum=1)
    x = as_traces(traces, "traces")
    missing = require_some_data(x, "traces")
    bands = _band_list(bands_hz, frame_rate)
    rows = x.reshape(-1, x.shape[-1])
    mask = missing.mask.reshape(rows.shape)
    if method == "regression":
        cleaned, filters, coefficients, what = _regress_bands(rows, mask, frame_rate, bands, order, reference)
    else:
        if reference is not None:
            raise ValueError("reference is used by method='regression' only; leave it out or choose that method")
        filters = tuple(_band_filter(method, band, frame_rate, order) for band in bands)
        cleaned = rows
        for filt in filters:
            cleaned = filt.apply(cleaned)
        coefficients, what = None, ""
    edge = max((_edge_frames(f, high - low) for f, (low, high) in zip(filters, bands)), default=0)
    affected = grow_mask(mask, edge)
    if edge:
        affected[:, :edge] = True
        affected[:, -edge:] = True
    cleaned = np.array(cleaned, dtype=np.float64, copy=True)
    cleaned[mask] = np.nan
    return RhythmRemoval(cleaned=cleaned.reshape(x.shape), removed=(rows - cleaned).reshape(x.shape), method=method,
                         bands_hz=bands, filters=filters, edge_frames=int(edge),
                         affected=affected.reshape(x.shape), coefficients=coefficients, reference=what)


def _widened(band: tuple[float, float], frame_rate: float) -> tuple[float, float]:
    """A band widened by a quarter of its width on each side (within (0, Nyquist]): the pass band of a
    regression, so that a rhythm drifting to the band's edges is passed with a gain nearer 1 (at a Butterworth
    band-pass's own edges the zero-phase gain is 1/2) while little more of the cells' own activity is let in.
    Measured in scripts/bench_rhythms.py (inference false positives after removal against the clean twin, 12
    sessions of 60 ROIs): +6.7 % unwidened, +3.6 % widened by a quarter, +4.3 % by a half."""
    low, high = band
    half = 0.25 * (high - low)
    return max(low - half, 0.5 * low), min(high + half, frame_rate / 2.0)


def _analytic_band(filt: ZeroPhaseFilter, rows: np.ndarray, edge: int):
    """Analytic signal of the band-passed rows (missing frames as 0) and the frames usable for a fit: finite and
    further than ``edge`` frames from an end or a gap."""
    band = filt.apply(rows)
    bad = ~np.isfinite(band)
    # (zero-padded beyond the edge span: the transform's circular wrap would join the two ends)
    length = scipy.fft.next_fast_len(band.shape[-1] + 2 * edge)
    analytic = scipy.signal.hilbert(np.where(bad, 0.0, band), N=length, axis=-1)[..., :band.shape[-1]]
    usable = ~grow_mask(bad, edge)
    if edge:
        usable[..., :edge] = False
        usable[..., -edge:] = False
    return analytic, usable


def _aligned_average(analytic: np.ndarray, usable: np.ndarray, iterations: int = 20):
    """Weights c (rois,) and the phase-aligned average s = Σ conj(c_i) z_i / Σ |c_i|² of analytic band signals z_i:
    the rank-one fit z_i ≈ c_i s by alternating least squares (the power method on Z Z^H), so that ROIs that
    carry the rhythm with other phases or signs add up instead of cancelling. The weights are fitted on the
    ``usable`` frames; s is returned at every frame (also near the ends, where the band-pass is less exact)."""
    z = np.where(usable, analytic, 0.0)
    s = z[int(np.argmax(np.sum(np.abs(z) ** 2, axis=1)))].copy()
    c = np.ones(z.shape[0], np.complex128)
    for _ in range(iterations):
        c = (z @ np.conj(s)) / max(float(np.vdot(s, s).real), 1e-300)
        s = (np.conj(c) @ z) / max(float(np.sum(np.abs(c) ** 2)), 1e-300)
    return c, (np.conj(c) @ analytic) / max(float(np.sum(np.abs(c) ** 2)), 1e-300)


def shared_component(traces, frame_rate, bands_hz, *, order=2) -> np.ndarray:
    """The rhythm the ROIs share in given bands, as one trace: their phase-aligned average in each band.

    Parameters
    ----------
    traces : array_like, shape (rois, frames)
        ΔF/F of the session's ROIs (all, or an even sample); NaN/inf mark
        missing frames.
    frame_rate : float
        Frames per second (Hz).
    bands_hz : sequence of (float, float), or SessionRhythms
        The bands.
    order : int, optional
        Butterworth order of the band-pass isolating each band.

    Returns
    -------
    ndarray, shape (frames,)
        The sum over the bands of Re(s_b), s_b the shared component of band
        b (see Notes); a reference for ``remove_rhythms(...,
        method="regression", reference=...)`` on any ROIs of the session.

    Notes
    -----
    In each band the ROIs' band-passed traces (zero phase) become analytic
    signals z_i (Hilbert transform); the shared component is the rank-one
    fit z_i ≈ c_i s, found by alternating least squares (the power method
    on Z Z^H; Golub & Van Loan 2013, sec. 7.3), and s is scaled to the
    size of the average ROI's share. Unlike the plain average it does not
    cancel when the rhythm reaches the ROIs with different phases or signs
    (a scanned artefact, motion in opposite directions).

    References
    ----------
    Golub GH, Van Loan CF (2013), Matrix Computations, 4th ed., Johns Hopkins
    University Press.
    Gabor D (1946), "Theory of communication", J. IEE 93(26):429–457.
    """
    frame_rate = check_frame_rate(frame_rate)
    order = check_int(order, "order", minimum=1)
    x = as_traces(traces, "traces")
    rows = x.reshape(-1, x.shape[-1])
    require_some_data(rows, "traces")
    total = np.zeros(rows.shape[1])
    for band in _band_list(bands_hz, frame_rate):
        filt = _band_filter("bandpass", _widened(band, frame_rate), frame_rate, order)
        analytic, usable = _analytic_band(filt, rows, _edge_frames(filt, band[1] - band[0]))
        c, s = _aligned_average(analytic, usable)
        total += (s * np.mean(np.abs(c))).real
    return total


def _regress_bands(rows: np.ndarray, mask: np.ndarray, frame_rate: float, bands, order: int, reference):
    """Band by band: fit each row's band to the analytic band of its reference and subtract the fit."""
    n_rois, n_frames = rows.shape
    per_roi = single = None
    if reference is None:
        if n_rois < 2:
            raise ValueError("method='regression' without a reference needs at least 2 ROIs (the reference of a "
                             "ROI is the shared component of the others); give reference= (a trace of the rhythm, "
                             "e.g. shared_component() of the session, or each ROI's neuropil)")
        what = "phase-aligned average of the other ROIs"
    else:
        ref = as_traces(reference, "reference")
        if ref.ndim == 1 and ref.size == n_frames:
            single, what = ref, "the given reference trace"
        elif ref.reshape(-1, ref.shape[-1]).shape == rows.shape:
            per_roi, what = ref.reshape(rows.shape), "each ROI's own reference (neuropil)"
        else:
            raise ValueError(f"reference must have shape ({n_frames},) or the shape of the traces {rows.shape}, got "
                             f"{ref.shape}")
    cleaned = np.where(mask, np.nan, rows)
    filters = []
    coefficients = np.zeros((n_rois, len(bands)), np.complex128)
    for j, band in enumerate(bands):
        filt = _band_filter("bandpass", _widened(band, frame_rate), frame_rate, order)
        filters.append(filt)
        edge = _edge_frames(filt, band[1] - band[0])
        own, usable = _analytic_band(filt, cleaned, edge)
        if per_roi is not None:
            refs, ref_usable = _analytic_band(filt, per_roi, edge)
            usable &= ref_usable
        elif single is not None:
            refs, ref_usable = _analytic_band(filt, single, edge)
            usable &= ref_usable[None, :]
            refs = np.broadcast_to(refs, own.shape)
        else:
            c, s = _aligned_average(own, usable)
            # each ROI's reference leaves the ROI out: (Σ conj(c) z - conj(c_i) z_i) / (Σ |c|² - |c_i|²)
            weight = np.sum(np.abs(c) ** 2)
            total = s * weight
            refs = (total[None, :] - np.conj(c)[:, None] * own) / np.maximum(weight - np.abs(c) ** 2, 1e-300)[:, None]
        for i in range(n_rois):
            keep = usable[i]
            if keep.sum() < 4:
                continue
            design = np.column_stack([refs[i].real[keep], refs[i].imag[keep]])
            (a, b), *_ = np.linalg.lstsq(design, own[i].real[keep], rcond=None)
            coefficients[i, j] = complex(a, -b)
            cleaned[i] = cleaned[i] - (a * refs[i].real + b * refs[i].imag)
    return cleaned, tuple(filters), coefficients, what


# ---------------------------------------------------------------------------
# phase of a rhythm, and phase locking of spikes to it
# ---------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class RhythmPhase:
    """Result of :func:`rhythm_phase`: the instantaneous phase and amplitude of a rhythm, frame by frame.

    Attributes
    ----------
    phase : ndarray, shape (frames,)
        Radians in (−π, π]; 0 at the crests of the band-passed trace. NaN at
        missing frames.
    amplitude : ndarray, shape (frames,)
        Envelope of the band-passed trace (NaN at missing frames).
    valid : ndarray of bool, shape (frames,)
        False at missing frames and within ``edge_frames`` of an end or a gap.
    band_hz : (float, float)
    filter : ZeroPhaseFilter
        The band-pass filter.
    edge_frames : int
        Span of the band-pass's zero-phase impulse response (see
        :attr:`RhythmRemoval.edge_frames`).
    frame_rate : float
    """

    phase: np.ndarray
    amplitude: np.ndarray
    valid: np.ndarray
    band_hz: tuple
    filter: ZeroPhaseFilter
    edge_frames: int
    frame_rate: float


def rhythm_phase(trace, frame_rate, band_hz, *, order=2) -> RhythmPhase:
    """Instantaneous phase of a rhythm: zero-phase band-pass, then the Hilbert transform.

    Parameters
    ----------
    trace : array_like, shape (frames,)
        What carries the rhythm: the session average, a ROI, or a trace the
        user recorded alongside (breathing, running speed) resampled to the
        frames. NaN/inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    band_hz : (float, float)
        The rhythm's band, e.g. ``Rhythm.band_hz``.
    order : int, optional
        Butterworth order of the band-pass (forward-backward doubles it).

    Returns
    -------
    RhythmPhase

    Notes
    -----
    The band-passed trace x_b (zero phase: the phase is not delayed) gives
    the analytic signal z = x_b + i H[x_b] (Gabor 1946), H the Hilbert
    transform (:func:`scipy.signal.hilbert`), and the phase arg z and
    amplitude |z|. The phase of a rhythm is meaningful where the rhythm is
    narrow-band, as the band-pass makes it (Lachaux et al. 1999).

    References
    ----------
    Gabor D (1946), "Theory of communication", J. IEE 93(26):429–457.
    Lachaux JP, Rodriguez E, Martinerie J, Varela FJ (1999), "Measuring phase
    synchrony in brain signals", Hum. Brain Mapp. 8(4):194–208.
    """
    frame_rate = check_frame_rate(frame_rate)
    x, missing = _one_trace(trace)
    order = check_int(order, "order", minimum=1)
    (band,) = _band_list([band_hz] if np.ndim(band_hz) == 1 else band_hz, frame_rate)
    filt = _band_filter("bandpass", band, frame_rate, order)
    filtered = filt.apply(x)
    analytic = scipy.signal.hilbert(np.where(missing, 0.0, filtered))
    edge = _edge_frames(filt, band[1] - band[0])
    valid = ~grow_mask(missing, edge)
    if edge:
        valid[:edge] = False
        valid[-edge:] = False
    phase, amplitude = np.angle(analytic), np.abs(analytic)
    phase[missing] = np.nan
    amplitude[missing] = np.nan
    return RhythmPhase(phase=phase, amplitude=amplitude, valid=valid, band_hz=band, filter=filt, edge_frames=edge,
                       frame_rate=frame_rate)


@dataclass(frozen=True, eq=False)
class PhaseLocking:
    """Result of :func:`phase_locking`.

    Attributes
    ----------
    plv : float
        Phase-locking value |mean exp(iφ_k)| over the spikes' phases φ_k: 1
        when every spike falls at the same phase, about 1/√N for N spikes at
        random phases.
    preferred_phase : float
        Angle of the mean vector, radians (0: the crests of the rhythm).
    n_spikes : int
        Spikes counted (those at valid frames of the phase).
    p_value : float
        Share of surrogate spike trains (each spike moved at random within
        one period) whose PLV reaches the observed one, (1 + count) / (1 + B).
    null_plv : float
        Median PLV of the surrogates: what the same spikes give by chance.
    n_surrogates : int
    """

    plv: float
    preferred_phase: float
    n_spikes: int
    p_value: float
    null_plv: float
    n_surrogates: int

    def describe(self, alpha: float = 0.05) -> str:
        """One line: the locking and whether it exceeds chance at level ``alpha``."""
        if self.n_spikes == 0:
            return "no spike at a valid frame of the rhythm"
        verdict = "locked" if self.p_value <= alpha else "not locked"
        return (f"{verdict}: PLV {self.plv:.3f} over {self.n_spikes} spikes (chance {self.null_plv:.3f}, "
                f"p = {self.p_value:.3g}), preferred phase {np.degrees(self.preferred_phase):.0f} deg")


def _phases_at(times_s: np.ndarray, unwrapped: np.ndarray, valid: np.ndarray, frame_rate: float) -> np.ndarray:
    """Phase at (fractional) times, interpolated along the unwrapped phase; NaN at or next to invalid frames."""
    position = times_s * frame_rate
    n = unwrapped.size
    inside = (position >= 0) & (position <= n - 1)
    out = np.full(position.shape, np.nan)
    where = np.clip(position, 0, n - 1)
    left = np.floor(where).astype(np.int64)
    right = np.minimum(left + 1, n - 1)
    ok = inside & valid[left] & valid[right]
    out[ok] = np.interp(where[ok], np.arange(n), unwrapped)
    return out


def phase_locking(spike_times, rhythm, *, n_surrogates=N_SURROGATES, seed=0) -> PhaseLocking:
    """How strongly spikes keep to one phase of a rhythm, against spikes moved at random within a period.

    Parameters
    ----------
    spike_times : array_like
        Spike times of one ROI, seconds from the first frame (a repeated
        time counts as several spikes).
    rhythm : RhythmPhase
        From :func:`rhythm_phase`.
    n_surrogates : int, optional
        Surrogate spike trains (default 999, :data:`N_SURROGATES`).
    seed : int, optional
        Seed of the surrogates (fixed: the same call gives the same p-value).

    Returns
    -------
    PhaseLocking

    Notes
    -----
    The phase of each spike is read from the rhythm's unwrapped phase,
    interpolated between frames; the phase-locking value (Lachaux et al.
    1999) is PLV = |(1/N) Σ_k exp(iφ_k)|. For N independent phases spread
    uniformly, N·PLV² is exponentially distributed with mean 1 (the Rayleigh
    statistic; Mardia & Jupp 2000), so PLV ≈ 1/√N by chance.

    Surrogates: each spike is moved by an independent uniform offset of up
    to half the period of the band's lower edge either way, which spreads
    its phase uniformly while keeping the spike train's structure on longer
    times (interval jitter, Amarasingham et al. 2012). A shift of the whole
    train would not do for a steady rhythm: shifting by any amount rotates
    every phase equally and keeps the PLV. The p-value is
    (1 + #{surrogate PLV ≥ PLV}) / (1 + B) (Davison & Hinkley 1997).

    References
    ----------
    Lachaux JP, Rodriguez E, Martinerie J, Varela FJ (1999), "Measuring phase
    synchrony in brain signals", Hum. Brain Mapp. 8(4):194–208.
    Amarasingham A, Harrison MT, Hatsopoulos NG, Geman S (2012),
    "Conditional modeling and the jitter method of spike resampling",
    J. Neurophysiol. 107(2):517–531.
    Mardia KV, Jupp PE (2000), Directional Statistics, Wiley.
    Davison AC, Hinkley DV (1997), Bootstrap Methods and their Application,
    Cambridge University Press.
    """
    if not isinstance(rhythm, RhythmPhase):
        raise ValueError(f"rhythm must be the RhythmPhase of rhythm_phase(trace, frame_rate, band_hz), got "
                         f"{type(rhythm).__name__}")
    n_surrogates = check_int(n_surrogates, "n_surrogates", minimum=1)
    times = np.asarray(spike_times, dtype=np.float64).ravel()
    if times.size and not np.all(np.isfinite(times)):
        raise ValueError("spike_times must hold finite times in seconds")
    frame_rate = rhythm.frame_rate
    unwrapped = np.unwrap(np.where(np.isfinite(rhythm.phase), rhythm.phase, 0.0))
    phases = _phases_at(times, unwrapped, rhythm.valid, frame_rate)
    phases = phases[np.isfinite(phases)]
    if phases.size == 0:
        return PhaseLocking(plv=float("nan"), preferred_phase=float("nan"), n_spikes=0, p_value=1.0,
                            null_plv=float("nan"), n_surrogates=n_surrogates)
    vector = np.mean(np.exp(1j * phases))
    plv = float(np.abs(vector))
    kept = times[np.isfinite(_phases_at(times, unwrapped, rhythm.valid, frame_rate))]
    period = 1.0 / rhythm.band_hz[0]
    rng = np.random.default_rng(seed)
    null = np.empty(n_surrogates)
    duration = unwrapped.size / frame_rate
    for start in range(0, n_surrogates, 64):
        stop = min(start + 64, n_surrogates)
        moved = kept[None, :] + rng.uniform(-0.5 * period, 0.5 * period, (stop - start, kept.size))
        moved = np.mod(moved, duration)
        surrogate = _phases_at(moved, unwrapped, rhythm.valid, frame_rate)
        with np.errstate(invalid="ignore"):
            null[start:stop] = np.abs(np.nanmean(np.exp(1j * surrogate), axis=1))
    return PhaseLocking(plv=plv, preferred_phase=float(np.angle(vector)), n_spikes=int(phases.size),
                        p_value=float((1 + np.count_nonzero(null >= plv)) / (1 + n_surrogates)),
                        null_plv=float(np.nanmedian(null)), n_surrogates=n_surrogates)
