r"""Spike inference from a ΔF/F trace: :func:`infer_spikes`.

The steps (each documented in its own module):

1. missing frames (NaN/inf) get weight 0 and are reported;
2. a saturating kernel's nonlinearity is inverted (:meth:`Kernel.unsaturate`);
3. the noise level, the AR coefficients of the calcium dynamics and the
   penalty are taken from the arguments or estimated
   (:mod:`calcium.infer.estimate`);
4. the exact non-negative deconvolution (:mod:`calcium.infer.ar`; kernels
   with a slow component go through :func:`calcium.infer.convex.deconvolve_convex`);
5. the activity is refitted without penalty on its support, converted to
   spikes with the size of one spike and placed at sub-frame times
   (:mod:`calcium.infer.counts`).
"""
from __future__ import annotations

from dataclasses import dataclass

import math

import numpy as np
from numba import njit

from .._checks import (MissingFrames, as_traces, check_dff_like, check_frame_rate, check_int, check_positive,
                       require_some_data)
from ._driver import check_baseline, check_penalty, objective, prepare_weights, reused_workspace, solve
from .counts import SpikeUnit, spike_unit_of, event_noise_size, event_sizes, events_to_spikes, merge_gap_frames, \
    quantal_size
from .estimate import MAX_KINETICS_FRAMES, estimate_kinetics, search_penalty, estimate_noise_sd, signal_detected

__all__ = ["SpikeInference", "infer_spikes", "infer_spikes_many", "recount"]

# Smallest size of a counted event in standard deviations of its size estimate.
_MIN_EVENT_Z = 2.5


@dataclass(frozen=True)
class SpikeInference:
    """Result of :func:`infer_spikes`.

    Attributes
    ----------
    activity : ndarray of float, shape (T,)
        Inferred number of spikes per frame (deconvolved activity divided by
        the size of one spike, refitted without penalty, shifted by the
        kernel's lag so that frame k holds the spikes near time k /
        frame_rate).
    spike_times : ndarray of float
        Spike times in seconds from the first frame, one entry per spike (a
        frame with two spikes gives two entries), sorted.
    spike_counts : ndarray of int, shape (T,)
        Spikes per frame (spike times rounded to the nearest frame).
    denoised : ndarray of float, shape (T,)
        The fitted ΔF/F (baseline plus calcium, saturated again for a
        saturating kernel); defined at missing frames too.
    baseline : float
        Fitted or given baseline (in the linear, unsaturated domain).
    noise_sd : float
        Noise standard deviation used (given or estimated).
    kernel : Kernel or None
        The single-spike kernel used (given, from the indicator table, or
        estimated; its amplitude is the ΔF/F of one spike).  None when it
        could not be estimated (a trace without any signal).
    penalty : float
        The penalty of the deconvolution.
    converged : bool
        The deconvolution's optimality conditions were verified.
    objective : float
        Objective of the penalised deconvolution at its solution.
    iterations : int
        Passes/solves of the deconvolution, penalty search included.
    missing : MissingFrames
        The missing frames of the input.
    coefficients : ndarray
        AR coefficients of the deconvolution (empty for the convex path).
    spike_size : float
        Activity units (calcium jump) per spike, used to count spikes;
        0 when unknown.
    """

    activity: np.ndarray
    spike_times: np.ndarray
    spike_counts: np.ndarray
    denoised: np.ndarray
    baseline: float
    noise_sd: float
    kernel: object
    penalty: float
    converged: bool
    objective: float
    iterations: int
    missing: MissingFrames
    coefficients: np.ndarray
    spike_size: float

    @property
    def n_spikes(self) -> int:
        """Total number of inferred spikes."""
        return int(self.spike_times.size)


def _resolve_kernel(kernel, indicator, spike_size):
    from ..kernel import Kernel

    if kernel is not None and indicator is not None:
        raise ValueError("give at most one of kernel and indicator")
    if kernel is not None and not isinstance(kernel, Kernel):
        raise ValueError(f"kernel must be a calcium.kernel.Kernel, got {type(kernel).__name__}")
    if indicator is not None:
        kernel = Kernel.from_indicator(indicator)
    if kernel is not None and spike_size is not None:
        kernel = kernel.scaled(spike_size)
    return kernel


def _shift(activity: np.ndarray, lag: int) -> np.ndarray:
    """activity moved ``lag`` frames earlier, in place (zeros at the end)."""
    if lag > 0:
        _shift_in_place(activity, lag)
    return activity


