"""The session report: one function per section, each laying out data it is handed.

Nothing here opens a file. :mod:`calcium.pipeline.run` reads a results file into a :class:`SessionData` (plain
arrays, dicts and small dataclasses) and :func:`session_report` turns it into an :class:`HtmlReport`; each
``*_section`` function adds one section to a report and can be called on its own.
"""
from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from .figures import (calibration_figure, distribution_figure, kernel_evidence_figure, kernel_figure, noise_figure, raster_figure,
                      rhythm_removal_figure, rhythm_spectrum_figure, score_figure, stages_figure,
                      time_frequency_figure, zoom_figure)
from .html import HtmlReport

#: Kernel-over-data figures drawn at most (the ROIs with electrical spikes first in the results file).
MAX_KERNEL_EVIDENCE = 6


@dataclass(frozen=True)
class ExampleRoi:
    """What the report draws of one example ROI.

    Attributes
    ----------
    roi : int
        ROI index.
    raw : ndarray
        Raw fluorescence (NaN where unknown).
    where : str
        Where ``raw`` came from, as the caption says it.
    traces : dict of str -> ndarray
        Any of ``f0``, ``dff``, ``dff_filtered``, ``denoised``.
    missing : ndarray of bool or None
        Frames shaded as missing when ``raw`` is unknown.
    electrical_spikes : ndarray or None
        Electrically recorded spike times (s) on the imaging clock.
    flags : str
        The ROI's quality flags ("" when none).
    decay_s : float
        Decay time constant (s) of the ROI's kernel; sets the length of the close-up (NaN: 20 s).
    """

    roi: int
    raw: np.ndarray
    where: str
    traces: dict
    missing: np.ndarray | None = None
    electrical_spikes: np.ndarray | None = None
    flags: str = ""
    decay_s: float = float("nan")


@dataclass(frozen=True)
class RhythmsData:
    """The search for shared rhythms as recorded by a run.

    Attributes
    ----------
    record : dict
        The search's JSON record (summary, rhythms, action, ...).
    spectra : dict of str -> ndarray
        ``freq_hz``, ``median_power``, ``background``, ``power_low``, ``power_high``, ``median_power_after``,
        ``coherence``.
    neuropil : ndarray or None
        Median spectrum of the neuropil rings.
    average : ndarray
        Average ΔF/F of the ROIs searched.
    example_roi : int or None
        ROI drawn before and after removal (None: not drawn).
    before, after : ndarray or None
        That ROI's ΔF/F, and the run's input to the inference when the run removed the rhythms.
    kernel : tuple of float
        That ROI's kernel (rise_s, decay_s, amplitude).
    noise_sd : float
        That ROI's noise standard deviation.
    """

    record: dict
    spectra: dict
    neuropil: np.ndarray | None
    average: np.ndarray
    example_roi: int | None = None
    before: np.ndarray | None = None
    after: np.ndarray | None = None
    kernel: tuple = ()
    noise_sd: float = float("nan")


@dataclass(frozen=True)
class SessionData:
    """Everything the session report shows, read from a results file.

    Attributes
    ----------
    results_path : str
        The results file (named in the summary).
    calcium_version : str
        Version of calcium that wrote it.
    inputs : dict
        Input role -> {"path", "sha256"}.
    frame_rate : float
        Frames per second.
    n_rois, n_frames : int
    per_roi : dict of str -> ndarray
        Per-ROI results (``noise_sd``, ``snr``, ``n_spikes``, ``quality_flags``, ``flags``, ``kernel_*``, ...).
    flag_names : dict of int -> str
        Quality flag bit -> name.
    flag_descriptions : list of str
        Each ROI's flags in words.
    failed : ndarray of bool
        ROIs without results.
    spike_times : list of ndarray
        Inferred spike times (s) per ROI.
    indicator : str or None
        Indicator whose published kinetics are drawn.
    examples : list of ExampleRoi
    calibration : dict or None
        {"session": record, "per_roi": arrays} of the count calibration.
    electrical : dict or None
        Kernel fits and scores of the ROIs with electrical spikes: ``roi``, ``fit``, ``score`` (dicts of arrays),
        ``notes``, ``bin_widths_s``, ``correlation``.
    rhythms : RhythmsData or None
    """

    results_path: str
    calcium_version: str
    inputs: dict
    frame_rate: float
    n_rois: int
    n_frames: int
    per_roi: dict
    flag_names: dict
    flag_descriptions: list
    failed: np.ndarray
    spike_times: list
    indicator: str | None = None
    examples: list = field(default_factory=list)
    calibration: dict | None = None
    electrical: dict | None = None
    rhythms: RhythmsData | None = None

    @property
    def duration_s(self) -> float:
        return self.n_frames / self.frame_rate


# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------
def reference_range(indicator, quantity: str):
    """((low, high), indicator name) accepted for ``quantity`` of ``indicator`` by
    :func:`calcium.fit.check_kinetics`, or None."""
    if not indicator:
        return None
    from ..fit import check_kinetics
    from ..kernel import Kernel

    check = check_kinetics(Kernel.from_indicator(indicator), indicator)
    for row in check.rows:
        if row.quantity == quantity:
            return (row.published * row.limits[0], row.published * row.limits[1]), check.indicator
    return None


def half_decays(rise, decay) -> np.ndarray:
    """Half-decay time (s) of the kernel of each (rise, decay) pair; NaN where the pair is not a kernel."""
    from ..kernel import Kernel

    out = np.full(np.shape(rise), np.nan)
    cache = {}
    for i, (r, d) in enumerate(zip(rise, decay)):
        if np.isfinite(r) and np.isfinite(d) and d > 0 and 0 <= r < d:
            key = (float(r), float(d))
            if key not in cache:
                cache[key] = Kernel(*key).half_decay_s
            out[i] = cache[key]
    return out


def close_up_length(decay_s: float) -> float:
    """Length (s) of an example's close-up: 40 decay times (several transients with their tails), kept
    between 8 and 30 s; 20 s when the decay is unknown."""
    if not (np.isfinite(decay_s) and decay_s > 0):
        return 20.0
    return float(np.clip(40.0 * decay_s, 8.0, 30.0))


def event_window(event_times, total_s: float, window_s: float) -> float:
    """Start (s) of the ``window_s`` stretch of a ``total_s`` recording holding the most events.

    The window starts a fifth of its length before one of the events (the earliest of the best), so that the
    baseline before the first transient is in view; with no event, the middle of the recording.
    """
    if window_s >= total_s:
        return 0.0
    times = np.sort(np.asarray(event_times, dtype=np.float64))
    times = times[np.isfinite(times) & (times >= 0) & (times < total_s)]
    latest = total_s - window_s
    if times.size == 0:
        return 0.5 * latest
    starts = np.clip(times - 0.2 * window_s, 0.0, latest)
    counts = np.searchsorted(times, starts + window_s, side="left") - np.searchsorted(times, starts, side="left")
    return float(starts[int(np.argmax(counts))])


def isolated_spike_average(dff, frame_rate: float, spike_times, *, isolation_s: float, before_s: float,
                           after_s: float):
    """The ΔF/F around isolated spikes: (time_s, mean, 10th percentile, 90th percentile, n_spikes).

    A spike is isolated when no other spike lies within ``isolation_s`` before or after it. The ΔF/F of each
    isolated spike is read at the spike time plus multiples of the frame interval, from ``-before_s`` to
    ``after_s``, by linear interpolation between frames (so that spikes falling between frames line up);
    missing frames (NaN) are left out of the statistics; spikes whose window leaves the recording are not used.
    """
    dff = np.asarray(dff, dtype=np.float64)
    times = np.sort(np.asarray(spike_times, dtype=np.float64))
    times = times[np.isfinite(times)]
    gaps = np.diff(times)
    alone = (np.concatenate([[np.inf], gaps]) > isolation_s) & (np.concatenate([gaps, [np.inf]]) > isolation_s)
    total_s = (dff.size - 1) / frame_rate
    chosen = times[alone & (times - before_s >= 0) & (times + after_s <= total_s)]
    offsets = np.arange(-int(round(before_s * frame_rate)), int(round(after_s * frame_rate)) + 1) / frame_rate
    frames = np.arange(dff.size) / frame_rate
    if chosen.size == 0:
        empty = np.full(offsets.size, np.nan)
        return offsets, empty, empty, empty, 0
    rows = []
    for t in chosen:
        sample = t + offsets
        left = np.clip(np.floor(sample * frame_rate).astype(int), 0, dff.size - 2)
        values = np.interp(sample, frames, dff)
        values[~(np.isfinite(dff[left]) & np.isfinite(dff[left + 1]))] = np.nan
        rows.append(values)
    rows = np.array(rows)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # an all-missing column gives NaN, drawn as a gap
        return (offsets, np.nanmean(rows, axis=0), np.nanpercentile(rows, 10, axis=0),
                np.nanpercentile(rows, 90, axis=0), int(chosen.size))


