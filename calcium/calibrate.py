r"""Session calibration: the kinetics a session's ROIs share and the size of one spike in each ROI.

Counting spikes needs the ΔF/F of one spike.  It differs between cells
(expression, optics) by a factor of two or more, and the indicator's
kinetics in a given preparation differ from the published table; a count
made with a guessed size is off by the ratio of the guess to the truth.
All ROIs of a session share one indicator, so the kinetics are pooled over
the session, and each ROI's size is estimated from its own events and then
shrunk towards the session's distribution of sizes.

Sources, best first:

* **paired**: ROIs with electrically recorded spikes.  Each is fitted with
  :func:`calcium.fit.fit_kernel` (through the forward model: overlapping
  responses are summed, busy cells need no isolated spikes); the session
  kinetics are the medians of the usable fits, and the paired ROIs' sizes
  make the prior of the others' sizes.
* **blind**: the kinetics are pooled over the ROIs where they are well
  determined (the AR estimate of :func:`calcium.infer_spikes`, median over
  up to ``max_kinetics_rois`` ROIs with the clearest signal; their number
  and spread are reported), and each ROI's size comes from its events as a
  mixture of whole-spike quanta plus noise
  (:func:`calcium.infer.quantal.fit_quantal_mixture`, the classical
  quantal analysis of del Castillo & Katz 1954 [1]_), combined across ROIs
  by empirical Bayes (a log-normal distribution of sizes across ROIs whose
  mean and spread maximise the marginal likelihood, Robbins 1956 [2]_,
  Efron & Morris 1975 [3]_).  A named indicator adds its published
  single-spike ΔF/F as a weak prior on the session's mean size.
* **indicator** / **given**: a fixed kernel (table or user values); sizes
  are not estimated and counts carry no interval.

Every ROI gets a size with a 90 % interval, a count interval that follows
from it, and ``calibrated = False`` with a reason in plain words when the
size cannot be identified (no single-spike quantum clearly above the noise,
too few events, an interval wider than a factor 1.5, a size far from the
session's or the indicator's range).

References
----------
.. [1] del Castillo, J. & Katz, B. (1954). Quantal components of the
   end-plate potential. J. Physiol. 124, 560-573.
.. [2] Robbins, H. (1956). An empirical Bayes approach to statistics.
   Proc. Third Berkeley Symp. Math. Statist. Prob. 1, 157-163.
.. [3] Efron, B. & Morris, C. (1975). Data analysis using Stein's estimator
   and its generalizations. J. Am. Stat. Assoc. 70, 311-319.
.. [4] Chen, T.-W. et al. (2013). Ultrasensitive fluorescent proteins for
   imaging neuronal activity. Nature 499, 295-300 (single-spike ΔF/F
   varies several-fold between cells).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ._checks import as_traces, check_choice, check_frame_rate, check_int
from .kernel import Kernel

__all__ = ["SessionCalibration", "CalibratedInference", "RoiCount", "calibrate_session", "count_roi", "infer_session",
           "load_calibration", "CALIBRATION_SOURCES"]

CALIBRATION_SOURCES = ("paired", "blind", "indicator", "given")

#: Smallest spread (s.d. of the natural log) of single-spike sizes across a session's ROIs that the empirical
#: Bayes prior may take: Chen et al. 2013 (Fig. 3, from memory) show single-spike ΔF/F varying about two-fold
#: between cells of one indicator, a log s.d. of roughly 0.25; the floor keeps a session of a few similar ROIs
#: from shrinking every ROI onto one value.
MIN_SIZE_SPREAD = 0.15
#: Weak prior on the session's mean size when an indicator is named: log-normal around the table's single-spike
#: ΔF/F with this log s.d. (a factor of 3 either way at one s.d.; the table's values vary several-fold between
#: preparations, see calcium.indicators).
INDICATOR_PRIOR_SPREAD = math.log(3.0)
#: A ROI whose size interval (90 %) spans more than this factor is flagged.
MAX_INTERVAL_RATIO = 1.5
#: A count whose 90 % interval spans more than this factor (and more than 2 spikes) is flagged: it is not known to
#: better than about +-20 % (measured on the independent generator: at single-spike SNR 2 the ROIs whose size was
#: taken at twice the truth had count intervals of 1.45x-2.3x, those counted right below 1.3x).
MAX_COUNT_RATIO = 1.4
#: Sizes further than this factor from the indicator's published single-spike ΔF/F are flagged.
INDICATOR_RANGE_FACTOR = 4.0
#: A count from more spikes per second than this is flagged as implausible for a cortical neuron (sustained
#: rates of cortical pyramidal cells in vivo are below ~20 Hz; common practice).
MAX_PLAUSIBLE_RATE_HZ = 20.0
#: An event of more spikes than this in one frame is flagged (common practice: bursts of 2-5 spikes).
MAX_SPIKES_PER_FRAME = 5
#: A cell whose fitted calcium stays above half a spike in all but this share of its frames is flagged: a running
#: low-percentile baseline (8th percentile by default, calcium.delta_f_over_f) then sits on its sustained calcium,
#: and the spikes that hold it up are not counted (measured on the independent generator at 3 Hz: counts 0.7-0.8x
#: the truth with the true single-spike size).
MIN_REST_FRACTION = 0.1
_LEVEL = 0.9
_PRIOR_GRID_POINTS = 33  # grid of a ROI's size within 4 s.d. of the session's prior (steps of a quarter s.d.)


@dataclass(frozen=True)
class SessionCalibration:
    """Kinetics shared by a session's ROIs and each ROI's single-spike size.

    Attributes
    ----------
    source : str
        ``"paired"``, ``"blind"``, ``"indicator"`` or ``"given"``.
    frame_rate : float
        Hz.
    rise_s, decay_s : float
        Session kinetics (time constants of the double exponential).
    rise_range_s, decay_range_s : tuple of float
        10th-90th percentile of the per-ROI estimates that were pooled
        (equal ends when the kinetics were given).
    n_kinetics_rois : int
        ROIs whose kinetics were pooled.
    spike_size : ndarray, shape (rois,)
        ΔF/F (peak) of one spike in each ROI (posterior median).
    spike_size_low, spike_size_high : ndarray, shape (rois,)
        90 % interval of ``spike_size``.
    calibrated : ndarray of bool, shape (rois,)
        False where the size could not be identified: counts of such ROIs
        are not to be trusted.
    reasons : tuple of str
        Per ROI, why it is not calibrated ("" when it is).
    size_z : ndarray, shape (rois,)
        The single-spike size in standard deviations of an event's size
        noise (how clearly one spike stands out; NaN where not estimated).
    size_prior : tuple of float
        ``(mean, sd)`` of the natural log of the single-spike size across
        the session (the empirical Bayes prior; NaN when not estimated).
    paired_rois : tuple of int
        ROIs with electrical spikes whose fits were used.
    indicator : str or None
        Indicator named by the user (a prior, not a fixed truth).
    notes : tuple of str
        Session-level remarks (kinetics outside the published range, fits
        that failed, ...).
    """

    source: str
    frame_rate: float
    rise_s: float
    decay_s: float
    rise_range_s: tuple
    decay_range_s: tuple
    n_kinetics_rois: int
    spike_size: np.ndarray = field(repr=False)
    spike_size_low: np.ndarray = field(repr=False)
    spike_size_high: np.ndarray = field(repr=False)
    calibrated: np.ndarray = field(repr=False)
    reasons: tuple = field(repr=False)
    size_z: np.ndarray = field(default_factory=lambda: np.zeros(0), repr=False)
    size_prior: tuple = (math.nan, math.nan)
    paired_rois: tuple = ()
    indicator: str | None = None
    notes: tuple = ()

    @property
    def n_rois(self) -> int:
        return int(self.spike_size.size)

    @property
    def n_uncalibrated(self) -> int:
        """ROIs whose single-spike size could not be identified."""
        return int(np.count_nonzero(~self.calibrated))

    def shape(self) -> Kernel:
        """The session kernel with unit amplitude."""
        return Kernel(self.rise_s, self.decay_s, 1.0)

    def kernel(self, roi: int) -> Kernel:
        """The session kernel with ROI ``roi``'s single-spike size."""
        roi = check_int(roi, "roi", minimum=0, maximum=self.n_rois - 1)
        return Kernel(self.rise_s, self.decay_s, float(self.spike_size[roi]))

    def summary(self) -> str:
        """Plain-words summary for the CLI and the report."""
        what = {"paired": f"fitted on {len(self.paired_rois)} ROI(s) with electrical spikes",
                "blind": f"pooled blind over {self.n_kinetics_rois} ROI(s)",
                "indicator": f"from the published table ({self.indicator})",
                "given": "given"}[self.source]
        lines = [f"session kinetics ({what}): rise {self.rise_s * 1e3:.3g} ms, decay {self.decay_s * 1e3:.3g} ms"]
        if self.n_kinetics_rois > 1:
            lines[0] += (f" (per-ROI 10-90 %: rise {self.rise_range_s[0] * 1e3:.3g}-{self.rise_range_s[1] * 1e3:.3g} ms,"
                         f" decay {self.decay_range_s[0] * 1e3:.3g}-{self.decay_range_s[1] * 1e3:.3g} ms)")
        if self.n_rois:
            size = self.spike_size[self.calibrated]
            if size.size:
                lines.append(f"single-spike ΔF/F: median {np.median(size):.3g} over {size.size} calibrated ROI(s)")
        n_bad = self.n_uncalibrated
        if n_bad:
            lines.append(f"{n_bad} of {self.n_rois} ROI(s) have UNCALIBRATED spike counts (their single-spike size "
                         f"could not be identified); treat their counts as unknown")
        else:
            lines.append(f"all {self.n_rois} ROI(s) have calibrated spike counts")
        lines.extend(self.notes)
        return "\n".join(lines)

    def for_session(self, n_rois: int, rois=None) -> "SessionCalibration":
        """This calibration's kinetics and prior for a session of ``n_rois`` ROIs.

        ``rois`` maps this calibration's ROIs to their indices in the session
        (default: the same indices; empty: none of them is in the session,
        as for a calibration of another session); the ROIs it names keep their sizes only
        if they are paired (fitted from electrical spikes): every other ROI
        gets its size from its own events under :attr:`size_prior` when it
        is counted (:func:`count_roi`).  Used to calibrate a subset of a large
        session once and count every ROI from it.
        """
        n_rois = check_int(n_rois, "n_rois", minimum=1)
        rois = list(range(self.n_rois)) if rois is None else [int(r) for r in rois]
        if len(rois) not in (0, self.n_rois):
            raise ValueError(f"rois must give the session index of each of the {self.n_rois} calibrated ROIs, got "
                             f"{len(rois)}")
        nan = np.full(n_rois, math.nan)
        size, low, high, z = nan.copy(), nan.copy(), nan.copy(), nan.copy()
        calibrated = np.zeros(n_rois, dtype=bool)
        reasons = [""] * n_rois
        paired = []
        for own, roi in enumerate(rois):
            if own in self.paired_rois:
                size[roi], low[roi], high[roi] = self.spike_size[own], self.spike_size_low[own], self.spike_size_high[own]
                calibrated[roi] = True
                paired.append(roi)
        import dataclasses

        return dataclasses.replace(self, spike_size=size, spike_size_low=low, spike_size_high=high, size_z=z,
                                   calibrated=calibrated, reasons=tuple(reasons), paired_rois=tuple(sorted(paired)))

    @classmethod
    def from_fit(cls, fit, *, indicator=None) -> "SessionCalibration":
        """A one-ROI paired calibration from a :class:`calcium.fit.KernelFit` (to reuse its kinetics, and its
        spike size as the centre of the prior of another session's sizes)."""
        from .fit import KernelFit

        if not isinstance(fit, KernelFit):
            raise ValueError(f"fit must be a calcium.fit.KernelFit, got {type(fit).__name__}")
        k = fit.kernel
        low, high = (fit.confidence.amplitude if fit.confidence is not None else (k.amplitude, k.amplitude))
        log_size = math.log(k.amplitude)
        return cls(source="paired", frame_rate=float(fit.frame_rate), rise_s=k.rise_s, decay_s=k.decay_s,
                   rise_range_s=(k.rise_s, k.rise_s), decay_range_s=(k.decay_s, k.decay_s), n_kinetics_rois=1,
                   spike_size=np.array([k.amplitude]), spike_size_low=np.array([float(low)]),
                   spike_size_high=np.array([float(high)]), calibrated=np.ones(1, dtype=bool), reasons=("",),
                   size_z=np.full(1, math.nan), size_prior=(log_size, 2 * MIN_SIZE_SPREAD), paired_rois=(0,),
                   indicator=indicator, notes=(f"from one kernel fit ({fit.n_spikes} spikes, R² "
                                               f"{fit.r_squared:.3g})",))

    @classmethod
    def fixed(cls, kernel, n_rois, frame_rate, *, source="given", indicator=None) -> "SessionCalibration":
        """Every ROI counted with one given kernel (its amplitude is the single-spike size; no interval)."""
        if not isinstance(kernel, Kernel):
            raise ValueError(f"kernel must be a calcium.Kernel, got {type(kernel).__name__}")
        n_rois = check_int(n_rois, "n_rois", minimum=1)
        size = np.full(n_rois, float(kernel.amplitude))
        return cls(source=check_choice(source, "source", CALIBRATION_SOURCES), frame_rate=check_frame_rate(frame_rate),
                   rise_s=kernel.rise_s, decay_s=kernel.decay_s, rise_range_s=(kernel.rise_s, kernel.rise_s),
                   decay_range_s=(kernel.decay_s, kernel.decay_s), n_kinetics_rois=0, spike_size=size,
                   spike_size_low=size.copy(), spike_size_high=size.copy(), calibrated=np.ones(n_rois, dtype=bool),
                   reasons=("",) * n_rois, size_z=np.full(n_rois, math.nan), indicator=indicator,
                   notes=("single-spike size given, not estimated: count intervals are not available",))

    def session_dict(self) -> dict:
        """The session-level values (no per-ROI arrays but the paired ROIs' sizes) and the summary: what a
        results file records."""
        data = {k: v for k, v in self.to_dict().items()
                if k not in ("spike_size", "spike_size_low", "spike_size_high", "calibrated", "reasons", "size_z")}
        data["paired_spike_size"] = [float(self.spike_size[r]) for r in self.paired_rois]
        data["summary"] = self.summary()
        return data

    def to_dict(self) -> dict:
        """Plain values (JSON-ready)."""
        return {"source": self.source, "frame_rate": self.frame_rate, "rise_s": self.rise_s, "decay_s": self.decay_s,
                "rise_range_s": list(self.rise_range_s), "decay_range_s": list(self.decay_range_s),
                "n_kinetics_rois": self.n_kinetics_rois, "spike_size": self.spike_size.tolist(),
                "spike_size_low": self.spike_size_low.tolist(), "spike_size_high": self.spike_size_high.tolist(),
                "calibrated": self.calibrated.tolist(), "reasons": list(self.reasons), "size_z": self.size_z.tolist(),
                "size_prior": list(self.size_prior), "paired_rois": list(self.paired_rois),
                "indicator": self.indicator, "notes": list(self.notes)}

    def save(self, path) -> Path:
        """Write as JSON (atomically, never over an input)."""
        from .io.results import atomic_output

        path = Path(path)
        with atomic_output(path) as tmp:
            Path(tmp).write_text(json.dumps(self.to_dict(), indent=1, allow_nan=True), encoding="utf-8")
        return path