@njit(cache=True)
def _shift_in_place(x, lag):
    T = x.shape[0]
    for t in range(T):
        x[t] = x[t + lag] if t + lag < T else 0.0


def _nothing_found(y, frame_rate, missing, kernel, noise_sd, baseline_value, coefficients):
    T = y.size
    return SpikeInference(activity=np.zeros(T), spike_times=np.zeros(0), spike_counts=np.zeros(T, np.int64),
                          denoised=np.full(T, baseline_value), baseline=float(baseline_value),
                          noise_sd=float(noise_sd), kernel=kernel, penalty=0.0, converged=True, objective=0.0,
                          iterations=0, missing=missing, coefficients=np.asarray(coefficients, dtype=np.float64),
                          spike_size=0.0)


def infer_spikes(trace, frame_rate, *, kernel=None, indicator=None, noise_sd=None, penalty=None, baseline="fit",
                 spike_size=None, order=2, threshold=0.5, allow_raw=False) -> SpikeInference:
    r"""Infer when and how many spikes occurred from one ΔF/F trace.

    Parameters
    ----------
    trace : array_like, shape (T,)
        ΔF/F, T >= 3; NaN/inf frames are missing (ignored and reported).
    frame_rate : float
        Hz.
    kernel : Kernel, optional
        Single-spike response.  A kernel with a slow decay component is
        deconvolved by the general convex solver (slower).
    indicator : str, optional
        Name of a tabulated indicator (see :mod:`calcium.indicators`); its
        kernel is used.  Give at most one of ``kernel`` and ``indicator``.
        With neither, the kinetics are estimated from the trace (AR model of
        ``order``) and the size of one spike from the event sizes.
    noise_sd : float, optional
        Noise s.d. of the trace (ΔF/F units); estimated from its spectrum
        when not given (needs >= 16 frames).
    penalty : float, optional
        Sparsity penalty; by default chosen so that the residual matches the
        noise.
    baseline : float or "fit", default "fit"
    spike_size : float, optional
        ΔF/F (peak) of one spike; overrides the kernel's amplitude, and the
        estimate from event sizes.
    order : {1, 2}, default 2
        AR order of estimated kinetics (no kernel given).
    threshold : float, default 0.5
        Events smaller than this many spikes are dropped; larger ones are
        rounded to the nearest whole number.
    allow_raw : bool, default False
        A trace whose values look like raw fluorescence rather than ΔF/F
        (:func:`calcium._checks.check_dff_like`: ninety per cent of it above
        1, where ΔF/F sits near 0 at rest) is refused unless this is True.

    Returns
    -------
    SpikeInference

    Raises
    ------
    ValueError
        For bad arguments, a trace that is not 1-D, shorter than 3 frames or
        all missing, or a bad frame rate.

    Notes
    -----
    The deconvolution is the non-negative sparse model of Vogelstein et al.
    (2010), solved exactly by the active-set pool-adjacent-violators method
    of Friedrich, Zhou & Paninski (2017) (see
    :func:`calcium.infer.ar.deconvolve_ar`).  Spike counts come from the
    events refitted without penalty (the L1 penalty shrinks them), divided
    by the activity of one spike and rounded; an event must also exceed 2.5
    standard deviations of its own size estimate.  The spikes of an event
    (activity in nearby frames, merged) sit at the quantiles of its
    activity, shifted by the kernel's mean lag (:func:`counts.spike_unit`).

    References
    ----------
    .. [1] Vogelstein, J. T. et al. (2010). J. Neurophysiol. 104, 3691-3704.
    .. [2] Friedrich, J., Zhou, P. & Paninski, L. (2017). PLoS Comput. Biol.
       13(3), e1005423.
    .. [3] Pnevmatikakis, E. A. et al. (2016). Neuron 89, 285-299.

    Examples
    --------
    >>> from calcium.forward import simulate_recording
    >>> rec = simulate_recording(1, 60.0, 30.0, indicator="GCaMP6s", rate_hz=0.5, noise_sd=0.04, seed=2)
    >>> result = infer_spikes(rec.dff[0], 30.0, indicator="GCaMP6s")
    >>> abs(result.n_spikes - rec.spike_times[0].size) <= 3
    True
    """
    y = as_traces(trace, "trace")
    if y.ndim != 1:
        raise ValueError(f"trace must be one trace of shape (frames,), got shape {y.shape}; "
                         "use infer_spikes_many for (rois, frames)")
    frame_rate = check_frame_rate(frame_rate)
    if y.size < 3:
        raise ValueError(f"trace must have at least 3 frames, got {y.size}")
    missing = require_some_data(y, "trace")
    kernel = _resolve_kernel(kernel, indicator, None if spike_size is None else check_positive(spike_size,
                                                                                                "spike_size"))
    if penalty is not None:
        penalty = check_penalty(penalty)
    baseline = check_baseline(baseline)
    order = check_int(order, "order", minimum=1, maximum=2)
    threshold = check_positive(threshold, "threshold")
    observed = y[~missing.mask] if missing.any else y
    if noise_sd is not None:
        noise_sd = check_positive(noise_sd, "noise_sd")

    # a constant trace: nothing to infer (and no spectrum to read the noise from)
    if np.ptp(observed) == 0.0:
        level = float(observed[0]) if not isinstance(baseline, float) else baseline
        return _nothing_found(y, frame_rate, missing, kernel, noise_sd or 0.0, level,
                              kernel.ar_coefficients(frame_rate) if kernel is not None and
                              not kernel.has_slow_component else np.zeros(0))

    if not allow_raw:  # (after the constant trace: a flat 0 is ΔF/F without events, not a 0/1 raster)
        check_dff_like(y, "trace")

    # work in the kernel's linear domain
    y_lin = y
    frame_weights = None
    if kernel is not None and not kernel.is_linear:
        y_lin = np.where(missing.mask, np.nan, kernel.unsaturate(np.where(missing.mask, 0.0, y), clip=True))
        # the noise grows where the indicator saturates: sigma / saturate'(x) in the linear domain, so weight
        # each frame by saturate'(x)^2 (1 at rest, where the saturation's slope is 1)
        slope = _saturation_slope(kernel, np.where(missing.mask, 0.0, y_lin))
        frame_weights = np.where(missing.mask, 0.0, slope ** 2)
    if noise_sd is None:
        noise_sd = estimate_noise_sd(y_lin, frame_rate)
        if not noise_sd > 0:
            level = float(np.median(observed)) if isinstance(baseline, str) else baseline
            return _nothing_found(y, frame_rate, missing, kernel, 0.0, level, np.zeros(0))

    if kernel is not None and kernel.has_slow_component:
        return _infer_convex(y, y_lin, frame_rate, kernel, noise_sd, penalty, baseline, missing, threshold,
                             frame_weights)

    if frame_weights is None and not missing.any:
        # (every frame finite, no weights: what prepare_weights returns, without a second finiteness pass)
        yc, w, unit_w, n_obs = y_lin, np.ones(0), True, y_lin.size
    else:
        yc, w, unit_w, n_obs = prepare_weights(y_lin, frame_weights)
    lam_hint = b_hint = None
    if kernel is not None:
        g = kernel.ar_coefficients(frame_rate)
    else:
        if not signal_detected(y_lin, noise_sd):
            # nothing but noise: no kinetics to estimate and no spike to find
            level = float(np.mean(observed)) if isinstance(baseline, str) else baseline
            return _nothing_found(y, frame_rate, missing, None, noise_sd, level, np.zeros(0))
        g, (lam_hint, b_hint) = estimate_kinetics(y_lin, frame_rate, order, noise_sd, None, True, None,
                                                   MAX_KINETICS_FRAMES)
    # penalised deconvolution, then the refit; one scratch space for both (the trace's filtered copy and data
    # scale are shared), reused by the next call
    with reused_workspace(yc.size) as work:
        return _deconvolve_and_count(y, yc, w, unit_w, n_obs, frame_rate, g, kernel, noise_sd, penalty, baseline,
                                     spike_size, threshold, missing, lam_hint, b_hint, work)


