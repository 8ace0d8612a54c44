"""One call for a whole session: :func:`run_pipeline`.

    from calcium.pipeline import run_pipeline
    summary = run_pipeline("session.toml")

reads the configuration, checks the inputs, cuts the ROIs into chunks, runs
the per-chunk stages on every core (or a dask cluster), writes each finished
chunk to ``results.h5`` at once, fits kernels and scores ROIs that have
electrical spikes, and ends with ``spikes.csv``, an HTML report and, on
request, an NWB file. Interrupted (Ctrl-C, a crash, a kill), the same call
continues where it stopped and gives the same results as an uninterrupted run.
"""
from __future__ import annotations

import contextlib
import errno
import json
import os
import shutil
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .. import __version__
from .._checks import CalciumInputError
from . import stages
from .config import ConfigError, RunConfig, load_config, parameters_digest
from .executors import check_scheduler, make_executor, prestart, progress_bar
from .store import DatasetSpec, OutputError, ResultStore, check_output_folder, open_results

__all__ = ["RunSummary", "run_pipeline", "infer_file", "write_session_report", "write_spike_table_from_results", "RESULTS_NAME", "SPIKES_NAME", "REPORT_FOLDER", "NWB_NAME"]

RESULTS_NAME = "results.h5"
SPIKES_NAME = "spikes.csv"
REPORT_FOLDER = "report"
NWB_NAME = "results.nwb"
_WORK_FOLDER = ".calcium-work"
# Frame rates given twice (configuration and file) must agree to this fraction.
_RATE_TOLERANCE = 1e-3


@dataclass(frozen=True)
class RunSummary:
    """What :func:`run_pipeline` produced.

    Attributes
    ----------
    output_folder : pathlib.Path
    results_path : pathlib.Path
        The HDF5 results (layout in docs/hdf5-layout.md).
    spikes_path : pathlib.Path
        CSV ``roi,time_s,count`` of the inferred spikes.
    report_path : pathlib.Path or None
        ``report/index.html`` (None when the report is disabled).
    nwb_path : pathlib.Path or None
        NWB export (None unless enabled).
    n_rois, n_frames : int
    frame_rate : float
    n_flagged : int
        ROIs with at least one quality flag.
    n_failed : int
        ROIs without results (flag "failed").
    chunks_total : int
    chunks_resumed : int
        Chunks found finished from an earlier, interrupted run.
    elapsed_s : float
        Wall time of this call.
    frames_per_second : float
        ROI-frames analysed by this call per second of wall time
        (``rois computed x n_frames / elapsed_s``).
    backend : str
    workers : int
    n_uncalibrated : int
        ROIs whose spike counts are not calibrated (flag "uncalibrated
        counts"): their single-spike size could not be identified.
    rhythms : str
        What the search for shared rhythms found, in words ("" when it was
        off); see the report's section on periodic artefacts.
    calibration : str
        Plain-words summary of the session calibration ("" when the counts
        were made per ROI, without one).
    """

    output_folder: Path
    results_path: Path
    spikes_path: Path
    report_path: Path | None
    nwb_path: Path | None
    n_rois: int
    n_frames: int
    frame_rate: float
    n_flagged: int
    n_failed: int
    chunks_total: int
    chunks_resumed: int
    elapsed_s: float
    frames_per_second: float
    backend: str
    workers: int
    n_uncalibrated: int = 0
    calibration: str = ""
    rhythms: str = ""

    def __str__(self) -> str:
        if self.chunks_resumed == self.chunks_total:
            speed = f"{self.elapsed_s:.1f} s (every chunk was already done)"
        else:
            speed = (f"{self.elapsed_s:.1f} s, {self.frames_per_second / 1e6:.2f} million frames/s "
                     f"({self.backend}, {self.workers} worker(s)"
                     + (f"; {self.chunks_resumed} of {self.chunks_total} chunks resumed" if self.chunks_resumed
                        else "") + ")")
        lines = [f"{self.n_rois} ROIs x {self.n_frames} frames at {self.frame_rate:g} Hz: "
                 f"{self.n_flagged} flagged ({self.n_failed} without results)", speed,
                 f"results: {self.results_path}", f"spikes:  {self.spikes_path}"]
        if self.calibration:
            lines.append(self.calibration.splitlines()[0])
        if self.n_uncalibrated:
            lines.append(f"{self.n_uncalibrated} of {self.n_rois} ROIs have UNCALIBRATED spike counts (flag "
                         f"'uncalibrated counts': their single-spike size could not be identified); do not read "
                         f"their counts as numbers of spikes")
        elif self.calibration:
            lines.append("every ROI's spike count is calibrated")
        if self.rhythms:
            lines.append(self.rhythms)
        if self.report_path is not None:
            lines.append(f"report:  {self.report_path}")
        if self.nwb_path is not None:
            lines.append(f"NWB:     {self.nwb_path}")
        return "\n".join(lines)