def load_calibration(path) -> SessionCalibration:
    """Read a calibration written by :meth:`SessionCalibration.save`.

    Raises
    ------
    ValueError
        The file is not a calibration (the message names it).
    """
    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        spike_size = np.asarray(data["spike_size"], dtype=np.float64)
        return SessionCalibration(
            source=check_choice(data["source"], "source", CALIBRATION_SOURCES), frame_rate=float(data["frame_rate"]),
            rise_s=float(data["rise_s"]), decay_s=float(data["decay_s"]),
            rise_range_s=tuple(data["rise_range_s"]), decay_range_s=tuple(data["decay_range_s"]),
            n_kinetics_rois=int(data["n_kinetics_rois"]), spike_size=spike_size,
            spike_size_low=np.asarray(data["spike_size_low"], dtype=np.float64),
            spike_size_high=np.asarray(data["spike_size_high"], dtype=np.float64),
            calibrated=np.asarray(data["calibrated"], dtype=bool), reasons=tuple(data["reasons"]),
            size_z=np.asarray(data.get("size_z", [math.nan] * spike_size.size), dtype=np.float64),
            size_prior=tuple(data["size_prior"]), paired_rois=tuple(int(r) for r in data["paired_rois"]),
            indicator=data.get("indicator"), notes=tuple(data.get("notes", ())))
    except FileNotFoundError:
        raise ValueError(f"{path}: no such calibration file") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError) as exc:
        raise ValueError(f"{path}: not a calibration file written by calcium ({exc.__class__.__name__}: {exc})") \
            from None


