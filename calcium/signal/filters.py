"""Zero-phase filters and detrending.

A filter designed here is always applied forwards and then backwards over
the trace. The phase shifts of the two passes cancel, so a transient stays
where it was (no delay), and the gain is applied twice: the zero-phase gain
is |H|², the effective order is twice the designed order, and the -3 dB
points move inwards. :class:`ZeroPhaseFilter` reports all of this.
"""
from __future__ import annotations

import numbers
import warnings
from dataclasses import dataclass

import numpy as np
import scipy  # submodules (signal, optimize) load on first use

from .._checks import (
    MissingFrames,
    as_traces,
    check_choice,
    check_frame_rate,
    check_int,
    check_positive,
    require_some_data,
)
from ._missing import fill_gaps_linear, grow_mask
from .baseline import _check_baseline_args, _lower_envelope  # ΔF/F's baseline is the lower envelope

__all__ = [
    "ZeroPhaseFilter",
    "FilterResult",
    "DetrendResult",
    "design_filter",
    "zero_phase_filter",
    "detrend",
]

KINDS = ("lowpass", "highpass", "bandpass", "bandstop")
METHODS = ("butterworth", "fir")
EDGES = ("pad", "mark", "trim")
PADTYPES = ("odd", "even", "constant", None)
_HALF_POWER_GAIN = 1.0 / np.sqrt(2.0)  # amplitude gain at -3 dB (half power)


def _check_padding(padtype, padlen):
    check_choice(padtype, "padtype", PADTYPES)
    return None if padlen is None else check_int(padlen, "padlen", minimum=0)


def _freqz_sos():
    # scipy >= 1.15 calls it freqz_sos; older releases only have sosfreqz.
    return getattr(scipy.signal, "freqz_sos", None) or scipy.signal.sosfreqz