def _stretched(kernel, half_decay_s: float, amplitude: float, time_s) -> np.ndarray:
    """``kernel`` stretched in time to the half-decay ``half_decay_s`` and scaled to peak ``amplitude``."""
    from ..kernel import Kernel

    factor = half_decay_s / kernel.half_decay_s
    return Kernel(kernel.rise_s * factor, kernel.decay_s * factor, amplitude).evaluate(time_s)


def kernel_evidence(dff, spike_times, frame_rate: float, fit: dict, indicator=None, *, roi_label=""):
    """The figure of one ROI's fitted kernel over the average ΔF/F around its isolated recorded spikes, or None
    when the fit failed.

    ``fit`` holds the ROI's ``rise_s``, ``decay_s``, ``amplitude``, ``half_decay_s`` and, when bootstrapped,
    ``half_decay_low_s`` and ``half_decay_high_s``. The bootstrap band is the fitted kernel stretched in time to
    the two ends of its half-decay interval; the published range, the indicator's published kernel stretched to
    the ends of its accepted half-decay range and scaled to the ends of its accepted single-spike ΔF/F.
    """
    from ..kernel import Kernel

    if not all(np.isfinite(fit[k]) for k in ("rise_s", "decay_s", "amplitude")) or fit["decay_s"] <= 0:
        return None
    kernel = Kernel(float(fit["rise_s"]), float(fit["decay_s"]), float(fit["amplitude"]))
    after_s = 5.0 * kernel.decay_s
    time_s, mean, low, high, n = isolated_spike_average(dff, frame_rate, spike_times,
                                                        isolation_s=max(1.0, after_s), before_s=0.5,
                                                        after_s=after_s)
    fine = np.linspace(time_s[0], time_s[-1], 600)
    curve = kernel.evaluate(fine)
    band_low = band_high = None
    ends = (fit.get("half_decay_low_s", np.nan), fit.get("half_decay_high_s", np.nan))
    if all(np.isfinite(e) and e > 0 for e in ends):
        stretched = [_stretched(kernel, float(e), kernel.amplitude, fine) for e in ends]
        band_low, band_high = np.minimum(*stretched), np.maximum(*stretched)
    ref_low = ref_high = None
    label = "published range"
    halves, peaks = reference_range(indicator, "half-decay"), reference_range(indicator, "single-spike ΔF/F")
    if halves is not None and peaks is not None:
        published = Kernel.from_indicator(indicator)
        curves = [_stretched(published, h, a, fine) for h in halves[0] for a in peaks[0]]
        ref_low, ref_high = np.min(curves, axis=0), np.max(curves, axis=0)
        label = f"{halves[1]} (published range)"
    return kernel_evidence_figure(time_s, mean, low, high, n_spikes=n, fit_time_s=fine, fitted=curve,
                                  fitted_low=band_low, fitted_high=band_high, reference_low=ref_low,
                                  reference_high=ref_high, reference_label=label, roi_label=roi_label)


# ---------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------
def summary_section(report: HtmlReport, session: SessionData) -> None:
    """Where the results come from, ROIs per quality flag, the number of spikes."""
    flags = session.per_roi["quality_flags"]
    report.add_section("Summary")
    lines = [f"Results: {session.results_path}", f"Analysed with calcium {session.calcium_version}."]
    for role, entry in session.inputs.items():
        lines.append(f"Input {role}: {entry['path']} (SHA-256 {entry['sha256'][:16]}…)")
    report.add_text("\n".join(lines))
    counts = [(name, int(np.count_nonzero(flags & bit))) for bit, name in session.flag_names.items()]
    report.add_table(["quality flag", "ROIs"], [[name, n] for name, n in counts] +
                     [["any flag", int(np.count_nonzero(flags))], ["no flag", int(np.count_nonzero(flags == 0))]],
                     sortable=False, caption="ROIs per quality flag (a ROI can have several).")
    total = sum(t.size for t in session.spike_times)
    report.add_text(f"{total} spikes inferred in total ({total / max(session.n_rois, 1) / session.duration_s:.3g} "
                    f"per ROI per second on average).")