def _say(progress, text: str) -> None:
    if progress:
        print(text, file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------
# preparing the inputs
# ---------------------------------------------------------------------------
@dataclass
class _Inputs:
    kind: str                      # "traces" or "movie"
    n_rois: int
    n_frames: int
    frame_rate: float
    sha256: dict                   # role -> hex digest
    paths: dict                    # role -> path
    source: stages.TraceSource | None = None
    electrical: dict | None = None


def _hash(path: Path, role: str, progress) -> str:
    from ..io import file_sha256

    size = path.stat().st_size
    if size > 1 << 30:
        _say(progress, f"checking {role} ({size / 1e9:.1f} GB: SHA-256 for the provenance record) ...")
    return file_sha256(path)


def _pick_frame_rate(given, found, where, key: str) -> float:
    """The frame rate from the caller (``key``) or from the file; both must agree when both are known."""
    if given is None and found is None:
        raise ConfigError(f"{key} is not set and {where} does not record the frame rate; set {key} (Hz)")
    if given is not None and found is not None and abs(given - found) > _RATE_TOLERANCE * found:
        raise ConfigError(f"{key} = {given:g} Hz but {where} records {found:g} Hz; remove {key} or correct it")
    return float(given if given is not None else found)


def _resolve_frame_rate(config: RunConfig, found, where) -> float:
    return _pick_frame_rate(config.inputs.frame_rate, found, where, "inputs.frame_rate")


def _write_scratch(path: Path, array: np.ndarray) -> None:
    from ..io import atomic_output

    path.parent.mkdir(exist_ok=True)
    with atomic_output(path) as tmp:
        with open(tmp, "wb") as handle:
            np.save(handle, array, allow_pickle=False)


def _prepare_inputs(config: RunConfig, work: Path, progress) -> _Inputs:
    inputs = config.inputs
    paths = {}
    for role in ("traces", "movie", "masks", "electrical_spikes"):
        path = getattr(inputs, role)
        if path is not None:
            if not path.is_file():
                raise CalciumInputError(f"inputs.{role}: file not found: {path}")
            paths[role] = path
    if config.calibration.file is not None:
        if not config.calibration.file.is_file():
            raise CalciumInputError(f"calibration.file: file not found: {config.calibration.file}")
        paths["calibration"] = config.calibration.file
    sha = {role: _hash(path, role, progress) for role, path in paths.items()}

    if inputs.movie is not None:
        from ..io import open_movie, read_masks

        masks = read_masks(inputs.masks)
        with open_movie(inputs.movie) as movie:
            n_frames = int(movie.n_frames)
            if tuple(movie.shape[1:]) != tuple(masks.shape[1:]):
                raise CalciumInputError(f"inputs.masks {inputs.masks} are {masks.shape[1]}x{masks.shape[2]} "
                                        f"pixels but the movie frames are {movie.shape[1]}x{movie.shape[2]}")
        frame_rate = _resolve_frame_rate(config, None, inputs.movie)
        prepared = _Inputs("movie", int(masks.shape[0]), n_frames, frame_rate, sha, paths)
    else:
        path = inputs.traces
        source, found = _trace_source(path, inputs.traces_dataset, work, sha["traces"], "inputs.traces")
        frame_rate = _resolve_frame_rate(config, found, path)
        prepared = _Inputs("traces", source.n_rois, source.n_frames, frame_rate, sha, paths, source=source)

    if inputs.electrical_spikes is not None:
        from ..io import read_spike_times

        electrical = read_spike_times(inputs.electrical_spikes)
        outside = [roi for roi in electrical if roi >= prepared.n_rois]
        if outside:
            raise CalciumInputError(f"inputs.electrical_spikes {inputs.electrical_spikes} names ROI {outside[0]}, "
                                    f"but there are only {prepared.n_rois} ROIs (indices 0 to "
                                    f"{prepared.n_rois - 1})")
        prepared.electrical = electrical
    return prepared


def _trace_source(path: Path, dataset, work: Path, sha: str, what: str):
    """(TraceSource the workers read rows from, frame rate recorded in the file or None)."""
    suffix = path.suffix.lower()
    if suffix == ".npy":
        return stages.npy_source(path), None
    if suffix in (".h5", ".hdf5"):
        return stages.hdf5_source(path, dataset)
    if suffix == ".csv":
        # Text cannot be read by rows: parse it once, keep a binary copy the workers can read.
        from ..io import read_traces

        data = read_traces(path)
        scratch = work / f"traces-{sha[:20]}.npy"
        if not scratch.exists():
            _write_scratch(scratch, data.traces)
        return stages.npy_source(scratch), data.frame_rate
    raise CalciumInputError(f"{what}: unsupported file type {suffix!r} ({path}); use .npy, .csv, .h5 or .hdf5")


def _stage_params(config: RunConfig, frame_rate: float, n_frames: int) -> stages.StageParams:
    dff = {"window_s": config.dff.window_s, "percentile": config.dff.percentile, "smooth_s": config.dff.smooth_s}
    if config.dff.floor is not None:
        dff["floor"] = config.dff.floor
    filt = None
    if config.filter.kind != "none":
        from ..signal import design_filter

        cutoff = config.filter.cutoff_hz
        try:
            filt = design_filter(config.filter.kind, cutoff[0] if len(cutoff) == 1 else tuple(cutoff), frame_rate,
                                 order=config.filter.order, method=config.filter.method)
        except ValueError as exc:
            raise ConfigError(f"[filter] cannot be used at {frame_rate:g} Hz: {exc}") from None
        if n_frames < filt.min_frames():
            raise ConfigError(f"[filter] needs at least {filt.min_frames()} frames, the recording has {n_frames}; "
                              f"lower filter.order or set filter.kind = \"none\"")
    from ..signal.noise import average_name

    noise = {"average": average_name(config.noise.average)}  # (a former name warns once, here)
    if config.noise.band_hz is not None:
        noise["band_hz"] = tuple(config.noise.band_hz)
        if config.noise.band_hz[1] > frame_rate / 2:
            raise ConfigError(f"noise.band_hz = {list(config.noise.band_hz)} is not allowed at {frame_rate:g} Hz: "
                              f"the band must end at or below half the frame rate ({frame_rate / 2:g} Hz)")
    return stages.StageParams(frame_rate=frame_rate, dff=dff, filter=filt, noise=noise,
                              inference=_inference_kwargs(config),
                              min_snr=config.quality.min_snr,
                              max_missing_fraction=config.quality.max_missing_fraction,
                              saturation_frames=config.quality.saturation_frames,
                              keep_f0=config.output.f0)


def _inference_kwargs(config: RunConfig) -> dict:
    inf = config.inference
    kwargs = {"order": inf.order, "threshold": inf.threshold}
    if inf.spike_size is not None:
        kwargs["spike_size"] = inf.spike_size
    if inf.penalty is not None:
        kwargs["penalty"] = inf.penalty
    if inf.decay_s is not None:
        from ..kernel import Kernel

        kwargs["kernel"] = Kernel(inf.rise_s, inf.decay_s)
    elif inf.indicator is not None:
        from ..indicators import get_indicator

        try:
            get_indicator(inf.indicator)
        except ValueError as exc:
            raise ConfigError(f"inference.indicator = {inf.indicator!r} is not allowed: {exc}") from None
        kwargs["indicator"] = inf.indicator
    return kwargs


def _rhythm_params(config: RunConfig, prepared, params, store, progress):
    """The stage parameters with the session's shared rhythms (searched once, recorded in the results)."""
    cfg = config.rhythms
    if cfg.action == "off":
        return params
    if cfg.lowest_hz >= prepared.frame_rate / 2:
        raise ConfigError(f"rhythms.lowest_hz = {cfg.lowest_hz:g} is not allowed at {prepared.frame_rate:g} Hz: it must "
                          f"lie below half the frame rate ({prepared.frame_rate / 2:g} Hz)")
    return stages.with_rhythms(prepared.source, params, store, action=cfg.action, method=cfg.method,
                               max_rois=cfg.max_rois, segment_s=cfg.segment_s, min_share=cfg.min_share,
                               false_alarm=cfg.false_alarm, lowest_hz=cfg.lowest_hz, progress=progress,
                               neuropil=store.read("rhythms/neuropil") if prepared.kind == "movie" else None)


def _calibration_how(config: RunConfig, electrical) -> str:
    how = config.calibration.source
    if how == "auto":
        how = "paired" if electrical else "session"
    return how


def _calibrated_params(config: RunConfig, prepared, params, store, progress):
    """The stage parameters with the session calibration the chunks count with (recorded in the results)."""
    from ..kernel import Kernel

    how = _calibration_how(config, prepared.electrical)
    inf = config.inference
    kernel, size_given = None, False
    if inf.decay_s is not None:
        kernel = Kernel(inf.rise_s, inf.decay_s, inf.spike_size if inf.spike_size is not None else 1.0)
        size_given = inf.spike_size is not None
    elif inf.indicator is not None and how in ("given", "indicator"):
        kernel = Kernel.from_indicator(inf.indicator)
        size_given = how == "given"
        if inf.spike_size is not None:
            kernel = kernel.scaled(inf.spike_size)
    return _with_calibration(prepared.source, params, store, how=how, electrical=prepared.electrical,
                             indicator=inf.indicator, kernel=kernel, size_given=size_given,
                             calibration_file=config.calibration.file, max_rois=config.calibration.max_rois,
                             fit_options=dict(_fit_options(config), n_bootstrap=0), progress=progress,
                             key="calibration.source")


def _with_calibration(source, params, store, *, how, electrical, indicator, kernel, size_given, calibration_file,
                      max_rois, fit_options, progress, key):
    """params with the session calibration (stages.session_calibration), recorded in the results file; a
    session with nothing to learn from is counted per ROI with every count flagged."""
    import dataclasses

    try:
        cal = stages.session_calibration(source, params, how=how, electrical=electrical, indicator=indicator,
                                         kernel=kernel, size_given=size_given, calibration_file=calibration_file,
                                         max_rois=max_rois, fit_options=fit_options, progress=progress)
    except ValueError as exc:
        if how == "file":
            raise ConfigError(f"{key} = \"file\": {exc}") from None
        # nothing to learn the kinetics from (a session of noise): every ROI on its own, and every count flagged
        reason = f"no session calibration ({str(exc).splitlines()[0]})"
        _say(progress, f"calibration: {reason}; every ROI's counts are flagged as uncalibrated")
        store.write_rows(stages.CALIBRATION_DATASET.name, slice(0, 1),
                         [json.dumps({"source": "none", "summary": f"calibration failed: {reason}"})])
        return dataclasses.replace(params, uncalibrated=reason)
    if cal is None:
        return params
    _say(progress, cal.summary().splitlines()[0])
    store.write_rows(stages.CALIBRATION_DATASET.name, slice(0, 1), [json.dumps(cal.session_dict())])
    return dataclasses.replace(params, calibration=cal)


def _check_dff_sample(source, allow_raw: bool) -> None:
    """Refuse (unless ``allow_raw``) a ΔF/F file whose ROIs look like raw fluorescence, on a sample of ROIs
    spread over the file, before anything is written."""
    from .._checks import check_dff_like

    for roi in stages.calibration_rois(source.n_rois, 200):
        row = source.read_rows(int(roi), int(roi) + 1)[0]
        if not np.isfinite(row).any():
            continue
        check_dff_like(row, f"ROI {int(roi)} of the ΔF/F file", allow_raw=allow_raw,
                       remedy="pass allow_raw=True")


def _infer_calibration(calibration, kernel, indicator):
    """(how, calibration file or None, size given) of infer_file's ``calibration`` argument."""
    from ..calibrate import SessionCalibration

    if isinstance(calibration, SessionCalibration):
        raise ValueError("infer_file takes a calibration file, not a SessionCalibration object: save it first "
                         "(SessionCalibration.save) and pass the path")
    if isinstance(calibration, str) and calibration in ("session", "given", "per-roi"):
        if calibration == "given" and kernel is None and indicator is None:
            raise ValueError("calibration='given' needs a kernel or an indicator (its kernel is used as it is)")
        if calibration == "session" and indicator is not None:
            return "indicator", None, False
        if calibration == "session" and kernel is not None:
            return "given", None, False  # (fixed kinetics; the sizes are still estimated)
        return calibration, None, calibration == "given"
    if isinstance(calibration, (str, os.PathLike)):
        path = Path(calibration)
        if not path.is_file():
            raise CalciumInputError(f"calibration file not found: {path}")
        return "file", path, False
    raise ValueError(f"calibration must be 'session', 'given', 'per-roi' or a calibration file, got {calibration!r}")


def _json_record(results, name: str) -> dict | None:
    """The JSON object held in the text dataset ``name`` of an open results file, or None (absent, empty, broken)."""
    if name not in results:
        return None
    text = results.read(name)[0]
    text = text.decode() if isinstance(text, bytes) else str(text)
    try:
        record = json.loads(text) if text.startswith("{") else None
    except json.JSONDecodeError:
        return None
    return record if isinstance(record, dict) else None


def _calibration_record(results) -> dict | None:
    """The session calibration recorded in an open results file (a dict), or None when there is none."""
    return _json_record(results, stages.CALIBRATION_DATASET.name)


def _stored_calibration_summary(results_path) -> str:
    """The calibration summary recorded in a results file ("" when there is none)."""
    with open_results(results_path) as results:
        record = _calibration_record(results)
    return "" if record is None else str(record.get("summary", ""))


def _fit_options(config: RunConfig) -> dict:
    fit = config.kernel_fit
    options = {"model": fit.model, "max_lag_s": fit.max_lag_s, "n_bootstrap": fit.n_bootstrap,
               "confidence": fit.confidence, "seed": fit.seed, "min_isolated_spikes": fit.min_isolated_spikes}
    if config.inference.indicator is not None:
        options["kernel"] = config.inference.indicator
    elif config.inference.decay_s is not None:
        from ..kernel import Kernel

        options["kernel"] = Kernel(config.inference.rise_s, config.inference.decay_s)
    return options


# ---------------------------------------------------------------------------
# the layout of the results file
# ---------------------------------------------------------------------------
def _layout(config: RunConfig, prepared: _Inputs, electrical_rois: list[int]) -> list[DatasetSpec]:
    n, t = prepared.n_rois, prepared.n_frames
    specs = stages.result_datasets(n, t, filtered=config.filter.kind != "none" or config.rhythms.action == "remove",
                                   with_f0=config.output.f0)
    if prepared.kind == "movie":
        specs += [
            DatasetSpec("raw", (n, t), "f4", "neuropil-corrected ROI fluorescence extracted from the movie "
                                             "(the input of ΔF/F)", "a.u.", per_roi=False),
            DatasetSpec("extraction/neuropil_factor", (n,), "f8", "neuropil factor r used per ROI", "",
                        per_roi=False),
            DatasetSpec("extraction/roi_pixels", (n,), "i8", "pixels in each ROI", "pixels", per_roi=False),
            DatasetSpec("extraction/neuropil_pixels", (n,), "i8", "pixels in each neuropil ring", "pixels",
                        per_roi=False),
        ]
    specs += stages.electrical_datasets(len(electrical_rois), len(config.scoring.bin_widths_s))
    specs.append(stages.CALIBRATION_DATASET)
    if config.rhythms.action != "off":
        searched = len(stages.calibration_rois(n, config.rhythms.max_rois)) if prepared.kind == "movie" else 0
        specs += stages.rhythm_datasets(t, prepared.frame_rate, config.rhythms.segment_s, neuropil_rois=searched)
    return specs


# ---------------------------------------------------------------------------
# the run
# ---------------------------------------------------------------------------
def _output_folder(config: RunConfig) -> Path:
    folder = config.output.folder
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise OutputError(errno.ENOTDIR, f"output.folder {folder} exists and is a file, not a folder") from None
    except NotADirectoryError:
        raise OutputError(errno.ENOTDIR, f"cannot create output.folder {folder}: a part of the path is a file, "
                                         f"not a folder") from None
    except PermissionError:
        raise OutputError(errno.EACCES, f"cannot create output.folder {folder}: permission denied") from None
    except OSError as exc:
        raise OutputError(exc.errno or errno.EIO, f"cannot create output.folder {folder}: {exc}") from None
    return check_output_folder(folder)


def _run_input_paths(config: RunConfig) -> dict:
    """Every file a run reads, by its key: the configuration file and each path of every section (a new
    path key of any section is an input too), except output.folder."""
    import dataclasses

    found = {"configuration file": config.source}
    for section in dataclasses.fields(config):
        values = getattr(config, section.name)
        if not dataclasses.is_dataclass(values):
            continue
        for key in dataclasses.fields(values):
            value = getattr(values, key.name)
            if isinstance(value, Path) and (section.name, key.name) != ("output", "folder"):
                found[f"{section.name}.{key.name}"] = value
    return found


def _protect_run_inputs(config: RunConfig) -> None:
    """Refuse a run whose outputs (results, spike table, report, NWB, work folder) would replace an input."""
    from ..io.results import protect_inputs

    folder = config.output.folder
    files = [folder / RESULTS_NAME, folder / SPIKES_NAME]
    folders = [folder / _WORK_FOLDER]
    if config.report.enabled:
        files.append(folder / REPORT_FOLDER / "index.html")
        folders.append(folder / REPORT_FOLDER / "figures")
    if config.nwb.enabled:
        files.append(folder / NWB_NAME)
    protect_inputs(_run_input_paths(config), files=files, folders=folders,
                   remedy="choose another output.folder, or move the input out of the way (--overwrite only "
                          "ever replaces outputs)")


def _execute(results_path: Path, *, datasets, bounds, run_hash: str, attrs: dict, parameters: dict, flags,
             overwrite: bool, progress, prepare, backend: str, workers, scheduler, parts: Path, label: str,
             after_chunks=None):
    """The execution core of both doors (:func:`run_pipeline`, :func:`infer_file`).

    Opens the results store (or resumes it), and when chunks are left: ``prepare(store)`` returns the trace
    source and the stage parameters (extraction, rhythms, calibration: once per run), then the chunks are
    computed; ``after_chunks(store)`` runs the one-off steps after them; the store is marked complete. Ctrl-C
    keeps the chunks done so far and says how to continue. Returns (chunks resumed, backend, workers, ROIs
    computed).
    """
    store = ResultStore.open(results_path, datasets=datasets, chunk_bounds=bounds, run_hash=run_hash, attrs=attrs,
                             parameters=parameters, flags=flags, overwrite=overwrite)
    chunks_resumed = int(store.done.sum())
    if store.resumed:
        _say(progress, f"resuming {results_path}: {chunks_resumed} of {store.n_chunks} chunks already done")
    computed, used_backend, used_workers = 0, backend, 1
    try:
        todo = [c for c in range(store.n_chunks) if not store.done[c]]
        if todo:
            source, params = prepare(store)
            used_backend, used_workers, computed = _run_chunks(source, params, store, todo, backend=backend,
                                                               workers=workers, scheduler=scheduler,
                                                               progress=progress, parts=parts, label=label)
        if after_chunks is not None:
            after_chunks(store)
        if not store.complete:
            store.mark_complete()
    except KeyboardInterrupt:
        store.close()  # (commits the chunks finished so far)
        _say(True, f"\ninterrupted: {int(store.done.sum())} of {store.n_chunks} chunks are saved in "
                   f"{results_path}; run the same command again to continue")
        raise
    finally:
        store.close()
    return chunks_resumed, used_backend, used_workers, computed


def _summary(results_path: Path, spikes_path: Path, *, started: float, folder: Path, n_frames: int,
             frame_rate: float, chunks_total: int, executed, report_path=None, nwb_path=None) -> RunSummary:
    """The RunSummary of a finished results file (both doors)."""
    chunks_resumed, backend, workers, computed = executed
    with open_results(results_path) as results:
        quality = results.read("quality_flags")
    elapsed = time.perf_counter() - started
    return RunSummary(
        output_folder=folder, results_path=results_path, spikes_path=spikes_path, report_path=report_path,
        nwb_path=nwb_path, n_rois=int(quality.size), n_frames=n_frames, frame_rate=frame_rate,
        n_flagged=int(np.count_nonzero(quality)), n_failed=int(np.count_nonzero(quality & stages.FLAG_FAILED)),
        chunks_total=chunks_total, chunks_resumed=chunks_resumed, elapsed_s=elapsed,
        frames_per_second=computed * n_frames / elapsed if elapsed > 0 else float("nan"),
        backend=backend, workers=workers, n_uncalibrated=int(np.count_nonzero(quality & stages.FLAG_UNCALIBRATED)),
        calibration=_stored_calibration_summary(results_path), rhythms=_stored_rhythms_summary(results_path))


def run_pipeline(config_or_path, *, overwrite: bool = False, progress: bool = True) -> RunSummary:
    """Analyse a whole session as configured: ΔF/F, filter, inference, quality, fits, report.

    Parameters
    ----------
    config_or_path : RunConfig or path-like
        A configuration, or the TOML file to read (see
        :func:`calcium.pipeline.write_config_template`).
    overwrite : bool
        Replace results of a different run (other inputs or parameters) in
        the output folder. Without it such a rerun is refused; a rerun of the
        *same* run always continues where it stopped.
    progress : bool
        Progress bars (with ETA) and messages on stderr.

    Returns
    -------
    RunSummary

    Raises
    ------
    ConfigError
        A bad configuration (or one that does not fit the data, such as a
        filter cutoff above half the frame rate).
    calcium._checks.CalciumInputError
        An unreadable or inconsistent input file.
    OutputError
        The output cannot be written (missing or read-only folder, disk
        full, file in use); finished chunks stay saved for a rerun.
    OutputMismatchError
        The output folder holds results of a different run and
        ``overwrite`` is False.
    calcium.pipeline.executors.SchedulerUnreachableError
        ``execution.scheduler`` is set and nothing answers there (an
        OSError, raised within seconds and before any output is created).
    calcium._checks.OutputOverInputError
        An output (results, spike table, report, NWB file, work folder)
        would replace an input (configuration file, traces, movie, masks,
        electrical spikes, or any other path of the configuration), by path
        or as a link; raised before anything is written, ``overwrite`` or
        not.
    KeyboardInterrupt
        On Ctrl-C, after the finished chunks were saved: rerun to continue.

    Notes
    -----
    Memory: each worker holds one chunk of ROIs (``execution.chunk_rois``),
    read by itself from the input file, and writes its results into the
    results file itself; the parent only receives the chunk's spike-table
    lines and sets the done flags. (On a dask cluster
    reached by address the rows come back to the parent: at most two chunks
    per worker on their way to the file.)

    With the processes or dask backend, a script calling this function must
    keep its top-level code under ``if __name__ == "__main__":`` (the
    workers start fresh interpreters that import the script).
    """
    started = time.perf_counter()
    config = config_or_path if isinstance(config_or_path, RunConfig) else load_config(config_or_path)
    _protect_run_inputs(config)  # before anything is written
    if config.execution.backend == "dask" and config.execution.scheduler:
        check_scheduler(config.execution.scheduler)  # a few seconds, and before any output exists
    # the workers' fork server warms up while the inputs are checked
    prestart(config.execution.backend, scheduler=config.execution.scheduler)
    folder = _output_folder(config)
    work = folder / _WORK_FOLDER  # created only when an input needs a binary copy
    results_path = folder / RESULTS_NAME

    prepared = _prepare_inputs(config, work, progress)
    params = _stage_params(config, prepared.frame_rate, prepared.n_frames)
    chunk_rois = config.execution.chunk_rois or stages.auto_chunk_rois(prepared.n_rois, prepared.n_frames)
    chunk_rois = min(chunk_rois, prepared.n_rois)
    bounds = stages.chunk_bounds(prepared.n_rois, chunk_rois)
    electrical_rois = sorted(prepared.electrical) if prepared.electrical else []

    parameters = {
        "config": config.result_parameters(),
        "inputs_sha256": prepared.sha256,
        "frame_rate": prepared.frame_rate,
        "n_rois": prepared.n_rois,
        "n_frames": prepared.n_frames,
        "chunk_rois": int(chunk_rois),
        "calcium_version": __version__,
    }
    run_hash = parameters_digest(parameters)
    parts = work / f"spikes-{run_hash[:16]}"
    attrs = {
        "calcium_version": __version__,
        "frame_rate": prepared.frame_rate,
        "n_rois": prepared.n_rois,
        "n_frames": prepared.n_frames,
        "chunk_rois": int(chunk_rois),
        "input_kind": prepared.kind,
        "config_toml": config.text if config.text is not None else config.to_toml(),
        "config_path": str(config.source) if config.source is not None else "",
        "inputs_json": json.dumps({role: {"path": str(path), "sha256": prepared.sha256[role]}
                                   for role, path in prepared.paths.items()}),
        "settings_json": json.dumps(config.to_dict(), default=str),
        "stage_arguments_json": json.dumps({"delta_f_over_f": params.dff,
                                            "filter": None if params.filter is None else params.filter.describe(),
                                            "estimate_noise": params.noise,
                                            "infer_spikes": {k: str(v) for k, v in params.inference.items()},
                                            "fit_kernel": {k: str(v) for k, v in _fit_options(config).items()}},
                                           default=str),
        "source_json": json.dumps(None if prepared.source is None or prepared.kind == "movie" else
                                  {"path": str(prepared.paths["traces"]), "kind": prepared.source.kind,
                                   "dataset": prepared.source.dataset}),
        "flag_bits_json": json.dumps({str(bit): name for bit, name in stages.FLAG_NAMES.items()}),
    }
    flags = (["extraction"] if prepared.kind == "movie" else []) + (["electrical"] if electrical_rois else [])

    def prepare(store):
        if prepared.kind == "movie":
            prepared.source = _extraction(config, prepared, store, work, run_hash, progress)
        stage_params = _rhythm_params(config, prepared, params, store, progress)
        return prepared.source, _calibrated_params(config, prepared, stage_params, store, progress)

    def after_chunks(store):
        if electrical_rois and not store.flag("electrical"):
            stages.electrical_step(store, prepared.electrical, prepared.frame_rate, prepared.n_frames,
                                   fit_options=_fit_options(config), scoring=config.scoring,
                                   indicator=config.inference.indicator, progress=progress)

    executed = _execute(results_path, datasets=_layout(config, prepared, electrical_rois), bounds=bounds,
                        run_hash=run_hash, attrs=attrs, parameters=parameters, flags=flags, overwrite=overwrite,
                        progress=progress, prepare=prepare, backend=config.execution.backend,
                        workers=config.execution.workers, scheduler=config.execution.scheduler, parts=parts,
                        label="ΔF/F + inference", after_chunks=after_chunks)
    spikes_path = write_spike_table_from_results(results_path, folder / SPIKES_NAME, parts=parts)
    shutil.rmtree(work, ignore_errors=True)  # (needed no more: a failing report or NWB export leaves none behind)
    report_path = None
    if config.report.enabled:
        report_path = write_session_report(results_path, folder / REPORT_FOLDER,
                                           n_examples=config.report.n_examples,
                                           electrical_spikes=prepared.electrical,
                                           indicator=config.inference.indicator, progress=progress)
    nwb_path = None
    if config.nwb.enabled:
        from .nwb import export_nwb

        nwb_path = export_nwb(results_path, folder / NWB_NAME,
                              session_description=config.nwb.session_description,
                              session_start=config.nwb.session_start, experimenter=config.nwb.experimenter,
                              location=config.nwb.location, indicator=config.inference.indicator)
    return _summary(results_path, spikes_path, started=started, folder=folder, n_frames=prepared.n_frames,
                    frame_rate=prepared.frame_rate, chunks_total=int(bounds.size - 1), executed=executed,
                    report_path=report_path, nwb_path=nwb_path)


def _extraction(config: RunConfig, prepared: _Inputs, store: ResultStore, work: Path, run_hash: str,
                progress) -> stages.TraceSource:
    """Movie + masks -> traces, once per run (saved in the results); a binary copy for the workers."""
    scratch = work / f"extracted-{run_hash[:20]}.npy"
    if store.flag("extraction"):
        if not scratch.exists():
            _write_scratch(scratch, store.read("raw"))
        return stages.npy_source(scratch)
    from ..extract import extract_traces
    from ..io import open_movie, read_masks

    ext_cfg = config.extraction
    masks = read_masks(config.inputs.masks)
    _say(progress, f"extracting {masks.shape[0]} ROIs from {config.inputs.movie} ...")
    with open_movie(config.inputs.movie) as movie:
        extraction = extract_traces(movie, masks, neuropil_gap_px=ext_cfg.neuropil_gap_px,
                                    neuropil_radius_px=ext_cfg.neuropil_radius_px,
                                    neuropil_factor=ext_cfg.neuropil_factor, chunk_frames=ext_cfg.chunk_frames,
                                    progress=bool(progress))
    raw = extraction.corrected.astype(np.float32)
    _write_scratch(scratch, raw)
    store.write_rows("raw", (), raw)
    store.write_rows("extraction/neuropil_factor", (), extraction.neuropil_factor)
    store.write_rows("extraction/roi_pixels", (), extraction.roi_pixels)
    store.write_rows("extraction/neuropil_pixels", (), extraction.neuropil_pixels)
    if config.rhythms.action != "off":
        stages.keep_searched_neuropil(store, extraction.neuropil_f, config.rhythms.max_rois)
    store.set_flag("extraction")
    return stages.npy_source(scratch)


def _run_chunks(source: stages.TraceSource, params, store: ResultStore, todo, *, backend: str, workers: int,
                scheduler, progress, parts: Path, label: str = "ΔF/F + inference"):
    """Compute the chunks ``todo`` with the chosen executor and write each to ``store`` as it arrives.

    The workers write the results into the file themselves
    (:class:`~calcium.pipeline.store.RowWriter`), except on a dask cluster
    reached by address, whose workers may not see this machine's disk: there
    the results come back to this process. Each chunk's lines of the spike
    table are kept in ``parts`` (one file per chunk) until the table is
    written.
    """
    if backend != "serial" and len(todo) == 1:
        backend = "serial"  # one chunk: starting workers would only cost time
    writer = None if backend == "dask" and scheduler else store.row_writer()
    tasks = [(c, stages.ChunkTask(c, int(store.chunk_bounds[c]), int(store.chunk_bounds[c + 1]), source, params,
                                  writer))
             for c in todo]
    bar = progress_bar(label if progress else False, total=source.n_rois, unit="ROI")
    if bar is not None:
        bar.update(source.n_rois - sum(t.stop - t.start for _, t in tasks))

    def finished(chunk_id):
        if bar is not None:
            rows = store.chunk_rows(chunk_id)
            bar.update(rows.stop - rows.start)

    computed = 0
    try:
        with make_executor(backend, workers=min(workers or os.cpu_count() or 1, len(todo)),
                           scheduler=scheduler) as executor:
            # Looked up at call time so that the function can be wrapped (e.g. by tests).
            results = executor.map_chunks(stages.process_chunk, tasks, progress=finished)
            with contextlib.closing(results):
                for chunk_id, values in results:
                    _write_part(parts, chunk_id, values.pop(stages.SPIKE_TABLE_KEY))
                    store.write_chunk(chunk_id, values)
                    rows = store.chunk_rows(chunk_id)
                    computed += rows.stop - rows.start
            workers = executor.workers
    finally:
        stages.release_spare_arrays()  # (kept between chunks computed in this process: the serial backend)
        if bar is not None:
            bar.close()
    return backend, workers, computed


def _part_path(parts: Path, chunk_id: int) -> Path:
    return parts / f"chunk-{chunk_id:06d}.csv"


def _write_part(parts: Path, chunk_id: int, text: str) -> None:
    """One chunk's spike-table lines, written under a temporary name and renamed into place."""
    target = _part_path(parts, chunk_id)
    tmp = target.with_name(f".{target.name}.tmp")
    try:
        parts.mkdir(parents=True, exist_ok=True)
        with open(tmp, "w", encoding="utf-8", newline="") as handle:
            handle.write(text)
        os.replace(tmp, target)
    except OSError as exc:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise OutputError(exc.errno or errno.EIO, f"writing the spike lines of chunk {chunk_id} to {parts} "
                                                  f"failed: {exc.strerror or exc}") from None


def write_spike_table_from_results(results_path, path, *, parts=None) -> Path:
    """``roi,time_s,count`` CSV of the inferred spikes of a results file, written atomically.

    The layout of :func:`calcium.io.write_spike_table` (read it back with
    :func:`calcium.io.read_spike_times`): one line per frame with spikes,
    at ``k / frame_rate + spike_time_offset_s`` with the frame's count (spikes
    sharing a frame share the mean of their sub-frame times); a ROI without
    spikes gets the line ``roi,,0``. Streamed chunk by chunk, so the table
    of a long session never sits in memory. ``parts`` is a folder of the
    lines each chunk's worker produced (``chunk-NNNNNN.csv``, see
    :func:`calcium.pipeline.stages.spike_table_text`); a chunk without its
    file there is read from the results.
    """
    from ..io import atomic_output

    path = Path(path)
    with open_results(results_path) as results, atomic_output(path, inputs=[results_path]) as tmp:
        rate = results.frame_rate
        bounds = results.read("progress/chunk_bounds")
        with open(tmp, "w", encoding="utf-8", newline="") as handle:
            handle.write("roi,time_s,count\n")
            for chunk_id, (start, stop) in enumerate(zip(bounds[:-1], bounds[1:])):
                part = _part_path(Path(parts), chunk_id) if parts is not None else None
                if part is not None and part.is_file():
                    with open(part, encoding="utf-8", newline="") as lines:
                        shutil.copyfileobj(lines, handle)
                    continue
                handle.write(stages.spike_table_text(int(start), results.read("spike_counts", np.s_[start:stop]),
                                                     results.read("spike_time_offset_s", np.s_[start:stop]),
                                                     rate))
    return path


# ---------------------------------------------------------------------------
# inference only, for a ΔF/F file (calcium infer)
# ---------------------------------------------------------------------------
def infer_file(path, out, *, frame_rate=None, kernel=None, indicator=None, dataset=None, workers=None,
               backend="processes", chunk_rois=0, overwrite=False, progress=True, calibration="session",
               max_calibration_rois=64, allow_raw=False) -> RunSummary:
    """Infer spikes for every ROI of a ΔF/F file on all cores; resumable results file and spike table.

    The per-ROI stages of :func:`run_pipeline` without ΔF/F (the input
    already is ΔF/F): noise (:func:`calcium.signal.estimate_noise`) and
    inference counted with a session calibration
    (:mod:`calcium.calibrate`), with the quality flags.

    Parameters
    ----------
    path : path-like
        ΔF/F traces (rois, frames): ``.npy``, ``.csv`` or ``.h5``/``.hdf5``.
    out : path-like
        Results file (``.h5``/``.hdf5``; layout in docs/hdf5-layout.md,
        without ``dff``/``f0``). The spike table ``roi,time_s,count`` is
        written beside it with the suffix ``.csv``.
    frame_rate : float, optional
        Hz; taken from the file when it records it (they must agree when both
        are known).
    kernel : calcium.kernel.Kernel, optional
        Fixed kinetics. Its amplitude is the single-spike size only with
        ``calibration="given"``; otherwise every ROI's size is estimated.
        Give at most one of ``kernel`` and ``indicator``.
    indicator : str, optional
        Indicator whose published kinetics are used (its single-spike ΔF/F
        is a weak prior on the sizes; with ``calibration="given"`` the
        table's kernel is used as it is).
    calibration : str, path-like or SessionCalibration, default "session"
        ``"session"``: calibrated blind across the ROIs of the file (kinetics
        pooled over the ROIs unless ``kernel``/``indicator`` fix them, each
        ROI's spike size from its events, shrunk towards the session's);
        ``"given"``: ``kernel``/``indicator`` as they are; ``"per-roi"``:
        each ROI alone, without calibration (counts often off by 2x, and
        not flagged); a path: a calibration file (``.json``, written by
        ``calcium calibrate`` or :meth:`SessionCalibration.save`).
    max_calibration_rois : int, default 64
        The session's kinetics and its distribution of sizes are learned on
        at most this many ROIs (see ``[calibration] max_rois``).
    allow_raw : bool, default False
        A file whose ROIs look like raw fluorescence rather than ΔF/F
        (:func:`calcium._checks.check_dff_like`, checked on up to 200 ROIs
        spread over the file before anything is written) is refused; with
        True it is analysed, and every ROI that looks raw is flagged
        "uncalibrated counts".
    dataset : str, optional
        HDF5 dataset (default: ``traces``, else the only 1-D/2-D one).
    workers : int, optional
        Processes (default: one per core).
    backend : {"serial", "processes", "dask"}
        Where to compute (dask: a local cluster on 127.0.0.1).
    chunk_rois : int
        ROIs per work unit (0: automatic).
    overwrite : bool
        Replace a results file of a different run; the same run is always
        resumed.
    progress : bool
        Progress bar on stderr.

    Returns
    -------
    RunSummary
        ``report_path`` and ``nwb_path`` are None.

    Raises
    ------
    ConfigError, calcium._checks.CalciumInputError, OutputError, OutputMismatchError, OutputOverInputError
        As :func:`run_pipeline` (``out``, the spike table beside it and the
        work folder may not be ``path``, by path or as a link).
    """
    from ..io import file_sha256

    started = time.perf_counter()
    path, out = Path(path), Path(out)
    if out.suffix.lower() not in (".h5", ".hdf5"):
        raise ValueError(f"out must be an HDF5 file (.h5 or .hdf5), got {out}")
    if not path.is_file():
        raise CalciumInputError(f"ΔF/F file not found: {path}")
    if kernel is not None and indicator is not None:
        raise ValueError("give at most one of kernel and indicator")
    how, calibration_file, size_given = _infer_calibration(calibration, kernel, indicator)
    if chunk_rois:
        from .._checks import check_int

        chunk_rois = check_int(chunk_rois, "chunk_rois", minimum=1)
    folder = check_output_folder(out.parent if str(out.parent) else Path("."))
    spikes_path = out.with_suffix(".csv")
    work = folder / f".{out.stem}.calcium-work"
    from ..io.results import protect_inputs

    protect_inputs({"the ΔF/F file": path, "the calibration file": calibration_file}, files=[out, spikes_path],
                   folders=[work], remedy="choose another out (--out)")
    if spikes_path.exists() and not out.exists() and not overwrite:
        # a spike table of this run is only ever rewritten from its own results file
        raise ValueError(f"{spikes_path} already exists (the spike table goes beside {out.name}); pass "
                         f"overwrite=True (--overwrite) or choose another output")
    prestart(backend)
    sha = file_sha256(path)
    source, found = _trace_source(path, dataset, work, sha, "the ΔF/F file")
    rate = _pick_frame_rate(frame_rate, found, path, "frame_rate")
    _check_dff_sample(source, allow_raw)
    inference = {}
    if kernel is not None:
        inference["kernel"] = kernel
    elif indicator is not None:
        inference["indicator"] = indicator
    params = stages.StageParams(frame_rate=rate, dff=None, inference=inference, check_dff=True)
    chunk_rois = min(chunk_rois or stages.auto_chunk_rois(source.n_rois, source.n_frames), source.n_rois)
    bounds = stages.chunk_bounds(source.n_rois, chunk_rois)
    parameters = {"infer_file": {"kernel": repr(kernel), "indicator": indicator, "dataset": source.dataset,
                                 "calibration": how, "max_calibration_rois": int(max_calibration_rois)},
                  "inputs_sha256": {"dff": sha, **({"calibration": file_sha256(calibration_file)}
                                                   if calibration_file is not None else {})}, "frame_rate": rate, "n_rois": source.n_rois,
                  "n_frames": source.n_frames, "chunk_rois": int(chunk_rois), "calcium_version": __version__}
    attrs = {"calcium_version": __version__, "frame_rate": rate, "n_rois": source.n_rois,
             "n_frames": source.n_frames, "chunk_rois": int(chunk_rois), "input_kind": "dff",
             "inputs_json": json.dumps({"dff": {"path": str(path), "sha256": sha}}),
             "stage_arguments_json": json.dumps({"estimate_noise": params.noise,
                                                 "infer_spikes": {k: str(v) for k, v in inference.items()}}),
             "flag_bits_json": json.dumps({str(bit): name for bit, name in stages.FLAG_NAMES.items()})}
    run_hash = parameters_digest(parameters)
    parts = work / f"spikes-{run_hash[:16]}"
    def prepare(store):
        from ..kernel import Kernel

        fixed = kernel if kernel is not None else Kernel.from_indicator(indicator) if indicator is not None else None
        return source, _with_calibration(source, params, store, how=how, electrical=None, indicator=indicator,
                                         kernel=fixed, size_given=size_given, calibration_file=calibration_file,
                                         max_rois=max_calibration_rois, fit_options=None, progress=progress,
                                         key="calibration")

    executed = _execute(out, datasets=stages.result_datasets(source.n_rois, source.n_frames, filtered=False,
                                                             with_dff=False) + [stages.CALIBRATION_DATASET],
                        bounds=bounds, run_hash=run_hash, attrs=attrs, parameters=parameters, flags=(),
                        overwrite=overwrite, progress=progress, prepare=prepare, backend=backend, workers=workers,
                        scheduler=None, parts=parts, label="inference")
    write_spike_table_from_results(out, spikes_path, parts=parts)
    shutil.rmtree(work, ignore_errors=True)
    return _summary(out, spikes_path, started=started, folder=folder, n_frames=source.n_frames, frame_rate=rate,
                    chunks_total=int(bounds.size - 1), executed=executed)


# ---------------------------------------------------------------------------
# the report
# ---------------------------------------------------------------------------
_RUN_ONLY = ("f0_min",)  # per-ROI results that only calcium run writes (from raw fluorescence)
_PER_ROI = ("noise_sd", "snr", "n_spikes", "missing_frames", "f0_min", "saturated_frames", "quality_flags",
            "flags", "kernel_rise_s", "kernel_decay_s", "kernel_amplitude", "converged", "baseline", "penalty")


def _example_rois(per_roi: dict, electrical_rois, n_examples: int) -> list[int]:
    """ROIs with electrical spikes first, then ROIs spread over the SNR range, then a flagged one."""
    if n_examples <= 0:
        return []
    chosen = [int(r) for r in electrical_rois][: max(1, n_examples // 2)]
    flags = per_roi["quality_flags"]
    snr = per_roi["snr"]
    usable = [i for i in np.argsort(-np.nan_to_num(snr, nan=-np.inf), kind="stable")
              if not flags[i] & stages.FLAG_FAILED and i not in chosen]
    room = n_examples - len(chosen) - (1 if np.any(flags) and n_examples > 1 else 0)
    if usable and room > 0:
        picks = np.unique(np.linspace(0, len(usable) - 1, min(room, len(usable))).round().astype(int))
        chosen += [int(usable[k]) for k in picks]
    # a flagged ROI that still has results says more than one without any
    flagged = sorted((int(i) for i in np.flatnonzero(flags) if int(i) not in chosen),
                     key=lambda i: (bool(flags[i] & stages.FLAG_FAILED), i))
    if flagged and len(chosen) < n_examples:
        chosen.append(flagged[0])
    return chosen[:n_examples]


def _raw_rows(results, roi: int):
    """The raw fluorescence of one ROI and a note on where it came from."""
    if "raw" in results:
        return results.read("raw", roi).astype(np.float64), "raw F (extracted from the movie)"
    source = results.attrs.get("source")
    if source:
        try:
            if source["kind"] == "npy":
                trace = stages.npy_source(source["path"]).read_rows(roi, roi + 1)[0]
            else:
                trace = stages.hdf5_source(source["path"], source["dataset"])[0].read_rows(roi, roi + 1)[0]
            if trace.size == results.n_frames:
                return trace, "raw F (from the input file)"
        except (OSError, ValueError, KeyError):
            pass
    if "f0" not in results:
        return None, "raw F not available (the input file was not readable and F0 was not stored)"
    f0 = results.read("f0", roi).astype(np.float64)
    dff = results.read("dff", roi).astype(np.float64)
    return f0 * (1.0 + dff), "F = F0 (1 + ΔF/F) (the input file was not readable)"


def _recorded_input(results_path: Path, role: str):
    """The path of input ``role`` recorded in a results file, or None (also when the file is unreadable)."""
    try:
        with open_results(results_path, allow_incomplete=True) as results:
            return (results.attrs.get("inputs") or {}).get(role, {}).get("path")
    except (OSError, ValueError, KeyError, AttributeError):
        return None


def _protect_report_inputs(results_path: Path, folder: Path) -> None:
    """Refuse a report whose page or figures would replace the results file or the spikes file it reads."""
    from ..io.results import protect_inputs

    inputs = {"results": results_path, "electrical spikes": _recorded_input(results_path, "electrical_spikes")}
    protect_inputs(inputs, files=[folder / "index.html"], folders=[folder / "figures"],
                   remedy="choose another report folder")


def _example_data(results, roi: int, per_roi: dict, electrical_spikes: dict, lags: dict):
    """What the report draws of example ROI ``roi``, read from an open results file."""
    from ..report.session import ExampleRoi

    raw, where = _raw_rows(results, roi)
    values = {name: results.read(name, roi).astype(np.float64)
              for name in ("f0", "dff", "dff_filtered", "denoised") if name in results}
    if "f0" not in values and raw is not None and "dff" in values:
        with np.errstate(divide="ignore", invalid="ignore"):
            values["f0"] = raw / (1.0 + values["dff"])  # (ΔF/F = F / F0 - 1; F0 not stored)
    missing = None  # (the frames where raw is NaN)
    if raw is None:
        raw = np.full(results.n_frames, np.nan)
        missing = ~np.isfinite(values["dff"]) if "dff" in values else None
    flags = per_roi["quality_flags"]
    if flags[roi] & stages.FLAG_FAILED:
        values = {k: v for k, v in values.items() if np.isfinite(v).any()}
    return ExampleRoi(roi=roi, raw=raw, where=where, traces=values, missing=missing,
                      electrical_spikes=(electrical_spikes[roi] + lags.get(roi, 0.0)
                                         if roi in electrical_spikes else None),
                      flags=str(per_roi["flags"][roi]) if flags[roi] else "",
                      decay_s=float(per_roi["kernel_decay_s"][roi]))


def _electrical_data(results, electrical_spikes: dict, lags: dict) -> dict | None:
    """Kernel fits and scores of the ROIs with electrical spikes, with their ΔF/F and spikes on the imaging clock,
    read from an open results file (None: none)."""
    if "electrical/roi" not in results:
        return None
    rois = [int(r) for r in results.read("electrical/roi")]
    shown = [r for r in rois if r in electrical_spikes and "dff" in results]
    optional = [name for name in ("half_decay_low_s", "half_decay_high_s") if f"electrical/fit_{name}" in results]
    return {"roi": results.read("electrical/roi"),
            "dff": {r: results.read("dff", r).astype(np.float64) for r in shown},
            "spike_times": {r: np.asarray(electrical_spikes[r], dtype=np.float64) + lags.get(r, 0.0) for r in shown},
            "fit": {name: results.read(f"electrical/fit_{name}") for name in
                    ("rise_s", "decay_s", "amplitude", "half_decay_s", "lag_s", "r_squared", *optional)},
            "score": {name: results.read(f"electrical/score_{name}") for name in
                      ("precision", "recall", "f1", "n_true", "n_inferred", "n_matched", "timing_error_mean_s")},
            "notes": results.read("electrical/note"),
            "bin_widths_s": results.read("electrical/bin_widths_s"),
            "correlation": results.read("electrical/score_correlation")}


def _rhythms_data(results, per_roi: dict):
    """The recorded search for shared rhythms, read from an open results file (None: the search was off)."""
    from ..report.session import RhythmsData

    if stages.RHYTHMS_RECORD not in results:
        return None
    record = _rhythm_record(results)
    if record is None:
        return None
    spectra = {name: results.read(f"rhythms/{name}") for name in stages.RHYTHM_SPECTRA}
    neuropil = results.read("rhythms/neuropil_power") if "rhythms/neuropil_power" in results else None
    average = results.read("rhythms/session_average").astype(np.float64)
    rhythms = record.get("rhythms") or []
    searched = [int(r) for r in record.get("rois", [])][:100]
    roi = int(rhythms[0].get("example_roi", searched[0] if searched else 0)) if rhythms else None
    if roi is None or "dff" not in results or per_roi["quality_flags"][roi] & stages.FLAG_FAILED:
        return RhythmsData(record=record, spectra=spectra, neuropil=neuropil, average=average)
    after = None
    if record.get("action") == "remove" and "dff_filtered" in results:
        after = results.read("dff_filtered", roi).astype(np.float64)
    return RhythmsData(record=record, spectra=spectra, neuropil=neuropil, average=average, example_roi=roi,
                       before=results.read("dff", roi).astype(np.float64), after=after,
                       kernel=(float(per_roi["kernel_rise_s"][roi]), float(per_roi["kernel_decay_s"][roi]),
                               float(per_roi["kernel_amplitude"][roi])),
                       noise_sd=float(per_roi["noise_sd"][roi]))


def _read_session(results_path: Path, *, n_examples: int, electrical_spikes, indicator):
    """Everything the session report shows, read from the results file ``results_path``."""
    from ..report.session import SessionData

    with open_results(results_path) as results:
        rate, n_rois, n_frames = results.frame_rate, results.n_rois, results.n_frames
        attrs = results.attrs
        settings = attrs.get("settings") or {}
        if indicator is None:
            indicator = (settings.get("inference") or {}).get("indicator")
        if electrical_spikes is None:
            path = (attrs.get("inputs") or {}).get("electrical_spikes", {}).get("path")
            if path and Path(path).is_file():
                from ..io import read_spike_times

                electrical_spikes = read_spike_times(path)
        electrical_spikes = electrical_spikes or {}
        missing = [name for name in _PER_ROI if name not in results and name not in _RUN_ONLY]
        if missing:
            raise ValueError(f"{results_path} has no {', '.join(missing)}: not a results file of calcium run or "
                             f"calcium infer")
        # (the results of calcium infer have no F0: its input already was ΔF/F)
        per_roi = {name: results.read(name) if name in results else np.full(n_rois, np.nan) for name in _PER_ROI}
        # electrical spikes drawn on the imaging clock: add the fitted clock lag where there is one
        lags = {}
        if "electrical/roi" in results and "electrical/fit_lag_s" in results:
            lags = {int(r): float(lag) for r, lag in zip(results.read("electrical/roi"),
                                                         results.read("electrical/fit_lag_s")) if np.isfinite(lag)}
        bounds = results.read("progress/chunk_bounds")
        trains = []
        for start, stop in zip(bounds[:-1], bounds[1:]):
            for row, offset in zip(results.read("spike_counts", np.s_[start:stop]),
                                   results.read("spike_time_offset_s", np.s_[start:stop])):
                trains.append(stages.inferred_spike_times(row, offset, rate))
        flags = per_roi["quality_flags"]
        examples = [_example_data(results, roi, per_roi, electrical_spikes, lags)
                    for roi in _example_rois(per_roi, sorted(electrical_spikes), n_examples)]
        return SessionData(results_path=str(results_path), calcium_version=str(attrs.get("calcium_version", "?")),
                           inputs=dict(attrs.get("inputs") or {}), frame_rate=rate, n_rois=n_rois,
                           n_frames=n_frames, per_roi=per_roi, flag_names=dict(stages.FLAG_NAMES),
                           flag_descriptions=[stages.describe_flags(f) for f in flags],
                           failed=(flags & stages.FLAG_FAILED) != 0, spike_times=trains, indicator=indicator,
                           examples=examples, calibration=_read_calibration(results),
                           electrical=_electrical_data(results, electrical_spikes, lags), rhythms=_rhythms_data(results, per_roi))


def write_session_report(results_path, folder, *, n_examples: int = 6, electrical_spikes=None, indicator=None,
                         progress=False) -> Path:
    """Write the HTML report of a results file into ``folder`` and return the path of its ``index.html``.

    Parameters
    ----------
    results_path : path-like
        A complete ``results.h5`` of :func:`run_pipeline`.
    folder : path-like
        Report folder (``index.html`` + ``figures/``), created if needed.
    n_examples : int
        Example ROIs shown through the stages.
    electrical_spikes : dict of int -> array, optional
        Electrically recorded spike times (s) per ROI, drawn under the
        examples. Default: read again from the run's input, if it had one.
    indicator : str, optional
        Indicator whose reference range is shaded on the kinetics
        distributions. Default: the run's ``inference.indicator``.
    progress : bool
        Print a line when done.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    calcium._checks.OutputOverInputError
        ``folder/index.html`` or a file of ``folder/figures`` would replace
        the results file or the electrical spikes file it reads (checked
        before anything is written).
    """
    from ..report.session import session_report

    results_path = Path(results_path)
    folder = Path(folder)
    _protect_report_inputs(results_path, folder)
    session = _read_session(results_path, n_examples=n_examples, electrical_spikes=electrical_spikes,
                            indicator=indicator)
    report = session_report(session)
    # a report left half-written (a full disk) must not pass for a finished one: the old page goes first,
    # the new one is written last, after its figures
    with contextlib.suppress(FileNotFoundError):
        (folder / "index.html").unlink()
    page = report.write(folder)
    _say(progress, f"report: {page}")
    return page


_CALIBRATION_PER_ROI = ("spike_size", "spike_size_low", "spike_size_high", "count_low", "count_high", "calibrated")


def _read_calibration(results):
    """The session calibration recorded in a results file ({"session": dict, "per_roi": arrays}) or None."""
    record = _calibration_record(results)
    if record is None or any(n not in results for n in _CALIBRATION_PER_ROI):
        return None
    return {"session": record, "per_roi": {n: results.read(n) for n in _CALIBRATION_PER_ROI}}


def _rhythm_record(results) -> dict | None:
    """The record of the search for shared rhythms in an open results file, or None when it was not run."""
    return _json_record(results, stages.RHYTHMS_RECORD)


def _stored_rhythms_summary(results_path) -> str:
    """One line on the shared rhythms recorded in a results file ("" when the search was off)."""
    with open_results(results_path) as results:
        record = _rhythm_record(results)
    if record is None:
        return ""
    rhythms = record.get("rhythms") or []
    if not rhythms:
        return "shared rhythms: " + str(record.get("summary", "")).splitlines()[-1]
    found = "; ".join(f"{r['frequency_hz']:.2f} Hz in {r['share']:.0%} of the ROIs ({r['stability']})" for r in rhythms)
    done = "removed before the inference" if record.get("action") == "remove" else (
        "NOT removed ([rhythms] action = \"remove\" removes them); their bands were left out of the noise")
    return f"shared rhythms: {found}; {done}"