@dataclass(frozen=True, eq=False)
class ZeroPhaseFilter:
    """A filter designed for forward-backward (zero-phase) application.

    Build one with :func:`design_filter`.

    Attributes
    ----------
    kind : str
        'lowpass', 'highpass', 'bandpass' or 'bandstop'.
    cutoff_hz : float or tuple of float
        The design cutoff(s) in Hz: for Butterworth the single-pass -3 dB
        point(s), for FIR the single-pass -6 dB point(s) (gain 0.5, the
        windowed-sinc convention). A (low, high) pair for band filters.
    frame_rate : float
        Frames per second (Hz) the filter was designed for.
    order : int
        The designed order: the ``N`` given to :func:`scipy.signal.butter`
        (band filters then have 2N poles), or ``numtaps - 1`` for FIR.
    method : str
        'butterworth' (IIR, second-order sections) or 'fir' (windowed sinc).
    sos : ndarray or None
        Second-order sections (Butterworth).
    taps : ndarray or None
        FIR coefficients.
    half_power_hz : tuple of float
        The -3 dB point(s) of the zero-phase filter, i.e. where |H|² falls
        to 1/√2, found numerically from the squared response; one value for
        low- and high-pass, two for band filters.
    """

    kind: str
    cutoff_hz: float | tuple[float, float]
    frame_rate: float
    order: int
    method: str
    sos: np.ndarray | None
    taps: np.ndarray | None
    half_power_hz: tuple[float, ...]

    @property
    def effective_order(self) -> int:
        """Order of the forward-backward cascade: twice :attr:`order`."""
        return 2 * self.order

    @property
    def gain_exponent(self) -> int:
        """The zero-phase gain is |H| to this power: 2 (each pass applies |H| once)."""
        return 2

    @property
    def edge_frames(self) -> int:
        """Samples at each end (and beside each gap) affected by edge artefacts.

        Half the effective order, i.e. :attr:`order` (common practice). For
        FIR filters this is exact: the forward-backward impulse response
        spans ``order`` samples on either side, so the output further than
        ``order`` samples from an end does not depend on the padding at all.
        For Butterworth filters the impulse response decays without ever
        ending; the span is the usual rule of thumb and the true transient
        is longer for low cutoffs (see the Notes of :func:`design_filter`).
        """
        return self.effective_order // 2

    @property
    def default_padlen(self) -> int:
        """Padding used when ``padlen`` is None: scipy's default for this filter.

        ``3 * (2 * n_sections + 1 - min(zeros in b2, zeros in a2))`` for
        second-order sections (:func:`scipy.signal.sosfiltfilt`), and
        ``3 * numtaps`` for FIR (:func:`scipy.signal.filtfilt`).
        """
        if self.sos is not None:
            trailing = min(int((self.sos[:, 2] == 0).sum()), int((self.sos[:, 5] == 0).sum()))
            return 3 * (2 * len(self.sos) + 1 - trailing)
        return 3 * len(self.taps)

    def _complex_response(self, freq_hz: np.ndarray) -> np.ndarray:
        freq_hz = np.atleast_1d(np.asarray(freq_hz, dtype=np.float64))
        if self.sos is not None:
            return _freqz_sos()(self.sos, worN=freq_hz, fs=self.frame_rate)[1]
        return scipy.signal.freqz(self.taps, [1.0], worN=freq_hz, fs=self.frame_rate)[1]

    def frequency_response(self, n_points: int = 512):
        """Gain from 0 Hz to the Nyquist frequency.

        Parameters
        ----------
        n_points : int, optional
            Number of equally spaced frequencies, 0 and Nyquist included.

        Returns
        -------
        freq_hz : ndarray
        single_pass_gain : ndarray
            |H(f)| of one pass.
        zero_phase_gain : ndarray
            |H(f)|², the gain of the forward-backward filter (its phase is 0).
        """
        n_points = check_int(n_points, "n_points", minimum=2)
        freq = np.linspace(0.0, self.frame_rate / 2.0, n_points)
        single = np.abs(self._complex_response(freq))
        return freq, single, single ** 2

    def describe(self) -> str:
        """One line for people: what the filter is and what forward-backward does to it."""
        cut = self.cutoff_hz if np.isscalar(self.cutoff_hz) else "–".join(f"{c:g}" for c in self.cutoff_hz)
        points = ", ".join(f"{f:.4g}" for f in self.half_power_hz)
        name = "Butterworth" if self.method == "butterworth" else "FIR (windowed sinc)"
        return (f"{name} {self.kind}, order {self.order}, cutoff {cut} Hz at {self.frame_rate:g} Hz; "
                f"applied forward and backward: zero phase, gain |H|^2, effective order "
                f"{self.effective_order}, -3 dB at {points} Hz, {self.edge_frames} frame(s) "
                f"affected at each end")

    def __str__(self) -> str:
        return self.describe()

    def min_frames(self, padlen=None, padtype="odd") -> int:
        """Shortest trace this filter can run on with the given padding."""
        if padtype is None:
            return 1
        return (self.default_padlen if padlen is None else padlen) + 1

    def apply(self, x, *, edges="pad", padtype="odd", padlen=None):
        """Filter ``x`` forwards and backwards along its last axis.

        Parameters
        ----------
        x : array_like, shape (frames,) or (rois, frames)
            NaN or inf mark missing frames.
        edges : {'pad', 'mark', 'trim'}, optional
            'pad': return the filtered trace, same shape as ``x``.
            'mark': return ``(filtered, affected)`` where ``affected`` is a
            boolean mask, True within :attr:`edge_frames` of either end or of
            a missing frame (and at the missing frames themselves).
            'trim': drop :attr:`edge_frames` samples at each end (samples
            beside interior gaps cannot be dropped; use 'mark' to see them).
        padtype : {'odd', 'even', 'constant', None}, optional
            How the trace is extended at both ends before filtering (as in
            :func:`scipy.signal.sosfiltfilt`): odd (point-symmetric, the
            default; keeps slopes), even (mirror), constant (repeat the end
            value), or None (no extension).
        padlen : int, optional
            Samples added at each end; None uses :attr:`default_padlen`. The
            trace must be longer than ``padlen``.

        Returns
        -------
        filtered : ndarray
            Or ``(filtered, affected)`` for ``edges='mark'``.

        Notes
        -----
        A recursive filter cannot skip samples, so missing samples are filled
        by linear interpolation between their finite neighbours for the
        computation only; the output is NaN again at every missing frame,
        and the samples within :attr:`edge_frames` of a gap are marked as
        affected.
        """
        check_choice(edges, "edges", EDGES)
        padlen = _check_padding(padtype, padlen)
        arr = as_traces(x, "x")
        missing = require_some_data(arr, "x")
        n, e = arr.shape[-1], self.edge_frames
        if edges == "trim" and 2 * e >= n:
            raise ValueError(f"edges='trim' would drop {e} frames at each end of a trace of {n} frames; "
                             f"use edges='mark' or a longer trace (more than {2 * e} frames)")
        filtered = self._run(arr, missing, padtype, padlen)
        if edges == "pad":
            return filtered
        if edges == "mark":
            return filtered, self._affected(missing)
        return filtered[..., e:n - e]

    def _run(self, arr: np.ndarray, missing: MissingFrames, padtype, padlen) -> np.ndarray:
        n = arr.shape[-1]
        if padtype is not None:
            padlen = self.default_padlen if padlen is None else padlen
            if n <= padlen:
                raise ValueError(
                    f"x has {n} frames but this filter pads {padlen} frames at each end and needs at "
                    f"least {padlen + 1} frames; use a longer trace, a smaller padlen, or a lower order")
        work = fill_gaps_linear(arr, missing.mask) if missing.any else arr
        if self.sos is not None:
            out = scipy.signal.sosfiltfilt(self.sos, work, axis=-1, padtype=padtype,
                                           padlen=padlen)
        else:
            out = scipy.signal.filtfilt(self.taps, [1.0], work, axis=-1, padtype=padtype,
                                        padlen=padlen)
        out = np.ascontiguousarray(out)
        if missing.any:
            out[missing.mask] = np.nan
        return out

    def _affected(self, missing: MissingFrames) -> np.ndarray:
        e = self.edge_frames
        affected = grow_mask(missing.mask, e)
        affected[..., :e] = True
        if e:
            affected[..., -e:] = True
        return affected