def raster_section(report: HtmlReport, spike_times, duration_s: float) -> None:
    """The inferred spikes of every ROI."""
    report.add_section("Inferred spikes of all ROIs")
    report.add_figure(raster_figure(spike_times, duration_s), name="raster",
                      caption="Inferred spikes of every ROI (many ROIs: summed counts in groups of ROIs "
                              "and time bins).")


def _examples_text(examples) -> str:
    """How the examples were chosen, saying only what is true of these examples."""
    n_electrical = sum(e.electrical_spikes is not None for e in examples)
    order = []
    if n_electrical:
        order.append(f"{'the ROI' if n_electrical == 1 else 'the ' + str(n_electrical) + ' ROIs'} with electrical "
                     f"spikes first")
    if len(examples) > n_electrical and examples[-1].flags and examples[-1].electrical_spikes is None:
        order.append(f"a flagged ROI last (ROI {examples[-1].roi}: {examples[-1].flags})")
    text = "Chosen to span the range of signal-to-noise ratios"
    text += f" ({', '.join(order)})." if order else "."
    return text + (" Each ROI is shown over the whole recording, then close up where its spikes are densest, "
                   "frame by frame.")


def significant(value, digits: int = 3):
    """``value`` rounded to ``digits`` significant digits (a float; NaN and inf unchanged; None stays None)."""
    if value is None:
        return None
    number = float(value)
    if not math.isfinite(number) or number == 0:
        return number
    return float(f"{number:.{digits}g}")


def _ms(seconds):
    """Seconds to milliseconds, 3 significant digits."""
    return significant(float(seconds) * 1e3)


def examples_section(report: HtmlReport, examples, spike_times, frame_rate: float) -> None:
    """Each example ROI through the stages: raw F, F0, ΔF/F, the denoised fit and the spikes."""
    if not examples:
        return
    report.add_section("Example ROIs through the stages", _examples_text(examples))
    for example in examples:
        values = example.traces
        fig = stages_figure(frame_rate, example.raw, f0=values.get("f0"), dff=values.get("dff"),
                            filtered=values.get("dff_filtered"), denoised=values.get("denoised"),
                            spike_times=spike_times[example.roi], true_spike_times=example.electrical_spikes,
                            missing=example.missing, roi_label=f"ROI {example.roi}")
        note = f"; flags: {example.flags}" if example.flags else ""
        report.add_figure(fig, name=f"roi-{example.roi}",
                          caption=f"ROI {example.roi}, the whole recording: {example.where}, F0, ΔF/F, denoised "
                                  f"fit and inferred spikes{note}.")
        dff = values.get("dff")
        if dff is None or not np.isfinite(dff).any():
            continue
        total_s = dff.size / frame_rate
        window_s = min(close_up_length(example.decay_s), total_s)
        recorded = example.electrical_spikes
        events = spike_times[example.roi] if recorded is None else np.concatenate([spike_times[example.roi],
                                                                                   recorded])
        start = event_window(events, total_s, window_s)
        report.add_figure(zoom_figure(frame_rate, dff, denoised=values.get("denoised"),
                                      spike_times=spike_times[example.roi], true_spike_times=recorded,
                                      start_s=start, duration_s=window_s, roi_label=f"ROI {example.roi}"),
                          name=f"roi-{example.roi}-close-up",
                          caption=f"ROI {example.roi} close up, {window_s:.3g} s where its spikes are densest: "
                                  f"ΔF/F frame by frame, the model fit, the inferred spikes with their number at "
                                  f"each time" + (" and the electrically recorded spikes." if recorded is not None
                                                  else "."))