@dataclass(frozen=True)
class CalibratedInference:
    """Spikes of every ROI of a session, counted with the session calibration.

    Attributes
    ----------
    results : tuple of SpikeInference
        One per ROI (``result.kernel`` carries the ROI's size).
    calibration : SessionCalibration
    count_low, count_high : ndarray of int, shape (rois,)
        Spike counts at the upper and lower end of each ROI's size interval
        (a larger spike means fewer spikes).
    calibrated : ndarray of bool, shape (rois,)
        ``calibration.calibrated``, and False where the counts are
        implausible (rates, spikes per frame).
    reasons : tuple of str
        Why a ROI is not calibrated ("" when it is).
    """

    results: tuple
    calibration: SessionCalibration
    count_low: np.ndarray
    count_high: np.ndarray
    calibrated: np.ndarray
    reasons: tuple

    @property
    def spike_counts(self) -> np.ndarray:
        """Total spikes per ROI."""
        return np.array([r.n_spikes for r in self.results], dtype=np.int64)


@dataclass(frozen=True)
class RoiCount:
    """One ROI counted with a session calibration (see :func:`count_roi`).

    Attributes
    ----------
    result : SpikeInference
        Spikes at the ROI's single-spike size (``result.kernel`` carries it).
    spike_size, spike_size_low, spike_size_high : float
        ΔF/F of one spike and its 90 % interval.
    size_z : float
        ``spike_size`` in s.d. of an event's size noise (NaN if unknown).
    count_low, count_high : int
        Spike counts at the upper and at the lower end of the size interval.
    calibrated : bool
        False when the count is not to be trusted.
    reason : str
        Why not ("" when calibrated).
    """

    result: object
    spike_size: float
    spike_size_low: float
    spike_size_high: float
    size_z: float
    count_low: int
    count_high: int
    calibrated: bool
    reason: str