@dataclass(frozen=True, eq=False)
class FilterResult:
    """Result of :func:`zero_phase_filter`.

    Attributes
    ----------
    filtered : ndarray
        The zero-phase filtered trace(s), same shape as the input, NaN at
        missing frames.
    edge_mask : ndarray of bool
        True where the output is affected by an edge: within
        ``filter.edge_frames`` of either end or of a missing frame.
    filter : ZeroPhaseFilter
        The filter that was applied.
    missing : calcium._checks.MissingFrames
        The input samples that were NaN or inf.
    """

    filtered: np.ndarray
    edge_mask: np.ndarray
    filter: ZeroPhaseFilter
    missing: MissingFrames


def _check_cutoff(kind: str, cutoff_hz, frame_rate: float):
    nyquist = frame_rate / 2.0
    allowed = (f"in the open interval (0, {nyquist:g}) Hz, below the Nyquist frequency "
               f"frame_rate/2 = {nyquist:g} Hz")
    if kind in ("lowpass", "highpass"):
        if (isinstance(cutoff_hz, bool) or not isinstance(cutoff_hz, numbers.Real)
                or not (0.0 < cutoff_hz < nyquist)):
            raise ValueError(f"cutoff_hz for a {kind} filter must be one frequency {allowed}; "
                             f"got {cutoff_hz!r}")
        return float(cutoff_hz)
    try:
        low, high = (float(c) for c in cutoff_hz)
    except (TypeError, ValueError):
        raise ValueError(f"cutoff_hz for a {kind} filter must be a (low, high) pair of frequencies "
                         f"{allowed}; got {cutoff_hz!r}") from None
    if not (0.0 < low < high < nyquist):
        raise ValueError(f"cutoff_hz for a {kind} filter must be (low, high) with 0 < low < high < "
                         f"{nyquist:g} Hz (the Nyquist frequency frame_rate/2); got {cutoff_hz!r}")
    return (low, high)


def _half_power_points(filt: ZeroPhaseFilter) -> tuple[float, ...]:
    nyquist = filt.frame_rate / 2.0
    # A linear grid finds crossings anywhere; a logarithmic one finds those of
    # very low cutoffs (slow drift high-pass filters) that a linear grid skips.
    grid = np.unique(np.concatenate([np.linspace(0.0, nyquist, 4097),
                                     np.geomspace(nyquist * 1e-7, nyquist, 2049)]))
    excess = np.abs(filt._complex_response(grid)) ** 2 - _HALF_POWER_GAIN
    change = np.flatnonzero(np.sign(excess[:-1]) * np.sign(excess[1:]) < 0)
    points = []
    for i in change:
        points.append(scipy.optimize.brentq(
            lambda f: float(np.abs(filt._complex_response(f)[0]) ** 2 - _HALF_POWER_GAIN),
            grid[i], grid[i + 1], xtol=1e-12 * nyquist, rtol=1e-12))
    return tuple(float(p) for p in points)


