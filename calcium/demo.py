"""The demo session: an invented recording, and the end-to-end run behind ``calcium demo``.

Scenario (invented for the demo, not a real experiment): session ``reef-03`` images 12 neurons of the
"lantern nucleus" of a fictional reef fish at 15 frames per second for 64 s, in a 48 × 48-pixel field of view,
with a GCaMP6s-like indicator. Three of the cells were also recorded electrically (loose patch); the
electrophysiology clock was started 0.15 s after the first imaging frame, so the electrical spike times must be
shifted by +0.15 s to line up with the movie. The movie, the ROI label image and the electrical spike times are
all made by :func:`make_demo_data` from the forward model with a fixed seed.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np

__all__ = ["DEMO_SCENARIO", "make_demo_data", "demo_data_folder", "run_demo"]

DEMO_SCENARIO = {
    "session": "reef-03",
    "preparation": "lantern nucleus of a fictional reef fish (invented)",
    "indicator": "GCaMP6s",
    "frame_rate": 15.0,
    "duration_s": 64.0,
    "field_px": 48,
    "n_rois": 12,
    "patched_rois": [2, 5, 9],
    "ephys_clock_offset_s": 0.15,
    "seed": 2026,
}

_SCENARIO_TEXT = (
    "An invented session, made for this demo: 12 neurons of the 'lantern nucleus' of a fictional reef fish, "
    "imaged at 15 frames per second for 64 s in a 48 x 48-pixel field of view with a GCaMP6s-like indicator. "
    "Cells 2, 5 and 9 were also recorded electrically; the electrophysiology clock started 0.15 s after the "
    "first imaging frame. The tool is not told the offset: it finds it while fitting the kernel.")

_FILES = ("movie.tif", "rois.tif", "electrical_spikes.csv", "truth_spikes.csv", "scenario.json")


def _place_cells(rng, n_cells: int, size: int, radius: float) -> np.ndarray:
    """Centres of ``n_cells`` non-overlapping discs inside a ``size`` square."""
    centres = []
    margin = radius + 2
    while len(centres) < n_cells:
        c = rng.uniform(margin, size - margin, 2)
        if all(np.hypot(*(c - d)) > 2 * radius + 3 for d in centres):
            centres.append(c)
    return np.array(centres)


def make_demo_data(folder, *, seed: int | None = None) -> Path:
    """Write the invented demo session into ``folder`` and return the folder.

    Files: ``movie.tif`` (uint16, frames × 48 × 48), ``rois.tif`` (label image, 0 = background),
    ``electrical_spikes.csv`` (``roi,time_s`` on the electrophysiology clock, for the patched cells),
    ``truth_spikes.csv`` (every cell's spikes on the imaging clock) and ``scenario.json``.
    """
    import tifffile

    from calcium.forward import BaselineModel, NoiseModel, SpikeModel, simulate_recording
    from calcium.io import atomic_output, write_spike_table

    sc = dict(DEMO_SCENARIO)
    if seed is not None:
        sc["seed"] = int(seed)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(sc["seed"])
    size, n = sc["field_px"], sc["n_rois"]
    fr = sc["frame_rate"]

    # cells: discs of radius 3-4 px, brightness varying between cells
    radius = 3.5
    centres = _place_cells(rng, n, size, radius)
    yy, xx = np.mgrid[0:size, 0:size]
    labels = np.zeros((size, size), np.uint16)
    for i, (cy, cx) in enumerate(centres):
        r = radius * rng.uniform(0.85, 1.1)
        labels[(yy - cy) ** 2 + (xx - cx) ** 2 <= r * r] = i + 1

    rates = rng.uniform(0.2, 0.6, n)
    rates[sc["patched_rois"]] = 0.4  # the patched cells were chosen for being active
    sim = simulate_recording(n, sc["duration_s"], fr, indicator=sc["indicator"],
                             spikes=SpikeModel(rate_hz=rates, spike_model="bursts", burst_size_mean=1.6,
                                               burst_isi_s=0.04),
                             baseline=BaselineModel(f0=rng.uniform(25, 70, n), bleach_fraction=0.25,
                                                    bleach_tau_s=40.0),
                             noise=NoiseModel(noise_sd=0.0), seed=sc["seed"])
    n_frames = sim.n_frames
    cell_f = sim.f0 * (1.0 + sim.dff_clean)                       # noise-free cell fluorescence

    # neuropil: a smooth background whose activity is a blurred mix of all cells plus a slow wave
    t = np.arange(n_frames) / fr
    mix = sim.dff_clean.mean(axis=0)
    background = 12.0 * (1.0 + 0.6 * mix + 0.05 * np.sin(2 * np.pi * t / 11.0))
    bleach = sim.f0[0] / sim.f0[0, 0]
    spatial = 1.0 + 0.25 * np.exp(-((yy - size / 2) ** 2 + (xx - size / 2) ** 2) / (2 * (size / 3) ** 2))
    movie = background[:, None, None] * bleach[:, None, None] * spatial[None]
    for i in range(n):
        # the neuropil also shines through each cell body (that is what the ring corrects)
        movie[:, labels == i + 1] = movie[:, labels == i + 1] * 0.8 + cell_f[i][:, None]
    movie = rng.poisson(movie).astype(np.uint16)                  # photon shot noise, one count per photon

    # electrical spikes of the patched cells, on the electrophysiology clock (starts later by the offset)
    truth = {i: np.asarray(s) for i, s in enumerate(sim.spike_times)}
    ephys = {i: truth[i] - sc["ephys_clock_offset_s"] for i in sc["patched_rois"]}
    ephys = {i: s[s >= 0] for i, s in ephys.items()}

    with atomic_output(folder / "movie.tif") as tmp:
        tifffile.imwrite(tmp, movie, photometric="minisblack", metadata={"axes": "TYX"})
    with atomic_output(folder / "rois.tif") as tmp:
        tifffile.imwrite(tmp, labels, photometric="minisblack")
    write_spike_table(folder / "electrical_spikes.csv", ephys)
    write_spike_table(folder / "truth_spikes.csv", truth)
    sc["kernel"] = {"rise_s": sim.kernel.rise_s, "decay_s": sim.kernel.decay_s, "amplitude": sim.kernel.amplitude}
    sc["n_frames"] = int(n_frames)
    with atomic_output(folder / "scenario.json") as tmp:
        tmp.write_text(json.dumps(sc, indent=2) + "\n", encoding="utf-8")
    return folder


def demo_data_folder() -> Path | None:
    """The bundled ``demo_data/`` of a source checkout, if it is there and complete."""
    here = Path(__file__).resolve().parent.parent / "demo_data"
    return here if all((here / f).exists() for f in _FILES) else None


def run_demo(out, *, progress: bool = True, overwrite: bool = False) -> Path:
    """Run every stage on the demo session and write an HTML report into ``out``; return ``index.html``."""
    out = Path(out)
    if out.exists() and any(out.iterdir()):
        if not overwrite:
            raise ValueError(f"{out}: the report folder exists and is not empty; pass --overwrite to replace it")
        if not (out / "index.html").exists():
            raise ValueError(f"{out}: not a calcium report folder (no index.html); refusing to delete it")
        shutil.rmtree(out)
    out.mkdir(parents=True, exist_ok=True)
    data = demo_data_folder()
    if data is None:  # an installed package without the source tree: make the data afresh (same seed)
        data = make_demo_data(out / "demo_data")
    return _demo_report(data, out, progress=progress)


def _demo_report(data: Path, out: Path, *, progress: bool) -> Path:
    """Every stage on the demo session, each through the public API, then the HTML report."""
    from tqdm.auto import tqdm

    sc = json.loads((data / "scenario.json").read_text(encoding="utf-8"))
    with tqdm(total=9, desc="demo", unit="stage", disable=not progress) as steps:
        return _demo_stages(data, out, sc, steps)


def _demo_stages(data: Path, out: Path, sc: dict, steps) -> Path:
    import warnings

    import calcium
    from calcium.report import HtmlReport
    from calcium.report import figures as fig

    fr = float(sc["frame_rate"])
    patched = [int(i) for i in sc["patched_rois"]]

    def step(name):
        steps.set_postfix_str(name)
        steps.update(1)

    # 1. movie + masks -> traces
    with calcium.open_movie(data / "movie.tif") as movie:
        masks = calcium.read_masks(data / "rois.tif")
        ext = calcium.extract_traces(movie, masks, progress=False)
    step("extract")
    # 2. ΔF/F (a short session: a 10 s baseline window)
    dff = calcium.delta_f_over_f(ext.corrected, fr, window_s=10.0)
    step("ΔF/F")
    # 3. zero-phase low-pass for display, and the noise level of every ROI
    lowpass = calcium.design_filter("lowpass", 3.0, fr, order=4)
    filtered, edge_mask = lowpass.apply(dff.dff, edges="mark")
    noise = np.atleast_1d(calcium.estimate_noise(dff.dff, fr))
    step("filter + noise")
    # 4. kernel and clock lag from the cells with electrical spikes
    ephys = calcium.read_spike_times(data / "electrical_spikes.csv")
    fits = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # spikes near the ends are counted and reported by the fit itself
        for roi in patched:
            fits[roi] = calcium.fit_kernel(dff.dff[roi], ephys[roi], fr, initial=sc["indicator"], n_bootstrap=100,
                                            isolation_s=0.8)
    kernel = calcium.Kernel(rise_s=float(np.median([f.kernel.rise_s for f in fits.values()])),
                            decay_s=float(np.median([f.kernel.decay_s for f in fits.values()])),
                            amplitude=float(np.median([f.kernel.amplitude for f in fits.values()])))
    lag = float(np.median([f.lag_s for f in fits.values()]))
    check = calcium.check_kinetics(kernel, sc["indicator"])
    step("fit kernel")
    # 5. forward model: what imaging should show for the electrical spikes (on the imaging clock)
    predicted = {roi: calcium.predict_fluorescence(ephys[roi] + lag, kernel, fr, dff.dff.shape[1])
                 + fits[roi].baseline for roi in patched}
    step("forward model")
    # 6. spike inference for every ROI, counted with the session calibration (paired: the patched cells' fits give
    # the kinetics and the prior of the others' single-spike sizes), as `calcium run` does
    session = calcium.infer_session(dff.dff, fr, electrical_spikes={roi: ephys[roi] for roi in patched},
                                    indicator=sc["indicator"])
    inferred = list(session.results)
    step("inference")
    # 7. scores: against the electrical spikes (patched cells) and the simulation's ground truth (all cells)
    truth = calcium.read_spike_times(data / "truth_spikes.csv")
    found = {i: r.spike_times for i, r in enumerate(inferred)}
    vs_ephys = calcium.score_many({i: found[i] for i in patched}, {i: ephys[i] + lag for i in patched},
                                  tolerance_s=0.1)
    vs_truth = calcium.score_many(found, {i: truth.get(i, np.empty(0)) for i in found}, tolerance_s=0.1)
    step("score")
    # 8. would single spikes be detectable at other frame rates, at this session's noise?
    plan = calcium.plan_detectability(kernel=kernel, frame_rates=(fr / 2, fr, 2 * fr),
                                      noise_sd=(float(np.median(noise)), 2 * float(np.median(noise))),
                                      n_trials=60, seed=1)
    step("plan")

    rep = HtmlReport(f"calcium demo: session {sc['session']}",
                     subtitle=f"{sc['n_rois']} ROIs, {fr:g} Hz, {dff.dff.shape[1] / fr:g} s, "
                              f"{sc['indicator']}-like indicator (invented data)")
    rep.add_section("The session", _SCENARIO_TEXT)
    rep.add_section("Stages for example ROIs",
                    "Raw fluorescence with its running-percentile baseline F0, ΔF/F with the zero-phase "
                    "low-pass (3 Hz) and the denoised fit, inferred spikes, and electrically recorded spikes "
                    "(shifted by the fitted clock lag) where the cell was patched.")
    for roi in patched + [r for r in range(min(4, ext.corrected.shape[0])) if r not in patched][:2]:
        res = inferred[roi]
        rep.add_figure(fig.stages_figure(fr, ext.corrected[roi], f0=dff.f0[roi], dff=dff.dff[roi],
                                         filtered=filtered[roi], denoised=res.denoised,
                                         spike_times=res.spike_times,
                                         true_spike_times=ephys[roi] + lag if roi in ephys else None,
                                         roi_label=f"ROI {roi}"),
                       caption=f"ROI {roi}" + (" (patched)" if roi in ephys else ""), name=f"stages_roi{roi}")
    rep.add_section("Filter and noise")
    rep.add_text(lowpass.describe())
    rep.add_figure(fig.filter_figure(lowpass), caption="Frequency response of the display low-pass, one pass "
                   "and forward-backward (zero phase).", name="filter")
    rep.add_figure(fig.noise_figure(noise), caption="Noise s.d. of ΔF/F per ROI (upper band of the Welch "
                   "power spectrum).", name="noise")
    rep.add_section("Indicator kinetics from the patched cells")
    for roi, f in fits.items():
        rep.add_text(f"ROI {roi}:\n{f}", preformatted=True)
        rep.add_figure(fig.kernel_fit_figure(f, reference=calcium.Kernel.from_indicator(sc["indicator"]),
                                             reference_label=f"published {sc['indicator']}"),
                       caption=f"Fitted single-spike response, ROI {roi}", name=f"kernel_roi{roi}")
    rep.add_text(f"Kernel used for inference (median of the fits): {kernel}; clock lag {lag * 1e3:+.0f} ms "
                 f"(the scenario's true offset is {sc['ephys_clock_offset_s'] * 1e3:+.0f} ms).")
    rep.add_text(str(check), preformatted=True)
    rep.add_section("Forward model: predicted against recorded ΔF/F")
    for roi in patched:
        rep.add_figure(fig.prediction_figure(fr, dff.dff[roi], predicted[roi], ephys[roi] + lag,
                                             roi_label=f"ROI {roi}"),
                       caption=f"ROI {roi}: the fitted kernel driven by the electrical spikes.",
                       name=f"predict_roi{roi}")
    rep.add_section("Spike counts: calibration")
    cal = session.calibration
    rep.add_text(cal.summary())
    times = np.linspace(0.0, 5.0 * cal.decay_s, 400)
    spread = [calcium.Kernel(r, d, float(np.nanmedian(cal.spike_size))).evaluate(times)
              for r in cal.rise_range_s for d in cal.decay_range_s if 0 <= r < d]
    rep.add_figure(fig.calibration_figure(times, cal.kernel(0).scaled(float(np.nanmedian(cal.spike_size)))
                                          .evaluate(times), np.array(spread), cal.spike_size, cal.spike_size_low,
                                          cal.spike_size_high, session.calibrated,
                                          kinetics_label=f"session kernel ({cal.source})"),
                   caption="Left: the kernel shared by the session's ROIs with the range of the per-ROI kinetics. "
                           "Right: each ROI's single-spike ΔF/F with its 90 % interval (hollow: uncalibrated).",
                   name="calibration")
    rep.add_section("Inferred spikes")
    rep.add_figure(fig.raster_figure([r.spike_times for r in inferred], duration_s=dff.dff.shape[1] / fr),
                   caption="Inferred spikes of every ROI.", name="raster")
    rep.add_section("Scores")
    rep.add_text("Against the electrical spikes (patched cells), matched within 0.1 s:")
    rep.add_text(str(vs_ephys), preformatted=True)
    rep.add_text("Against the simulation's ground truth (every cell; only an invented session has one):")
    rep.add_text(str(vs_truth), preformatted=True)
    rep.add_figure(fig.score_figure([s.precision for s in vs_truth.scores], [s.recall for s in vs_truth.scores],
                                    [s.f1 for s in vs_truth.scores],
                                    bin_widths_s=[w for w, _ in vs_truth.scores[0].correlations],
                                    correlation=[[r for _, r in s.correlations] for s in vs_truth.scores],
                                    labels=[f"ROI {i}" for i in vs_truth.rois], tolerance_s=0.1),
                   caption="Precision, recall and F1 per ROI, and the correlation of binned counts.", name="scores")
    rep.add_section("Planning: single-spike detectability")
    rep.add_text(str(plan), preformatted=True)
    rep.add_figure(fig.plan_figure(plan, session_frame_rate=fr),
                   caption=f"Detection probability of single spikes at a 1 % false-positive rate at half, once and "
                           f"twice this session's frame rate ({fr:g} Hz), at this session's noise and twice it.",
                   name="plan")
    rep.add_section("Per-ROI table")
    header = ["roi", "noise_sd", "snr", "n_inferred", "count 90 %", "spike size", "n_true", "f1", "missing_frames"]
    rows, flags = [], []
    for i, r in enumerate(inferred):
        snr = float(cal.spike_size[i]) / noise[i]
        s = vs_truth[i]
        rows.append([i, float(noise[i]), snr, int(r.n_spikes),
                     f"{int(session.count_low[i])}-{int(session.count_high[i])}", float(cal.spike_size[i]),
                     s.n_true, s.f1, int(dff.missing.per_roi[i])])
        flags.append("; ".join(x for x in ("low SNR" if snr < 2 else "",
                                           "uncalibrated counts: " + session.reasons[i] if session.reasons[i]
                                           else "") if x))
    rep.add_table(header, rows, caption="Click a column heading to sort.", flags=flags)
    page = rep.write(out)
    step("report")  # (the ninth stage: the bar reaches its end)
    return page