def count_roi(trace, frame_rate, calibration, roi, *, noise_sd=None, threshold=0.5, unit_result=None) -> RoiCount:
    """Spikes of one ROI with a session calibration.

    The trace is deconvolved with the session kernel at unit amplitude
    (or ``unit_result`` is taken as that deconvolution).  Where the
    calibration holds a size for ``roi`` (paired ROIs, or a calibration of
    these very ROIs) that size is used; otherwise the size is estimated from
    the trace's events (:func:`calcium.infer.quantal.fit_quantal_mixture`)
    under the calibration's prior across the session (its ``size_prior``),
    as :func:`calibrate_session` does.  The events are then counted at that
    size and at both ends of its interval.  A count is also flagged when it
    is implausible (a rate above ``MAX_PLAUSIBLE_RATE_HZ``, more than
    ``MAX_SPIKES_PER_FRAME`` spikes in a frame).

    Parameters
    ----------
    trace : array_like, shape (frames,)
        ΔF/F of the ROI.
    frame_rate : float
        Hz.
    calibration : SessionCalibration
    roi : int
        The ROI's index in the calibration.
    noise_sd : float, optional
        Noise s.d. of the trace (estimated when not given).
    threshold : float, default 0.5
        As in :func:`calcium.infer_spikes`.
    unit_result : SpikeInference, optional
        The trace's deconvolution with ``calibration.shape()``, if already
        computed.

    Returns
    -------
    RoiCount
    """
    from .infer.api import infer_spikes, recount

    if not isinstance(calibration, SessionCalibration):
        raise ValueError(f"calibration must be a SessionCalibration, got {type(calibration).__name__}")
    roi = check_int(roi, "roi", minimum=0, maximum=calibration.n_rois - 1)
    shape = calibration.shape()
    unit = unit_result
    if unit is None:
        # (whether the data are ΔF/F at all is checked once for the session by the callers, which refuse or flag)
        unit = infer_spikes(trace, frame_rate, kernel=shape, noise_sd=noise_sd, threshold=threshold, allow_raw=True)
    if np.isfinite(calibration.spike_size[roi]):
        size, low, high = (float(calibration.spike_size[roi]), float(calibration.spike_size_low[roi]),
                           float(calibration.spike_size_high[roi]))
        z = float(calibration.size_z[roi]) if calibration.size_z.size else math.nan
        reason = calibration.reasons[roi] if calibration.reasons else ""
    else:
        indicator_size = None
        if calibration.indicator is not None:
            from .indicators import get_indicator

            indicator_size = get_indicator(calibration.indicator).dff_single_spike
        size, low, high, z, reason = _roi_size(_quantal_fit(unit, frame_rate, shape, calibration.size_prior),
                                               calibration.size_prior, indicator_size)
    if not (np.isfinite(size) and size > 0) or unit.kernel is None or unit.coefficients.size == 0:
        empty = unit if unit.n_spikes == 0 else recount(unit, frame_rate, 1e300, threshold=threshold)
        return RoiCount(empty, size, low, high, z, 0, 0, False, reason or "no single-spike size: no spikes counted")
    result = recount(unit, frame_rate, size, threshold=threshold)
    count_high = recount(unit, frame_rate, low, threshold=threshold).n_spikes
    count_low = recount(unit, frame_rate, high, threshold=threshold).n_spikes
    if not reason:
        duration_s = unit.activity.size / frame_rate
        rate = result.n_spikes / duration_s
        rest = _rest_fraction(result, size)
        if rate > MAX_PLAUSIBLE_RATE_HZ:
            reason = f"implausible rate ({rate:.3g} spikes/s, more than {MAX_PLAUSIBLE_RATE_HZ:g})"
        elif result.spike_counts.size and int(result.spike_counts.max()) > MAX_SPIKES_PER_FRAME:
            reason = (f"implausible count ({int(result.spike_counts.max())} spikes in one frame, more than "
                      f"{MAX_SPIKES_PER_FRAME})")
        elif count_high - count_low > 2 and count_high > MAX_COUNT_RATIO * count_low:
            reason = f"count poorly determined (90 % interval {count_low}-{count_high} spikes)"
        elif rest < MIN_REST_FRACTION:
            reason = (f"the cell rarely rests (calcium below half a spike in {rest:.0%} of frames): the ΔF/F "
                      f"baseline sits on its sustained calcium, so the count is likely too low")
    return RoiCount(result, size, low, high, z, count_low, count_high, reason == "", reason)