def noise_section(report: HtmlReport, session: SessionData) -> None:
    """Noise, SNR and the kinetics the inference used (the calibration section when counts were calibrated)."""
    per_roi, indicator = session.per_roi, session.indicator
    report.add_section("Noise, signal-to-noise ratio and kinetics")
    if (~session.failed).any():
        report.add_figure(noise_figure(per_roi["noise_sd"]), name="noise",
                          caption="Noise standard deviation of ΔF/F per ROI.")
    report.add_figure(distribution_figure(per_roi["snr"], name="SNR", unit=""), name="snr",
                      caption="Signal-to-noise ratio (peak of the denoised ΔF/F over the noise s.d.) over ROIs.")
    half = half_decays(per_roi["kernel_rise_s"], per_roi["kernel_decay_s"])
    reference = reference_range(indicator, "half-decay")
    known = half[np.isfinite(half)]
    if session.calibration is not None:
        calibration_section(report, session.calibration, session.n_rois)
    elif known.size and np.ptp(known) == 0:
        report.add_text(f"The inference used one fixed kernel for every ROI (half-decay time {known[0]:.3g} s"
                        + (f", from the published kinetics of {indicator})." if indicator else ")."))
    else:
        report.add_figure(distribution_figure(half, name="half-decay time of the inference kernel", unit="s",
                                              reference_range=None if reference is None else reference[0],
                                              reference_label=f"{reference[1]} range" if reference else "range"),
                          name="kernel-half-decay",
                          caption="Half-decay time of the kernel estimated by the inference, per ROI"
                                  + (f"; shaded: the range accepted for {reference[1]} (a factor 2 around the "
                                     f"published value)." if reference else "."))


def calibration_section(report: HtmlReport, calibration: dict, n_rois: int) -> None:
    """How the counts were calibrated, the session kernel with its spread, each ROI's single-spike size."""
    from ..kernel import Kernel

    session, per_roi = calibration["session"], calibration["per_roi"]
    calibrated = per_roi["calibrated"].astype(bool)
    n_bad = int(n_rois - calibrated.sum())
    text = session.get("summary", "")
    verdict = (f"{n_bad} of {n_rois} ROIs have UNCALIBRATED counts: their single-spike size could not be identified "
               f"(reason in the table's flags). Do not read their counts as numbers of spikes." if n_bad else
               "Every ROI's count is calibrated.")
    report.add_section("Spike counts: calibration", verdict)
    for line in text.splitlines():
        report.add_text(line)
    if session.get("source") in (None, "none") or "rise_s" not in session:
        return
    sizes = per_roi["spike_size"]
    median = float(np.nanmedian(sizes)) if np.isfinite(sizes).any() else 1.0
    duration = 5.0 * float(session["decay_s"])
    time = np.linspace(0.0, duration, 400)
    shape = Kernel(float(session["rise_s"]), float(session["decay_s"]), median)
    spread = []
    rise_range, decay_range = session.get("rise_range_s", []), session.get("decay_range_s", [])
    if len(rise_range) == 2 and len(decay_range) == 2 and np.all(np.isfinite(rise_range + decay_range)):
        for rise in rise_range:
            for decay in decay_range:
                if 0 <= rise < decay:
                    spread.append(Kernel(rise, decay, median).evaluate(time))
    fig = calibration_figure(time, shape.evaluate(time), np.array(spread), sizes, per_roi["spike_size_low"],
                             per_roi["spike_size_high"], calibrated,
                             kinetics_label=f"session kernel ({session.get('source')})")
    report.add_figure(fig, name="calibration",
                      caption="Left: the kernel shared by the session's ROIs, at the median single-spike size, with "
                              "the range of the per-ROI kinetics (10-90 %). Right: each ROI's single-spike ΔF/F with "
                              "its 90 % interval; hollow markers: uncalibrated ROIs.")