def _deconvolve_and_count(y, yc, w, unit_w, n_obs, frame_rate, g, kernel, noise_sd, penalty, baseline, spike_size,
                          threshold, missing, lam_hint, b_hint, work):
    """The penalised deconvolution, its refit on the support and the spike counts (see infer_spikes)."""
    # (the arrays of a solve are the work's own until its next solve: used before that)
    if penalty is None:
        # (the penalty and baseline found on the block where the kinetics were estimated are good first guesses)
        lam, c, s, b, its, conv, _, _, _ = search_penalty(yc, w, unit_w, g, noise_sd, baseline, n_obs,
                                                           start=lam_hint, b0=b_hint, work=work, copy=False)
    else:
        lam = penalty
        c, s, b, its, conv = solve(yc, w, unit_w, g, lam, baseline, 0.0, work=work, copy=False)
    objective_value = float(objective(yc, w, unit_w, lam, b, c, s))

    # refit without penalty on the support (undo the shrinkage)
    support = s > 0
    if support.any():
        c_fit, s_fit, b_fit, its_fit, _ = solve(yc, w, unit_w, g, 0.0, baseline, 0.0, b0=b, support=support,
                                                allowed=support, work=work, copy=False)
        its += its_fit
    else:
        c_fit, s_fit, b_fit = c, s, b

    # least-squares size of a one-frame event in the noise (activity units): the smallest quantum that counts,
    # and the yardstick of each event's own z
    noise_size = event_noise_size(g, noise_sd, yc.size)

    # size of one spike
    from ..kernel import Kernel

    if kernel is None:
        shape = Kernel.from_ar_coefficients(g, frame_rate, amplitude=1.0)
        per_amplitude = spike_unit_of(shape, frame_rate, g)
        if spike_size is not None:
            kernel = shape.scaled(spike_size)
            unit = SpikeUnit(per_amplitude.size * spike_size, per_amplitude.lag_frames, per_amplitude.spread)
        else:
            sizes = event_sizes(s_fit, merge_gap=merge_gap_frames(shape, frame_rate))
            q = quantal_size(sizes, min_size=3.0 * noise_size)
            if q is None:
                denoised = _denoised(kernel, b_fit, c_fit)
                res = _nothing_found(y, frame_rate, missing, None, noise_sd, b_fit, g)
                return _replace(res, denoised=denoised, penalty=lam, converged=conv, objective=objective_value,
                                iterations=its)
            amplitude = q / per_amplitude.size
            kernel = shape.scaled(amplitude)
            unit = SpikeUnit(q, per_amplitude.lag_frames, per_amplitude.spread)
    else:
        unit = spike_unit_of(kernel, frame_rate, g)

    activity = s_fit / unit.size
    # an event must also stand out of the noise of its own size (z >= 2.5)
    size_noise = noise_size / unit.size
    spike_times, spike_counts = events_to_spikes(activity, frame_rate, lag_frames=unit.lag_frames,
                                                 threshold=max(threshold, _MIN_EVENT_Z * size_noise),
                                                 merge_gap=merge_gap_frames(kernel, frame_rate))
    lag = int(round(unit.lag_frames))
    return SpikeInference(activity=_shift(activity, lag), spike_times=spike_times, spike_counts=spike_counts,
                          denoised=_denoised(kernel, b_fit, c_fit), baseline=float(b_fit), noise_sd=float(noise_sd),
                          kernel=kernel, penalty=float(lam), converged=bool(conv), objective=objective_value,
                          iterations=int(its), missing=missing, coefficients=np.asarray(g, dtype=np.float64),
                          spike_size=float(unit.size))