def _rest_fraction(result, size) -> float:
    """Share of the frames in which the fitted calcium (denoised ΔF/F above its baseline) is below half a spike."""
    calcium = np.asarray(result.denoised, dtype=np.float64) - float(result.baseline)
    finite = np.isfinite(calcium)
    return float(np.count_nonzero(calcium[finite] < 0.5 * size) / max(int(finite.sum()), 1))


# ---------------------------------------------------------------------------
# kinetics
# ---------------------------------------------------------------------------
def _percentile_range(values) -> tuple:
    values = np.asarray(values, dtype=np.float64)
    if values.size == 0:
        return (math.nan, math.nan)
    return (float(np.percentile(values, 10)), float(np.percentile(values, 90)))


def _blind_kinetics(rows, frame_rate, max_rois, progress):
    """Session kinetics from the AR estimates of the ROIs with the clearest signal."""
    from .infer.api import infer_spikes
    from .infer.estimate import estimate_noise_sd, signal_detected

    order = _clearest_rois(rows)
    rises, decays = [], []
    for i in _bar(order, progress, "kinetics"):
        if len(decays) >= max_rois:
            break
        trace = rows[i]
        try:
            sd = estimate_noise_sd(trace, frame_rate)
            if not sd > 0 or not signal_detected(trace, sd):
                continue
            result = infer_spikes(trace, frame_rate, noise_sd=sd)
        except ValueError:
            continue
        g = result.coefficients
        if g.size == 0:
            continue
        try:
            shape = Kernel.from_ar_coefficients(g, frame_rate)
        except ValueError:
            continue
        rises.append(shape.rise_s)
        decays.append(shape.decay_s)
    if not decays:
        return None
    return float(np.median(rises)), float(np.median(decays)), rises, decays


def _clearest_rois(rows):
    """ROI indices, clearest signal first: the 99th percentile of the ΔF/F over a robust noise scale
    (median absolute frame-to-frame difference, which white noise sets and slow transients barely touch)."""
    scores = np.empty(rows.shape[0])
    for i, trace in enumerate(rows):
        finite = trace[np.isfinite(trace)]
        if finite.size < 16:
            scores[i] = -np.inf
            continue
        noise = np.median(np.abs(np.diff(finite))) / (0.6745 * math.sqrt(2.0))  # MAD of a difference (Hampel 1974)
        level = np.median(finite)
        scores[i] = (np.percentile(finite, 99) - level) / noise if noise > 0 else -np.inf
    return np.argsort(-scores, kind="stable")


def _paired_kinetics(rows, frame_rate, electrical, fit_options, progress):
    """Fits of the paired ROIs: (usable fits by ROI, notes)."""
    from .fit import fit_kernel

    fits, notes = {}, []
    for roi in _bar(sorted(electrical), progress, "kernel fits"):
        if not 0 <= roi < rows.shape[0]:
            raise ValueError(f"electrical_spikes names ROI {roi}, but the traces have {rows.shape[0]} ROIs "
                             f"(0 to {rows.shape[0] - 1})")
        try:
            fit = fit_kernel(rows[roi], electrical[roi], frame_rate, **fit_options)
        except ValueError as exc:
            notes.append(f"ROI {roi}: kernel fit failed ({str(exc).splitlines()[0]})")
            continue
        if not fit.usable:
            notes.append(f"ROI {roi}: kernel fit not used ({fit.verdict})")
            continue
        fits[roi] = fit
    return fits, notes


# ---------------------------------------------------------------------------
# sizes
# ---------------------------------------------------------------------------
def _unit_deconvolution(trace, frame_rate, shape):
    """The trace deconvolved with the unit-amplitude session kernel (whether the session is ΔF/F at all was
    checked once by the caller)."""
    from .infer.api import infer_spikes

    return infer_spikes(trace, frame_rate, kernel=shape, allow_raw=True)


def _quantal_fit(result, frame_rate, shape, prior=(math.nan, math.nan)):
    """The quantal fit of the event sizes of a deconvolution with the unit-amplitude kernel ``shape``; with a
    prior across the session, q is searched where the prior has nearly all its mass (4 s.d. either side)."""
    from .infer.counts import event_noise_size, event_sizes
    from .infer.quantal import fit_quantal_mixture

    if result.coefficients.size == 0 or not result.noise_sd > 0:
        return None
    # runs of activity closer than half the kernel's time to peak are one event (a spike's activity can be split
    # over the frames of its rise; measured on the independent generator: a gap of the whole time to peak merges
    # the spikes of busy cells, one of the rise alone leaves single spikes in pieces at 15 Hz)
    gap = max(1, int(math.ceil(0.5 * shape.time_to_peak_s * frame_rate)))
    sizes = event_sizes(result.activity, merge_gap=gap)
    noise_size = event_noise_size(result.coefficients, result.noise_sd, result.activity.size) / result.spike_size
    mean, sd = prior
    if np.isfinite(mean) and np.isfinite(sd):
        return fit_quantal_mixture(sizes, noise_size=noise_size, grid_points=_PRIOR_GRID_POINTS,
                                   search=(math.exp(mean - 4.0 * sd), math.exp(mean + 4.0 * sd)))
    return fit_quantal_mixture(sizes, noise_size=noise_size)