def electrical_section(report: HtmlReport, electrical: dict, indicator, frame_rate: float) -> None:
    """Kernels fitted to the electrically recorded spikes and the scores of the inference against them."""
    rois, fit, score, notes = electrical["roi"], electrical["fit"], electrical["score"], electrical["notes"]
    report.add_section("ROIs with electrical spikes: fitted kernels and scores")
    reference = reference_range(indicator, "half-decay")
    report.add_figure(distribution_figure(fit["half_decay_s"], name="fitted half-decay time", unit="s",
                                          reference_range=None if reference is None else reference[0],
                                          reference_label=f"{reference[1]} range" if reference else "range"),
                      name="fit-half-decay", caption="Half-decay time of the kernels fitted to the electrical spikes.")
    amplitude = reference_range(indicator, "single-spike ΔF/F")
    report.add_figure(distribution_figure(fit["amplitude"], name="fitted single-spike ΔF/F", unit="ΔF/F",
                                          reference_range=None if amplitude is None else amplitude[0],
                                          reference_label=f"{amplitude[1]} range" if amplitude else "range"),
                      name="fit-amplitude", caption="Peak ΔF/F of one spike in the fitted kernels.")
    good = np.isfinite(fit["decay_s"])
    if good.any():
        from ..kernel import Kernel

        median = Kernel(float(np.median(fit["rise_s"][good])), float(np.median(fit["decay_s"][good])),
                        float(np.median(fit["amplitude"][good])))
        n = int(math.ceil(5 * median.decay_s * frame_rate)) + 1
        time_s = np.arange(n) / frame_rate
        reference_kernel = None
        if indicator:
            reference_kernel = Kernel.from_indicator(indicator).impulse_response(frame_rate, n)
        report.add_figure(kernel_figure(time_s, fitted=median.impulse_response(frame_rate, n),
                                        reference=reference_kernel, fitted_label="median fitted kernel",
                                        reference_label=f"{indicator} (published)" if indicator else "reference"),
                          name="fit-kernel", caption="Kernel with the median fitted time constants and amplitude"
                                                     + (", beside the published one." if indicator else "."))
    shown = 0
    for k, roi in enumerate(rois):
        roi = int(roi)
        if shown >= MAX_KERNEL_EVIDENCE or roi not in electrical.get("dff", {}):
            continue
        fig = kernel_evidence(electrical["dff"][roi], electrical["spike_times"][roi], frame_rate,
                              {name: values[k] for name, values in fit.items()}, indicator, roi_label=f"ROI {roi}")
        if fig is None:
            continue
        shown += 1
        report.add_figure(fig, name=f"fit-data-{roi}",
                          caption=f"ROI {roi}: the ΔF/F around its isolated electrical spikes (on the imaging "
                                  f"clock, with the fitted lag), averaged, with the 10-90 % range over the spikes; "
                                  f"the fitted kernel over it with the interval of its half-decay time from the "
                                  f"bootstrap" + (f"; shaded: the range accepted for {indicator}." if indicator
                                                  else "."))
    report.add_figure(score_figure(score["precision"], score["recall"], score["f1"],
                                   bin_widths_s=electrical["bin_widths_s"], correlation=electrical["correlation"],
                                   labels=[str(r) for r in rois]),
                      name="scores", caption="Inferred against electrically recorded spikes, per ROI.")
    header = ["ROI", "electrical spikes", "inferred", "matched", "precision", "recall", "F1",
              "timing error (ms)", "rise (ms)", "decay (ms)", "half-decay (ms)", "amplitude (ΔF/F)", "lag (ms)", "R²"]
    rows = [[int(r), int(score["n_true"][k]), int(score["n_inferred"][k]), int(score["n_matched"][k]),
             significant(score["precision"][k]), significant(score["recall"][k]), significant(score["f1"][k]),
             _ms(score["timing_error_mean_s"][k]), _ms(fit["rise_s"][k]), _ms(fit["decay_s"][k]),
             _ms(fit["half_decay_s"][k]), significant(fit["amplitude"][k]), _ms(fit["lag_s"][k]),
             significant(fit["r_squared"][k])] for k, r in enumerate(rois)]
    report.add_table(header, rows, caption="Kernel fits and scores of the ROIs with electrical spikes.",
                     flags=[str(n) for n in notes])