def _saturation_slope(kernel, linear):
    """d saturate / d x at the linear ΔF/F values (central difference)."""
    step = 1e-6 * max(kernel.amplitude, 1e-12)
    low = kernel.saturate_domain_min
    lo = np.maximum(linear - step, low * (1 - 1e-9))
    hi = np.maximum(linear + step, lo + step)
    return (kernel.saturate(hi) - kernel.saturate(lo)) / (hi - lo)


def _replace(result: SpikeInference, **changes) -> SpikeInference:
    import dataclasses

    return dataclasses.replace(result, **changes)


def _denoised(kernel, b, c):
    linear = b + c
    if kernel is None or kernel.is_linear:
        return linear
    low = kernel.saturate_domain_min
    return kernel.saturate(np.maximum(linear, low * (1 - 1e-9)))


def _infer_convex(y, y_lin, frame_rate, kernel, noise_sd, penalty, baseline, missing, threshold, weights):
    """Kernels with a slow component: the general convex solver (AR(3) and beyond)."""
    from .convex import deconvolve_convex

    res = deconvolve_convex(y_lin, kernel, frame_rate=frame_rate, penalty=penalty,
                            noise_sd=None if penalty is not None else noise_sd, baseline=baseline, weights=weights)
    s = res.spikes
    # spikes below a rounding level of the interior-point solver are zeros of the exact solution
    support = s > 1e-7 * max(float(s.max()), 1e-300)
    fit = _convex_refit(y_lin, kernel, frame_rate, baseline, support, weights) if support.any() else res
    # the convolution uses the kernel's own samples (amplitude included): activity is close to spikes
    unit = _convex_unit(kernel, frame_rate)
    activity = fit.spikes / unit.size
    # as on the AR path, an event must stand out of the noise of its own least-squares size (z >= 2.5)
    h = kernel.impulse_response(frame_rate, y.size)
    size_noise = float(noise_sd) / math.sqrt(float(h @ h)) / unit.size
    times, counts = events_to_spikes(activity, frame_rate, lag_frames=unit.lag_frames,
                                     threshold=max(threshold, _MIN_EVENT_Z * size_noise),
                                     merge_gap=merge_gap_frames(kernel, frame_rate))
    return SpikeInference(activity=_shift(activity, int(round(unit.lag_frames))), spike_times=times,
                          spike_counts=counts, denoised=_denoised(kernel, fit.baseline, fit.calcium),
                          baseline=float(fit.baseline), noise_sd=float(noise_sd), kernel=kernel,
                          penalty=float(res.penalty), converged=bool(res.converged), objective=float(res.objective),
                          iterations=1, missing=missing, coefficients=np.zeros(0), spike_size=float(unit.size))