def _paired_size(trace, frame_rate, spike_times, fit, shape):
    """Single-spike size of a paired ROI with the session kinetics: linear least squares of the trace on the
    summed responses to its recorded spikes (clock lag of its own fit), with the normal-theory 90 % interval."""
    from .forward import predict_fluorescence

    trace = np.asarray(trace, dtype=np.float64)
    finite = np.isfinite(trace)
    times = np.asarray(spike_times, dtype=np.float64) + fit.lag_s
    times = times[(times >= 0) & (times < trace.size / frame_rate)]
    response = predict_fluorescence(times, shape, frame_rate, n_frames=trace.size)
    design = np.column_stack([response[finite], np.ones(int(finite.sum()))])
    coef, *_ = np.linalg.lstsq(design, trace[finite], rcond=None)
    residual = trace[finite] - design @ coef
    dof = max(int(finite.sum()) - 2, 1)
    cov = np.linalg.pinv(design.T @ design) * float(residual @ residual) / dof
    amp = float(coef[0])
    if not amp > 0:  # (a failed fit was refused before; keep the fit's own value)
        amp = float(fit.kernel.amplitude)
    half = 1.645 * math.sqrt(max(float(cov[0, 0]), 0.0))
    return amp, max(amp - half, 0.5 * amp), amp + half


def _kinetics_notes(kernel, row):
    """Plain-words notes where the session kinetics fall outside the indicator's published range."""
    from .fit import check_kinetics

    try:
        check = check_kinetics(kernel, row.name)
    except ValueError as exc:
        return [f"kinetics not checked against {row.name}: {exc}"]
    outside = [f"{r.quantity} {r.ratio:.2f}x the published value" for r in check.rows
               if not r.ok and not r.quantity.endswith("ΔF/F")]
    return [f"session kinetics outside the published range of {row.name}: " + "; ".join(outside)] if outside else []


def _log_prior(grid_log, mean, sd):
    return -0.5 * ((grid_log - mean) / sd) ** 2 - math.log(sd)


def _empirical_bayes(fits, indicator_size, fixed=None):
    """(mean, sd) of log sizes across ROIs maximising the marginal likelihood (grid search), with a weak
    hyperprior on the mean when an indicator is named; ``fixed`` = (mean, sd) skips the search."""
    usable = [f for f in fits if f is not None and f.grid.size]
    if fixed is not None:
        return fixed
    if not usable:
        if indicator_size is None:
            return (math.nan, math.nan)
        return (math.log(indicator_size), INDICATOR_PRIOR_SPREAD)
    centres = np.array([math.log(f.quantum) for f in usable])
    means = np.linspace(centres.min() - 0.5, centres.max() + 0.5, 81)
    sds = np.exp(np.linspace(math.log(MIN_SIZE_SPREAD), math.log(2.0), 25))
    # every ROI's profile on its own grid (same number of points): rows of (ROIs, grid)
    logs = np.array([np.log(f.grid) for f in usable])
    steps = np.gradient(logs, axis=1) if logs.shape[1] > 1 else np.ones_like(logs)
    peaks = np.array([f.log_likelihood - f.log_likelihood.max() for f in usable])
    weight = np.exp(peaks) * steps
    best, best_value = None, -np.inf
    for sd in sds:
        # marginal likelihood of each ROI under N(mean, sd) on the log size, for every mean at once
        z = (logs[None, :, :] - means[:, None, None]) / sd
        marginal = np.einsum("mrg,rg->mr", np.exp(-0.5 * z * z), weight) / sd
        total = np.log(np.maximum(marginal, 1e-300)).sum(axis=1)
        if indicator_size is not None:
            total = total - 0.5 * ((means - math.log(indicator_size)) / INDICATOR_PRIOR_SPREAD) ** 2
        j = int(np.argmax(total))
        if total[j] > best_value:
            best, best_value = (float(means[j]), float(sd)), float(total[j])
    return best


def _posterior(fit, prior):
    """Posterior median and 90 % interval of the size on the fit's grid, under the log-normal prior."""
    mean, sd = prior
    lg = np.log(fit.grid)
    log_post = fit.log_likelihood - fit.log_likelihood.max()
    if np.isfinite(mean):
        log_post = log_post + _log_prior(lg, mean, sd)
    weight = np.exp(log_post - log_post.max()) * (np.gradient(lg) if lg.size > 1 else 1.0)
    cdf = np.cumsum(weight)
    cdf /= cdf[-1]
    at = [float(np.exp(np.interp(p, cdf, lg))) for p in ((1 - _LEVEL) / 2, 0.5, (1 + _LEVEL) / 2)]
    return at[1], at[0], at[2]


def _roi_size(fit, prior, indicator_size):
    """(size, low, high, z, reason) of one ROI from its quantal fit and the session's prior."""
    size = low = high = z = math.nan
    if fit is not None and np.isfinite(fit.quantum):
        size, low, high = _posterior(fit, prior)
        z = fit.quantum_z * size / fit.quantum  # (the posterior size over the same size noise)
    elif np.isfinite(prior[0]):
        size = math.exp(prior[0])
        low, high = (math.exp(prior[0] + z * prior[1]) for z in (-1.645, 1.645))
    return size, low, high, z, _size_verdict(fit, size, low, high, prior, indicator_size)


def _size_verdict(fit, size, low, high, prior, indicator_size):
    from .infer.quantal import IDENTIFIABLE_Z

    if fit is None or not np.isfinite(fit.quantum):
        return "too few events to estimate the single-spike size"
    if fit.quantum_z < IDENTIFIABLE_Z:
        return (f"single spikes are not clearly above the noise (size {fit.quantum_z:.1f} noise s.d., "
                f"at least {IDENTIFIABLE_Z:g} needed)")
    if high / low > MAX_INTERVAL_RATIO:
        return f"single-spike size poorly determined (90 % interval {low:.3g}-{high:.3g} ΔF/F)"
    mean, sd = prior
    if np.isfinite(mean) and abs(math.log(fit.quantum) - mean) > 3.0 * sd:
        return (f"single-spike size of its events ({fit.quantum:.3g} ΔF/F) is far from the session's "
                f"(median {math.exp(mean):.3g} ΔF/F)")
    if indicator_size is not None and not (indicator_size / INDICATOR_RANGE_FACTOR <= size
                                           <= indicator_size * INDICATOR_RANGE_FACTOR):
        return (f"single-spike size {size:.3g} ΔF/F is outside {INDICATOR_RANGE_FACTOR:g}x the indicator's "
                f"published {indicator_size:.3g} ΔF/F")
    return ""