def rhythms_section(report: HtmlReport, rhythms_data: RhythmsData, frame_rate: float, spike_times) -> None:
    """The session's spectrum with its shared peaks, the scalogram and spectrogram of the average of the ROIs
    searched, the phase locking of the spikes to each rhythm, and one ROI before and after removal."""
    from ..infer import infer_spikes
    from ..kernel import Kernel
    from ..signal.rhythms import (N_SURROGATES, phase_locking, remove_rhythms, rhythm_phase, scalogram,
                                  spectrogram)

    record, spectra, rate = rhythms_data.record, rhythms_data.spectra, frame_rate
    rhythms = record.get("rhythms") or []
    summary = str(record.get("summary", ""))
    report.add_section("Periodic artefacts: rhythms shared across the session",
                       (f"{len(rhythms)} shared rhythm(s) found. " if rhythms else "No shared rhythm found. ") +
                       ("They were removed before the inference (" + record.get("removal", "") + ")."
                        if rhythms and record.get("action") == "remove" else
                        "They were NOT removed; set [rhythms] action = \"remove\" to remove them. Their bands "
                        "were left out of every ROI's noise estimate." if rhythms else ""))
    for line in summary.splitlines():
        report.add_text(line)
    if "freq_hz" not in record and not np.isfinite(spectra["freq_hz"]).any():
        return
    neuropil = rhythms_data.neuropil
    after = spectra["median_power_after"]
    reference = ("its own neuropil ring" if record.get("reference") == "neuropil" else
                 "the average of the others")
    report.add_figure(
        rhythm_spectrum_figure(spectra["freq_hz"], spectra["median_power"], background=spectra["background"],
                               low_power=spectra["power_low"], high_power=spectra["power_high"],
                               after=after if np.isfinite(after).any() else None, coherence=spectra["coherence"],
                               coherence_null=rhythms[0]["coherence_null"] if rhythms else None,
                               peaks_hz=[r["frequency_hz"] for r in rhythms], neuropil=neuropil,
                               resolution_hz=record.get("resolution_hz")),
        name="rhythm-spectrum",
        caption=f"Power spectrum of the inference's input over the {record.get('n_rois', '?')} ROIs searched: median "
                f"and 10-90 % range, the aperiodic background, the shared rhythms found (dotted)"
                + (", the neuropil rings' median spectrum (relative to their mean F)" if neuropil is not None else "")
                + f" and, below, the median coherence of each ROI with {reference}.")
    average = rhythms_data.average
    if np.isfinite(average).sum() >= 16:
        wavelets = scalogram(average, rate)
        report.add_figure(time_frequency_figure(wavelets.time_s, wavelets.freq_hz, wavelets.amplitude,
                                                reliable=wavelets.reliable, log_frequency=True,
                                                resolution=wavelets.describe(),
                                                title="scalogram of the average of the ROIs searched"),
                          name="rhythm-scalogram",
                          caption="Amplitude of the average ΔF/F at each frequency and time (Morlet wavelets); "
                                  "pale: the cone of influence, where the ends disturb the values.")
        try:
            windows = spectrogram(average, rate, window_s=float(record.get("segment_s", 10.0)))
            report.add_figure(time_frequency_figure(windows.time_s, windows.freq_hz, windows.power,
                                                    value_label="power (ΔF/F² / Hz)", resolution=windows.describe(),
                                                    title="spectrogram of the average of the ROIs searched"),
                              name="rhythm-spectrogram", caption="Power of the average ΔF/F in consecutive windows.")
        except ValueError:
            pass
    if not rhythms:
        return
    searched = [int(r) for r in record.get("rois", [])][:100]
    rows = []
    for r in rhythms:
        phase = rhythm_phase(average, rate, tuple(r["band_hz"]))
        locking = [phase_locking(spike_times[roi], phase, n_surrogates=N_SURROGATES, seed=roi) for roi in searched]
        counted = [x for x in locking if x.n_spikes > 0]
        locked = sum(x.p_value <= 0.05 for x in counted)
        rows.append([f"{r['frequency_hz']:.2f}", len(counted), locked,
                     f"{locked / len(counted):.0%}" if counted else "-",
                     significant(np.median([x.plv for x in counted])) if counted else float("nan"),
                     significant(np.median([x.null_plv for x in counted])) if counted else float("nan")])
    report.add_table(["rhythm (Hz)", "ROIs with spikes", "locked (p <= 0.05)", "share locked", "median PLV",
                      "median PLV by chance"], rows, sortable=False,
                     caption="Phase locking of each ROI's inferred spikes to each rhythm (its phase in the average of "
                             "the ROIs searched; interval-jitter surrogates): 5 % of the ROIs lock by chance. Spikes "
                             "that lock to a rhythm left in the traces may be faked by it; spikes that still lock "
                             "after its removal suggest that the cells are entrained.")
    roi, before = rhythms_data.example_roi, rhythms_data.before
    if roi is None or before is None:
        return
    bands = [tuple(x["band_hz"]) for x in rhythms]
    removed = record.get("action") == "remove"
    method = str(record.get("method", "regression"))
    after = rhythms_data.after if removed and rhythms_data.after is not None else \
        remove_rhythms(before, rate, bands, method=method, reference=average if method == "regression" else None).cleaned
    kernel = Kernel(*(float(v) for v in rhythms_data.kernel))
    noise = float(rhythms_data.noise_sd)
    other = infer_spikes(before if removed else after, rate, kernel=kernel,
                         noise_sd=noise if noise > 0 else None).spike_times
    spikes_before, spikes_after = (other, spike_times[roi]) if removed else (spike_times[roi], other)
    start = min(max(0.0, before.size / rate / 2 - 15.0), before.size / rate - 1.0 / rate)
    report.add_figure(rhythm_removal_figure(rate, before, after, spikes_before=spikes_before, spikes_after=spikes_after,
                                            start_s=start, duration_s=30.0, roi_label=f"ROI {roi}",
                                            band_label=", ".join(f"{r['frequency_hz']:.2f} Hz" for r in rhythms)),
                      name="rhythm-removal",
                      caption=f"ROI {roi}, where the strongest rhythm is largest: ΔF/F with the rhythm and "
                              + ("after its removal by the run" if removed else
                                 f"after removal by {method} (a preview: the run did not remove them)")
                              + ", and the spikes inferred from each with the ROI's kernel.")