def _convex_refit(y, kernel, frame_rate, baseline, support, weights=None):
    """Least squares without the penalty, spikes allowed only on ``support`` (sparse design matrix)."""
    import cvxpy as cp
    import scipy.sparse

    from .convex import ConvexDeconvolution

    yc, w, unit_w, _ = prepare_weights(np.asarray(y, dtype=np.float64), weights)
    T = yc.size
    w = np.ones(T) if unit_w else w
    cols = np.flatnonzero(support)
    h = kernel.impulse_response(frame_rate, T)
    # columns are shifted copies of the kernel, cut where it has decayed below 1e-12 of its peak
    significant = np.flatnonzero(np.abs(h) > 1e-12 * np.abs(h).max())
    h = h[:significant[-1] + 1]
    rows = [np.arange(t, min(T, t + h.size)) for t in cols]
    K = scipy.sparse.csc_matrix((np.concatenate([h[:r.size] for r in rows]), np.concatenate(rows),
                                 np.concatenate([[0], np.cumsum([r.size for r in rows])])), shape=(T, cols.size))
    u = cp.Variable(cols.size, nonneg=True)
    b = cp.Variable() if baseline == "fit" else float(baseline)
    problem = cp.Problem(cp.Minimize(0.5 * cp.sum_squares(cp.multiply(np.sqrt(w), yc - b - K @ u))))
    problem.solve(solver=cp.CLARABEL)
    spikes = np.zeros(T)
    spikes[cols] = np.maximum(np.asarray(u.value), 0.0)
    calcium = K @ spikes[cols]
    b_val = float(b.value) if baseline == "fit" else float(baseline)
    return ConvexDeconvolution(calcium=calcium, spikes=spikes, baseline=b_val, penalty=0.0,
                               objective=float(problem.value), status=str(problem.status),
                               converged=problem.status == "optimal", noise_constrained=False)


def _convex_unit(kernel, frame_rate) -> SpikeUnit:
    """Activity of one spike when the kernel itself is the convolution (no AR filter): its sampled peak."""
    # With c = K s and K the kernel's own samples, a spike at sub-frame position d shows as activity split
    # over the frames around it; its total is close to 1 spike per unit amplitude of the sampled kernel.
    J = 2
    frames = np.arange(J + 6)
    sizes, lags = [], []
    h = kernel.impulse_response(frame_rate, J + 6)
    for d in (np.arange(32) + 0.5) / 32:
        spike = J - d
        x = kernel.evaluate((frames - spike) / frame_rate)
        # least-squares split of x onto two frame-locked kernels at J and J + 1
        A = np.zeros((frames.size, 2))
        A[J:, 0] = h[:frames.size - J]
        A[J + 1:, 1] = h[:frames.size - J - 1]
        coef, *_ = np.linalg.lstsq(A, x, rcond=None)
        total = float(coef.sum())
        sizes.append(total)
        lags.append(float((J * coef[0] + (J + 1) * coef[1]) / total) - spike)
    sizes = np.array(sizes)
    return SpikeUnit(float(sizes.mean()), float(np.mean(lags)), float(sizes.std() / sizes.mean()))