def _bar(items, progress, what):
    if not progress:
        return items
    from tqdm import tqdm

    return tqdm(items, desc=f"calibration: {what}", unit="ROI")


# ---------------------------------------------------------------------------
# front doors
# ---------------------------------------------------------------------------
def calibrate_session(dff, frame_rate, *, electrical_spikes=None, indicator=None, kernel=None, fit_options=None,
                      max_kinetics_rois=48, progress=False) -> SessionCalibration:
    """Calibrate a session: shared kinetics and every ROI's single-spike size, with intervals and flags.

    Parameters
    ----------
    dff : array_like, shape (rois, frames)
        ΔF/F of the session's ROIs (NaN/inf frames are missing).
    frame_rate : float
        Hz.
    electrical_spikes : dict, optional
        ``{roi index: spike times in seconds}`` for ROIs recorded
        electrically: the kinetics are fitted on them (source "paired").
    indicator : str, optional
        A tabulated indicator: a prior (its published single-spike ΔF/F
        centres a weak prior on the session's sizes; its kinetics are the
        starting point of the paired fits and are checked against them),
        never a fixed truth.
    kernel : Kernel, optional
        Fixed kinetics (source "given"); the sizes are still estimated per
        ROI unless nothing else is known.
    fit_options : dict, optional
        Keyword arguments of :func:`calcium.fit.fit_kernel` for the paired
        fits (default: no bootstrap).
    max_kinetics_rois : int, default 48
        Blind: at most this many ROIs (those with the clearest signal) are
        used for the kinetics.
    progress : bool, default False

    Returns
    -------
    SessionCalibration

    Raises
    ------
    ValueError
        Bad arguments, or no ROI from which kinetics could be learned and no
        indicator or kernel to fall back on.

    References
    ----------
    See the module docstring.

    Examples
    --------
    >>> from calcium.forward import NoiseModel, SpikeModel, simulate_recording
    >>> rec = simulate_recording(4, 120.0, 30.0, indicator="GCaMP6s", spikes=SpikeModel(rate_hz=0.5),
    ...                          noise=NoiseModel(noise_sd=0.03), seed=3)
    >>> cal = calibrate_session(rec.dff, 30.0)
    >>> cal.source, cal.n_rois
    ('blind', 4)
    """
    rows = _session_rows(dff)
    frame_rate = check_frame_rate(frame_rate)
    return _calibrate(rows, frame_rate, electrical_spikes, indicator, kernel, fit_options, max_kinetics_rois,
                      progress)[0]


def _session_rows(dff) -> np.ndarray:
    from ._checks import check_dff_like

    check_dff_like(dff, "dff")
    rows = as_traces(dff, "dff")
    if rows.ndim == 1:
        rows = rows[None, :]
    if rows.ndim != 2:
        raise ValueError(f"dff must be (rois, frames), got shape {rows.shape}")
    return rows