def design_filter(kind, cutoff_hz, frame_rate, *, order=4, method="butterworth") -> ZeroPhaseFilter:
    """Design a filter for zero-phase (forward-backward) application.

    Parameters
    ----------
    kind : {'lowpass', 'highpass', 'bandpass', 'bandstop'}
    cutoff_hz : float or (float, float)
        Cutoff in Hz, strictly between 0 and the Nyquist frequency
        ``frame_rate / 2``; a (low, high) pair for band-pass and band-stop.
        Butterworth: the single-pass -3 dB point(s). FIR: the single-pass
        -6 dB point(s) (windowed-sinc convention).
    frame_rate : float
        Frames per second (Hz).
    order : int, optional
        Butterworth: the order ``N`` of :func:`scipy.signal.butter` (band
        filters have 2N poles). FIR: ``numtaps - 1``; must be even for
        high-pass and band-stop (a type I linear-phase filter is needed to
        pass the Nyquist frequency). FIR filters need far more than the
        default 4: several times ``frame_rate / transition width``.
    method : {'butterworth', 'fir'}, optional
        Butterworth IIR as second-order sections
        (``scipy.signal.butter(..., output='sos')``), or a Hamming-windowed
        sinc FIR (:func:`scipy.signal.firwin`).

    Returns
    -------
    ZeroPhaseFilter

    Notes
    -----
    Applied forward and backward, the filter has gain |H(f)|² and no phase
    shift: the effective order doubles, and the single-pass -3 dB point of a
    Butterworth filter becomes a -6 dB point. ``half_power_hz`` gives the
    -3 dB points of the zero-phase filter, found numerically (grid search and
    Brent's method on |H|² = 1/√2).

    ``edge_frames`` = half the effective order = ``order`` (common practice).
    It is exact for FIR; a Butterworth filter's transient lasts about as
    long as its impulse response, which for a low cutoff is many more
    samples (roughly ``frame_rate / cutoff_hz``). The default padding
    ('odd' extension plus steady-state initial conditions, as in
    :func:`scipy.signal.sosfiltfilt`) keeps that transient small for smooth
    traces.

    References
    ----------
    Butterworth S (1930), "On the theory of filter amplifiers", Wireless
    Engineer 7:536–541.
    Gustafsson F (1996), "Determining the initial states in forward-backward
    filtering", IEEE Transactions on Signal Processing 44(4):988–992.
    Oppenheim AV, Schafer RW (2010), Discrete-Time Signal Processing, 3rd ed.,
    Prentice Hall (zero-phase filtering; windowed FIR design).

    Examples
    --------
    >>> from calcium.signal import design_filter
    >>> lowpass = design_filter("lowpass", 2.0, 30.0, order=4)
    >>> lowpass.effective_order, lowpass.edge_frames
    (8, 4)
    >>> round(lowpass.half_power_hz[0], 3)   # below the 2 Hz single-pass -3 dB point
    1.797
    """
    check_choice(kind, "kind", KINDS)
    check_choice(method, "method", METHODS)
    frame_rate = check_frame_rate(frame_rate)
    order = check_int(order, "order", minimum=1)
    cutoff = _check_cutoff(kind, cutoff_hz, frame_rate)
    sos = taps = None
    if method == "butterworth":
        sos = scipy.signal.butter(order, cutoff, btype=kind, fs=frame_rate, output="sos")
    else:
        if kind in ("highpass", "bandstop") and order % 2:
            raise ValueError(f"order must be even for an FIR {kind} filter (numtaps = order + 1 must be "
                             f"odd so that the gain at the Nyquist frequency can be 1); got order={order}")
        taps = scipy.signal.firwin(order + 1, cutoff, fs=frame_rate, pass_zero=kind)
    draft = ZeroPhaseFilter(kind, cutoff, frame_rate, order, method, sos, taps, ())
    return ZeroPhaseFilter(kind, cutoff, frame_rate, order, method, sos, taps, _half_power_points(draft))