def infer_spikes_many(traces, frame_rate, *, kernel=None, indicator=None, noise_sd=None, penalty=None,
                      baseline="fit", spike_size=None, order=2, threshold=0.5, allow_raw=False,
                      progress=False) -> list:
    """:func:`infer_spikes` for each row of ``traces`` (rois, frames), each ROI on its own.

    Each ROI is counted with its own guessed single-spike size unless
    ``kernel``, ``indicator`` with ``spike_size``, or ``spike_size`` give it:
    for the counts of a session, :func:`calcium.infer_session` calibrates
    the ROIs together and flags the counts it cannot trust.

    Parameters
    ----------
    traces : array_like, shape (rois, frames) or (frames,)
    frame_rate : float
    kernel, indicator, baseline, order, threshold, allow_raw
        As in :func:`infer_spikes`, the same for every ROI.
    noise_sd, penalty, spike_size : float or array_like of shape (rois,), optional
        As in :func:`infer_spikes`: one value for every ROI, or one per ROI.
    progress : bool, default False
        Show a progress bar (tqdm).

    Returns
    -------
    list of SpikeInference
        One per ROI, in order.
    """
    options = dict(kernel=kernel, indicator=indicator, noise_sd=noise_sd, penalty=penalty, baseline=baseline,
                   spike_size=spike_size, order=order, threshold=threshold, allow_raw=allow_raw)
    x = as_traces(traces, "traces")
    frame_rate = check_frame_rate(frame_rate)
    rows = x.reshape(-1, x.shape[-1])
    per_roi = {}
    for key in ("noise_sd", "penalty", "spike_size"):
        value = options.get(key)
        if value is not None and np.ndim(value) == 1:
            value = np.asarray(value, dtype=np.float64)
            if value.size != rows.shape[0]:
                raise ValueError(f"{key} must be one value or one per ROI ({rows.shape[0]}), got {value.size}")
            per_roi[key] = value
    iterator = range(rows.shape[0])
    if progress:
        from tqdm import tqdm

        iterator = tqdm(iterator, desc="inferring spikes", unit="ROI")
    results = []
    for i in iterator:
        kw = dict(options)
        for key, value in per_roi.items():
            kw[key] = float(value[i])
        results.append(infer_spikes(rows[i], frame_rate, **kw))
    return results


def recount(result: SpikeInference, frame_rate, spike_size, *, threshold=0.5) -> SpikeInference:
    """The same deconvolution counted with another single-spike size.

    The deconvolution does not depend on the size of one spike (the penalty
    is matched to the noise, not to the kernel's amplitude): only the
    counting does.  ``recount`` turns the activity of ``result`` into whole
    spikes as :func:`infer_spikes` would have with ``spike_size``, without
    solving again (the session calibration uses it to count a trace at the
    size it estimated from that trace's own events).

    Parameters
    ----------
    result : SpikeInference
        A result of :func:`infer_spikes` with a kernel without a slow
        component (the AR path).
    frame_rate : float
        Hz, as given to :func:`infer_spikes`.
    spike_size : float
        ΔF/F (peak) of one spike.
    threshold : float, default 0.5
        As in :func:`infer_spikes`.

    Returns
    -------
    SpikeInference
        ``activity``, ``spike_times``, ``spike_counts``, ``kernel`` and
        ``spike_size`` for the new size; the fit itself is unchanged.

    Notes
    -----
    ``result.activity`` is already moved by the kernel's lag (whole
    frames), so the activity of the first ``round(lag)`` frames, which
    :func:`infer_spikes` counts as spikes at time 0, is no longer there:
    such a spike at the very start is not counted again.
    """
    frame_rate = check_frame_rate(frame_rate)
    spike_size = check_positive(spike_size, "spike_size")
    threshold = check_positive(threshold, "threshold")
    if result.kernel is None or result.coefficients.size == 0:
        raise ValueError("recount needs a result of the AR path with a kernel (a kernel without a slow component); "
                         "this result has none")
    factor = result.kernel.amplitude / spike_size
    kernel = result.kernel.scaled(spike_size)
    g = result.coefficients
    unit = spike_unit_of(kernel, frame_rate, g)
    activity = result.activity * factor
    size_noise = event_noise_size(g, result.noise_sd, activity.size) / unit.size if result.noise_sd > 0 else 0.0
    lag = int(round(unit.lag_frames))
    # (the activity is already moved lag frames earlier: only the rest of the mean lag is left to take off)
    times, counts = events_to_spikes(activity, frame_rate, lag_frames=unit.lag_frames - lag,
                                     threshold=max(threshold, _MIN_EVENT_Z * size_noise),
                                     merge_gap=merge_gap_frames(kernel, frame_rate))
    return _replace(result, activity=activity, spike_times=times, spike_counts=counts, kernel=kernel,
                    spike_size=float(unit.size))