def _calibrate(rows, frame_rate, electrical_spikes, indicator, kernel, fit_options, max_kinetics_rois, progress):
    """calibrate_session on checked rows; also returns each ROI's deconvolution with the unit-amplitude session
    kernel (None where it failed), which infer_session counts without solving again."""
    max_kinetics_rois = check_int(max_kinetics_rois, "max_kinetics_rois", minimum=1)
    row = None
    if indicator is not None:
        from .indicators import get_indicator

        row = get_indicator(indicator)
    if kernel is not None and not isinstance(kernel, Kernel):
        raise ValueError(f"kernel must be a calcium.Kernel, got {type(kernel).__name__}")
    electrical = {} if electrical_spikes is None else {int(k): v for k, v in dict(electrical_spikes).items()}
    notes = []
    indicator_size = row.dff_single_spike if row is not None else None
    prior_fixed = None
    paired = ()
    paired_fits = {}
    rise_range = decay_range = None
    n_kin = 0

    if electrical:
        options = {"n_bootstrap": 0}
        if row is not None:
            options["kernel"] = row.name
        options.update(fit_options or {})
        paired_fits, fit_notes = _paired_kinetics(rows, frame_rate, electrical, options, progress)
        notes.extend(fit_notes)
        if paired_fits:
            source = "paired"
            paired = tuple(sorted(paired_fits))
            rises = [f.kernel.rise_s for f in paired_fits.values()]
            decays = [f.kernel.decay_s for f in paired_fits.values()]
            rise_s, decay_s = float(np.median(rises)), float(np.median(decays))
            rise_range, decay_range, n_kin = _percentile_range(rises), _percentile_range(decays), len(paired_fits)
            log_sizes = np.log([f.kernel.amplitude for f in paired_fits.values()])
            spread = float(np.std(log_sizes, ddof=1)) if log_sizes.size > 2 else 0.0
            # (with few paired cells their spread is uncertain: never narrower than the cell-to-cell floor)
            prior_fixed = (float(np.mean(log_sizes)), max(spread, 2 * MIN_SIZE_SPREAD))
        else:
            notes.append("no usable kernel fit among the ROIs with electrical spikes: calibrated blind")
    if not paired:
        if kernel is not None:
            source, rise_s, decay_s = "given", kernel.rise_s, kernel.decay_s
        else:
            pooled = _blind_kinetics(rows, frame_rate, max_kinetics_rois, progress)
            if pooled is not None:
                source = "blind"
                rise_s, decay_s, rises, decays = pooled
                rise_range, decay_range, n_kin = _percentile_range(rises), _percentile_range(decays), len(decays)
            elif row is not None:
                source = "indicator"
                rise_s, decay_s = row.time_constants()
                notes.append(f"no ROI showed kinetics clearly enough: the published kinetics of {row.name} are used")
            else:
                raise ValueError("no ROI shows calcium transients clearly enough to learn the kinetics from; give "
                                 "an indicator or a kernel (or electrical spikes of some ROIs)")
    if rise_range is None:
        rise_range, decay_range = (rise_s, rise_s), (decay_s, decay_s)
    if row is not None:
        notes.extend(_kinetics_notes(Kernel(rise_s, decay_s, 1.0), row))

    shape = Kernel(rise_s, decay_s, 1.0)
    n = rows.shape[0]
    fits, unit_results = [], []
    for i in _bar(range(n), progress, "spike sizes"):
        try:
            result = _unit_deconvolution(rows[i], frame_rate, shape)
        except ValueError:
            result = None
        unit_results.append(result)
        # (the fits over the whole range of sizes serve only to find the prior: not needed when it is fixed)
        needed = result is not None and i not in paired and prior_fixed is None
        fits.append(_quantal_fit(result, frame_rate, shape) if needed else None)
    prior = _empirical_bayes(fits, indicator_size, fixed=prior_fixed)
    size = np.full(n, math.nan)
    low = np.full(n, math.nan)
    high = np.full(n, math.nan)
    calibrated = np.zeros(n, dtype=bool)
    reasons = [""] * n
    size_z = np.full(n, math.nan)
    for i in range(n):
        if i not in paired:  # (paired sizes come from their own fits, below)
            # each size as count_roi finds it under the prior (the same grid): a calibration of these ROIs and
            # a count of any of them with this calibration's prior agree
            unit = unit_results[i]
            fit = None if unit is None else (_quantal_fit(unit, frame_rate, shape, prior) if np.isfinite(prior[0])
                                              else fits[i])
            size[i], low[i], high[i], size_z[i], reasons[i] = _roi_size(fit, prior, indicator_size)
            calibrated[i] = reasons[i] == ""
    for roi in paired:
        size[roi], low[roi], high[roi] = _paired_size(rows[roi], frame_rate, electrical[roi], paired_fits[roi], shape)
        calibrated[roi] = True
    calibration = SessionCalibration(
        source=source, frame_rate=frame_rate, rise_s=float(rise_s), decay_s=float(decay_s),
        rise_range_s=tuple(rise_range), decay_range_s=tuple(decay_range), n_kinetics_rois=int(n_kin),
        spike_size=size, spike_size_low=low, spike_size_high=high, calibrated=calibrated, reasons=tuple(reasons),
        size_z=size_z, size_prior=tuple(prior), paired_rois=paired, indicator=row.name if row is not None else None,
        notes=tuple(notes))
    return calibration, unit_results


def infer_session(dff, frame_rate, *, calibration=None, electrical_spikes=None, indicator=None, kernel=None,
                  threshold=0.5, fit_options=None, max_kinetics_rois=48, progress=False) -> CalibratedInference:
    """Spikes of every ROI of a session, counted with a session calibration.

    Parameters
    ----------
    dff : array_like, shape (rois, frames)
    frame_rate : float
        Hz.
    calibration : SessionCalibration, optional
        A calibration of these ROIs (e.g. :func:`load_calibration` of an
        earlier run); by default the session is calibrated first
        (:func:`calibrate_session` with ``electrical_spikes``,
        ``indicator``, ``kernel``, ``fit_options``, ``max_kinetics_rois``).
    threshold : float, default 0.5
        As in :func:`calcium.infer_spikes`.
    progress : bool, default False

    Returns
    -------
    CalibratedInference

    Notes
    -----
    Each ROI is deconvolved once, with the session kernel at unit
    amplitude; its events are then counted at the ROI's own single-spike
    size (:func:`calcium.infer.api.recount`) and at both ends of the size's
    interval, which gives the count interval.  A ROI is also flagged when
    its count is implausible: a rate above ``MAX_PLAUSIBLE_RATE_HZ`` or more
    than ``MAX_SPIKES_PER_FRAME`` spikes in one frame.
    """
    rows = _session_rows(dff)
    frame_rate = check_frame_rate(frame_rate)
    if calibration is None:
        calibration, unit_results = _calibrate(rows, frame_rate, electrical_spikes, indicator, kernel, fit_options,
                                               max_kinetics_rois, progress)
    else:
        if not isinstance(calibration, SessionCalibration):
            raise ValueError(f"calibration must be a SessionCalibration, got {type(calibration).__name__}")
        if calibration.n_rois != rows.shape[0]:
            raise ValueError(f"the calibration is of {calibration.n_rois} ROIs, the traces have {rows.shape[0]}; "
                             f"calibrate this session (or give the traces it was made from)")
        if abs(calibration.frame_rate - frame_rate) > 1e-6 * frame_rate:
            raise ValueError(f"the calibration was made at {calibration.frame_rate:g} Hz, the traces are at "
                             f"{frame_rate:g} Hz")
        unit_results = [None] * rows.shape[0]
    n = rows.shape[0]
    counted = [count_roi(rows[i], frame_rate, calibration, i, threshold=threshold, unit_result=unit_results[i])
               for i in _bar(range(n), progress, "counting")]
    results = [c.result for c in counted]
    low_counts = np.array([c.count_low for c in counted], dtype=np.int64)
    high_counts = np.array([c.count_high for c in counted], dtype=np.int64)
    calibrated = np.array([c.calibrated for c in counted], dtype=bool)
    reasons = [c.reason for c in counted]
    return CalibratedInference(results=tuple(results), calibration=calibration, count_low=low_counts,
                               count_high=high_counts, calibrated=calibrated, reasons=tuple(reasons))