def zero_phase_filter(x, frame_rate, kind, cutoff_hz, *, order=4, method="butterworth", padtype="odd",
                      padlen=None) -> FilterResult:
    """Design a filter and apply it forwards and backwards to ``x``.

    Parameters
    ----------
    x : array_like, shape (frames,) or (rois, frames)
        NaN or inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    kind, cutoff_hz, order, method
        As in :func:`design_filter`.
    padtype, padlen
        As in :meth:`ZeroPhaseFilter.apply`.

    Returns
    -------
    FilterResult
        ``filtered`` (same shape as ``x``, NaN at missing frames),
        ``edge_mask``, ``filter`` and ``missing``.

    Notes
    -----
    Missing samples are linearly interpolated for the computation only and
    are NaN again in the output; see :meth:`ZeroPhaseFilter.apply`.

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal import zero_phase_filter
    >>> x = np.random.default_rng(0).normal(size=(3, 600))
    >>> result = zero_phase_filter(x, 30.0, "lowpass", 5.0)
    >>> result.filtered.shape, int(result.edge_mask[0].sum())
    ((3, 600), 8)
    """
    filt = design_filter(kind, cutoff_hz, frame_rate, order=order, method=method)
    padlen = _check_padding(padtype, padlen)
    arr = as_traces(x, "x")
    missing = require_some_data(arr, "x")
    filtered = filt._run(arr, missing, padtype, padlen)
    return FilterResult(filtered=filtered, edge_mask=filt._affected(missing), filter=filt, missing=missing)


@dataclass(frozen=True, eq=False)
class DetrendResult:
    """Result of :func:`detrend`.

    Attributes
    ----------
    detrended : ndarray
        The trace(s) without the slow trend, same shape as the input, NaN at
        missing frames. 'highpass': the high-pass filtered trace (centred on
        zero). 'exponential': the input divided by the fitted bleaching curve
        normalised to its value at the first frame (keeps the input's units).
    trend : ndarray
        What was removed: the low-frequency part (input − detrended) for
        'highpass', the fitted curve a·exp(−t/τ) + c at every frame for
        'exponential'.
    method : str
        'highpass' or 'exponential'.
    missing : calcium._checks.MissingFrames
        The input samples that were NaN or inf.
    cutoff_hz : float or None
        High-pass cutoff ('highpass' only).
    amplitude, time_constant_s, offset : float or ndarray or None
        Fitted a, τ (seconds) and c per ROI ('exponential' only; floats for
        1-D input).
    """

    detrended: np.ndarray
    trend: np.ndarray
    method: str
    missing: MissingFrames
    cutoff_hz: float | None = None
    amplitude: float | np.ndarray | None = None
    time_constant_s: float | np.ndarray | None = None
    offset: float | np.ndarray | None = None


def _bleaching(t, amplitude, time_constant_s, offset):
    return amplitude * np.exp(-t / time_constant_s) + offset


def _curve_fit(t_s, values, guess, bounds, roi):
    try:
        with warnings.catch_warnings():
            # A flat trace leaves τ undetermined; the covariance is not used.
            warnings.simplefilter("ignore", scipy.optimize.OptimizeWarning)
            params, _ = scipy.optimize.curve_fit(_bleaching, t_s, values, p0=guess, bounds=bounds,
                                                 method="trf", maxfev=5000)
    except (RuntimeError, ValueError) as exc:
        raise ValueError(f"the exponential bleaching fit did not converge for {roi} ({exc}); "
                         f"try method='highpass'") from None
    return params