def table_section(report: HtmlReport, session: SessionData) -> None:
    """The quality flags explained and one row per ROI."""
    per_roi, calibration, duration_s = session.per_roi, session.calibration, session.duration_s
    report.add_section("Quality flags and per-ROI table",
                       "Flags: failed (no results), low SNR, saturation suspected (raw maximum repeated), F0 "
                       "problem (F0 <= 0 or clipped at the floor), many missing frames, solver not converged. "
                       "Click a column heading to sort.")
    header = ["ROI", "spikes", "rate (Hz)", "noise SD (ΔF/F)", "SNR", "missing frames", "min F0 (a.u.)",
              "kernel decay (ms)", "flags"]
    rows = [[i, int(per_roi["n_spikes"][i]), significant(per_roi["n_spikes"][i] / duration_s),
             significant(per_roi["noise_sd"][i]), significant(per_roi["snr"][i]), int(per_roi["missing_frames"][i]),
             significant(per_roi["f0_min"][i]), _ms(per_roi["kernel_decay_s"][i]), session.flag_descriptions[i]]
            for i in range(session.n_rois)]
    if calibration is not None:
        sizes = calibration["per_roi"]
        source = str(calibration["session"].get("source") or "none")
        header[2:2] = ["spikes (90 % interval)", "spike size ΔF/F (90 %)", "calibrated", "calibration source"]
        for i, row in enumerate(rows):
            row[2:2] = [f"{int(sizes['count_low'][i])}-{int(sizes['count_high'][i])}",
                        f"{sizes['spike_size'][i]:.3g} ({sizes['spike_size_low'][i]:.3g}-"
                        f"{sizes['spike_size_high'][i]:.3g})", "yes" if sizes["calibrated"][i] else "NO",
                        source if sizes["calibrated"][i] else "-"]
    report.add_table(header, rows, caption=f"All {session.n_rois} ROIs.", flags=[str(f) for f in per_roi["flags"]])


def session_report(session: SessionData) -> HtmlReport:
    """The whole session report of ``session``, section by section (not yet written to disk)."""
    report = HtmlReport("Session analysis", subtitle=f"{session.n_rois} ROIs, {session.n_frames} frames at "
                                                     f"{session.frame_rate:g} Hz ({session.duration_s / 60:.1f} min)")
    summary_section(report, session)
    raster_section(report, session.spike_times, session.duration_s)
    examples_section(report, session.examples, session.spike_times, session.frame_rate)
    noise_section(report, session)
    if session.electrical is not None:
        electrical_section(report, session.electrical, session.indicator, session.frame_rate)
    if session.rhythms is not None:
        rhythms_section(report, session.rhythms, session.frame_rate, session.spike_times)
    table_section(report, session)
    return report