def _fit_bleaching(knot_s, envelope, duration_s: float, roi: str):
    """Fit a·exp(−t/τ) + c to the lower envelope of one trace."""
    tenth = max(1, envelope.size // 10)
    start, end = float(np.median(envelope[:tenth])), float(np.median(envelope[-tenth:]))
    bounds = ([-np.inf, 1e-3 * duration_s, -np.inf], [np.inf, 1e3 * duration_s, np.inf])
    guess = (start - end, duration_s / 3.0, end)
    return _curve_fit(knot_s, envelope, guess, bounds, roi)


def detrend(x, frame_rate, *, method="highpass", cutoff_hz=0.01, order=2, window_s=60.0, percentile=8.0,
            smooth_s=1.0) -> DetrendResult:
    """Remove slow drift or bleaching from trace(s).

    Parameters
    ----------
    x : array_like, shape (frames,) or (rois, frames)
        NaN or inf mark missing frames.
    frame_rate : float
        Frames per second (Hz).
    method : {'highpass', 'exponential'}, optional
        'highpass': zero-phase Butterworth high-pass at ``cutoff_hz`` of
        order ``order`` (see :func:`design_filter`); removes every component
        slower than the cutoff, the mean included.
        'exponential': fit a bleaching curve a·exp(−t/τ) + c to the lower
        envelope of each trace and divide it out.
    cutoff_hz : float, optional
        High-pass cutoff ('highpass'). Keep it well below the frequencies of
        the transients (0.01 Hz = 100 s period by default).
    order : int, optional
        High-pass order ('highpass').
    window_s, percentile, smooth_s : float, optional
        The lower envelope for 'exponential' is the running baseline of
        :func:`calcium.signal.delta_f_over_f` with these settings.

    Returns
    -------
    DetrendResult

    Notes
    -----
    'exponential' fits the curve with :func:`scipy.optimize.curve_fit` to
    the lower envelope of each trace, not to the trace itself, so that
    transients do not pull the fit up. The envelope is the running low
    percentile of the smoothed trace (as F0 in
    :func:`calcium.signal.delta_f_over_f`, sampled every ``window_s / 20``)
    plus two passes over the residual that remove most of the lag of a
    running percentile behind a falling trace. It lies below the mean baseline by
    about 1.4 standard deviations of the smoothed noise (8th percentile of
    Gaussian noise), so the fitted offset ``c`` carries that bias too.
    Bleaching scales all fluorescence, transients included, so
    the trend is removed by division: ``detrended = x · fit(0) / fit(t)``.
    The fitted curve must therefore stay positive; traces centred on zero
    (ΔF/F) should use 'highpass'. Missing frames are left out of the fit and
    are NaN in the output.

    References
    ----------
    The exponential model of photobleaching is common practice.

    Examples
    --------
    >>> import numpy as np
    >>> from calcium.signal import detrend
    >>> t = np.arange(18000) / 30.0
    >>> raw = 50.0 * np.exp(-t / 200.0) + 100.0
    >>> result = detrend(raw, 30.0, method="exponential")
    >>> bool(abs(result.time_constant_s - 200.0) < 2.0)
    True
    >>> bool(np.ptp(result.detrended) < 0.001 * raw[0])   # flat after division
    True
    """
    frame_rate = check_frame_rate(frame_rate)
    check_choice(method, "method", ("highpass", "exponential"))
    arr = as_traces(x, "x")
    missing = require_some_data(arr, "x")
    if method == "highpass":
        cutoff_hz = check_positive(cutoff_hz, "cutoff_hz")
        filt = design_filter("highpass", cutoff_hz, frame_rate, order=order)
        detrended = filt._run(arr, missing, "odd", None)
        return DetrendResult(detrended=detrended, trend=arr - detrended, method=method, missing=missing,
                             cutoff_hz=cutoff_hz)

    window_s, percentile, smooth_s = _check_baseline_args(window_s, percentile, smooth_s)

    n = arr.shape[-1]
    rows = arr.reshape(-1, n)
    knot_s, envelope = _lower_envelope(rows, frame_rate, window_s=window_s, percentile=percentile,
                                       smooth_s=smooth_s)
    duration_s = n / frame_rate
    t_s = np.arange(n) / frame_rate
    params = np.empty((rows.shape[0], 3))
    trend = np.empty_like(rows)
    for i in range(rows.shape[0]):
        roi = "the trace" if arr.ndim == 1 else f"ROI {i}"
        if envelope.shape[1] < 3:
            raise ValueError(f"x is too short for an exponential fit with window_s={window_s:g}: "
                             f"{envelope.shape[1]} envelope point(s), need at least 3")
        params[i] = _fit_bleaching(knot_s, envelope[i], duration_s, roi)
        trend[i] = _bleaching(t_s, *params[i])
        if not (trend[i] > 0).all():
            raise ValueError(f"the fitted bleaching curve of {roi} is not positive everywhere "
                             f"(minimum {trend[i].min():.4g}); 'exponential' divides by it, so it needs "
                             f"raw fluorescence. Use method='highpass' for traces centred on zero.")
    detrended = rows * (trend[:, :1] / trend)
    detrended[missing.mask.reshape(rows.shape)] = np.nan
    if arr.ndim == 1:
        fitted = dict(amplitude=float(params[0, 0]), time_constant_s=float(params[0, 1]),
                      offset=float(params[0, 2]))
    else:
        fitted = dict(amplitude=params[:, 0].copy(), time_constant_s=params[:, 1].copy(),
                      offset=params[:, 2].copy())
    return DetrendResult(detrended=detrended.reshape(arr.shape), trend=trend.reshape(arr.shape),
                         method=method, missing=missing, **fitted)
