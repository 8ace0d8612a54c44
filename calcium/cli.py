"""Command-line front-end: parses arguments, calls the public API, prints.

No science lives here: every command is a thin wrapper over functions a user
can call from Python. Exit codes: 0 success, 1 data error (one line naming the
file and the problem; ``--debug`` shows the traceback), 2 usage error.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
from pathlib import Path

import numpy as np

EXIT_DATA = 1
EXIT_USAGE = 2


class CommandError(Exception):
    """A data or file problem, reported as one line with exit code 1."""


class UsageError(CommandError):
    """Options that do not go together or are out of range: one line, exit code 2."""


# --------------------------------------------------------------------------- helpers

def _finite(text: str) -> float:
    """argparse type: a finite number (NaN and inf are usage errors, exit code 2)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    return value


def _positive(text: str) -> float:
    """argparse type: a positive finite number (frame rates in Hz, durations in seconds)."""
    value = _finite(text)
    if value <= 0:
        raise argparse.ArgumentTypeError(f"must be a positive number, got {text!r}")
    return value


def _fail(path, exc, *, also=()) -> CommandError:
    """Wrap an exception so the message names the file once (``path``, unless it names one of ``also``)."""
    msg = str(exc) or exc.__class__.__name__
    named = [str(p) for p in (path, *also) if p is not None]
    if named and not any(Path(n).name in msg for n in named):
        msg = f"{path}: {msg}"
    return CommandError(msg)


def _protect(inputs, *, files=(), folders=(), flag: str = "--out") -> None:
    """Refuse outputs that would replace an input (by path or as a link), naming the flag to change.

    ``inputs``: dict argument name -> path (None entries skipped). Raises
    :class:`calcium._checks.OutputOverInputError` (a ValueError: one line, exit code 1).
    """
    from calcium.io.results import protect_inputs
    protect_inputs(inputs, files=files, folders=folders, remedy=f"choose another {flag}")


def _check_new_output(path, *, overwrite: bool, inputs=None, flag: str = "--out") -> Path:
    """Refuse to write over an input (always), and over an existing output unless asked to."""
    path = Path(path)
    _protect(inputs, files=[path], flag=flag)
    if path.exists() and not overwrite:
        raise CommandError(f"{path}: already exists; pass --overwrite to replace it")
    if not path.parent.exists():
        raise CommandError(f"{path}: the folder {path.parent} does not exist")
    return path


# API keywords named in the readers' messages, and the flags a command-line user changes instead
_FLAG_OF_KEYWORD = (("pass orientation_check=False to read_traces", "pass --wide"),
                    ("orientation_check=False", "--wide"), ("pass time_column=None", "pass --time-column none"),
                    ("time_column=", "--time-column "), ("pass allow_raw=True", "pass --allow-raw"))


class _FormerFlag(argparse.Action):
    """A flag's former name: stores the value under the new name and says so on stderr (kept for one release)."""

    def __init__(self, option_strings, dest, new_flag, **kwargs):
        self.new_flag = new_flag
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(f"calcium: {option_string} is the former name of {self.new_flag}; it will be removed in a later "
              f"release", file=sys.stderr)
        setattr(namespace, self.dest, values)


def _former(p, old: str, new: str, dest: str, **kwargs) -> None:
    """Accept ``old`` as a hidden former name of the flag ``new`` (same destination)."""
    p.add_argument(old, dest=dest, action=_FormerFlag, new_flag=new, help=argparse.SUPPRESS, **kwargs)


def _cli_words(message: str) -> str:
    for keyword, flag in _FLAG_OF_KEYWORD:
        message = message.replace(keyword, flag)
    return message


def _read_traces(path, dataset=None, args=None):
    from calcium.io import read_traces
    options = {}
    if args is not None and getattr(args, "time_column", None) is not None:
        column = args.time_column
        options["time_column"] = None if column.lower() == "none" else (int(column) if column.isdigit() else column)
    if args is not None and getattr(args, "wide", False):
        options["orientation_check"] = False
    try:
        return read_traces(path, dataset=dataset, **options)
    except (ValueError, OSError) as exc:
        raise _fail(path, ValueError(_cli_words(str(exc)))) from exc


def _read_spikes(path) -> dict:
    """A spike file's times by ROI; a bad file is one line naming it."""
    from calcium.io import read_spike_times
    try:
        return read_spike_times(path)
    except (ValueError, OSError) as exc:
        raise _fail(path, exc) from exc


def _frame_rate(args, data) -> float:
    """Frame rate from --frame-rate or from the file; they must agree when both are given."""
    given = getattr(args, "frame_rate", None)
    found = getattr(data, "frame_rate", None)
    if given is None and found is None:
        raise CommandError(f"{data.path}: the file does not record a frame rate; pass --frame-rate HZ")
    if given is not None and given <= 0:
        raise UsageError(f"--frame-rate must be positive, got {given}")
    if given is not None and found is not None and abs(given - found) > 1e-3 * found:
        raise CommandError(f"{data.path}: the file says {found:g} Hz but --frame-rate is {given:g} Hz")
    return float(given if given is not None else found)


def _kernel_from_args(args, *, required: bool = True, size_needed: bool = True):
    """A Kernel from --indicator or --rise-s/--decay-s/--spike-size (None if neither and not required).

    ``size_needed``: the command uses the kernel's amplitude as the ΔF/F of one spike, so --decay-s without
    --spike-size is refused rather than completed with an invented 1.0 (``infer`` estimates the size instead).
    """
    from calcium.kernel import Kernel
    if getattr(args, "indicator", None):
        if args.rise_s is not None or args.decay_s is not None:
            raise UsageError("give either --indicator or --rise-s/--decay-s, not both")
        kernel = Kernel.from_indicator(args.indicator)
        if args.spike_size is not None:
            kernel = kernel.scaled(args.spike_size)
        return kernel
    if args.decay_s is not None:
        if args.spike_size is None and size_needed:
            raise UsageError("--decay-s was given without --spike-size (the peak ΔF/F of one spike); give "
                             "--spike-size, or --indicator NAME to take the published kinetics and size")
        return Kernel(rise_s=args.rise_s or 0.0, decay_s=args.decay_s,
                      amplitude=args.spike_size if args.spike_size is not None else 1.0)
    if args.rise_s is not None:
        raise UsageError("--rise-s needs --decay-s")
    if required:
        raise UsageError("give the indicator kinetics: --indicator NAME or --rise-s S --decay-s S")
    return None


def _write_traces(path, traces, *, frame_rate, inputs=(), attrs=None):
    from calcium.io import write_hdf5, write_traces
    path = Path(path)
    if path.suffix.lower() in (".h5", ".hdf5") and attrs:
        write_hdf5(path, {"traces": traces}, attrs={"frame_rate": frame_rate, **attrs}, inputs=inputs)
    else:
        write_traces(path, traces, frame_rate=frame_rate)


def _progress(args) -> bool:
    return not getattr(args, "quiet", False)


def _say(args, text: str) -> None:
    if not getattr(args, "quiet", False):
        print(text)


def _add_kernel_options(p, *, help_suffix=""):
    g = p.add_argument_group("indicator kinetics" + help_suffix)
    g.add_argument("--indicator", help="indicator name from `calcium indicators` (e.g. GCaMP6s)")
    g.add_argument("--rise-s", type=_finite, help="rise time constant in seconds (0 = instantaneous)")
    g.add_argument("--decay-s", type=_finite, help="decay time constant in seconds")
    g.add_argument("--spike-size", type=_finite, help="ΔF/F (peak) of one spike")
    _former(g, "--amplitude", "--spike-size", "spike_size", type=_finite)


# --------------------------------------------------------------------------- commands

def cmd_demo(args):
    from calcium.demo import demo_data_folder, run_demo
    out = Path(args.out)
    data = demo_data_folder()
    if data is not None:  # --overwrite empties the report folder: never one that holds the demo data
        _protect([("demo data", path) for path in sorted(data.iterdir())], folders=[out])
    index = run_demo(out, progress=_progress(args), overwrite=args.overwrite)
    _say(args, f"report written: {index}")


def cmd_extract(args):
    from calcium.extract import extract_traces
    from calcium.io import open_movie, read_masks
    out = _check_new_output(args.out, overwrite=args.overwrite, inputs={"MOVIE": args.movie, "MASKS": args.masks})
    try:
        movie = open_movie(args.movie)
    except (ValueError, OSError) as exc:
        raise _fail(args.movie, exc) from exc
    try:
        masks = read_masks(args.masks)
    except (ValueError, OSError) as exc:
        raise _fail(args.masks, exc) from exc
    factor = args.neuropil_factor
    if factor != "estimate":
        try:
            factor = float(factor)
        except ValueError:
            raise UsageError(f"--neuropil-factor must be a number or 'estimate', got {factor!r}") from None
    result = extract_traces(movie, masks, neuropil_gap_px=args.neuropil_gap_px, neuropil_radius_px=args.radius_px,
                            neuropil_factor=factor, chunk_frames=args.chunk_frames, progress=_progress(args))
    from calcium.io import write_hdf5, write_traces
    if out.suffix.lower() in (".h5", ".hdf5"):
        attrs = {"neuropil_gap_px": args.neuropil_gap_px, "neuropil_radius_px": args.radius_px,
                 "neuropil_factor_setting": str(args.neuropil_factor)}
        if args.frame_rate:
            attrs["frame_rate"] = args.frame_rate
        write_hdf5(out, {"traces": result.corrected, "roi_f": result.roi_f, "neuropil_f": result.neuropil_f,
                         "neuropil_factor": np.asarray(result.neuropil_factor)},
                   attrs=attrs, inputs=(args.movie, args.masks))
    else:
        write_traces(out, result.corrected, frame_rate=args.frame_rate)
    _say(args, f"{result.corrected.shape[0]} ROI(s) x {result.corrected.shape[1]} frames -> {out}")


def cmd_dff(args):
    from calcium.signal import delta_f_over_f
    out = _check_new_output(args.out, overwrite=args.overwrite, inputs={"INPUT": args.input})
    data = _read_traces(args.input, args.dataset, args)
    rate = _frame_rate(args, data)
    try:
        result = delta_f_over_f(data.traces, rate, window_s=args.window_s, percentile=args.percentile,
                                floor=args.floor)
    except ValueError as exc:
        raise _fail(args.input, exc) from exc
    if result.missing.any:
        _say(args, f"note: {result.missing.describe(rate)}")
    from calcium.io import write_hdf5
    if out.suffix.lower() in (".h5", ".hdf5"):
        write_hdf5(out, {"dff": result.dff, "f0": result.f0},
                   attrs={"frame_rate": rate, "window_s": args.window_s, "percentile": args.percentile,
                          "floor": "none" if args.floor is None else args.floor},
                   inputs=(args.input,))
    else:
        _write_traces(out, result.dff, frame_rate=rate)
    _say(args, f"ΔF/F of {data.traces.shape[0]} ROI(s) -> {out}")


def cmd_filter(args):
    from calcium.signal import design_filter
    out = _check_new_output(args.out, overwrite=args.overwrite, inputs={"INPUT": args.input})
    plot = (_check_new_output(args.plot, overwrite=args.overwrite, inputs={"INPUT": args.input}, flag="--plot")
            if args.plot else None)
    data = _read_traces(args.input, args.dataset, args)
    rate = _frame_rate(args, data)
    cutoff = args.cutoff_hz[0] if len(args.cutoff_hz) == 1 else tuple(args.cutoff_hz)
    try:
        filt = design_filter(args.kind, cutoff, rate, order=args.order, method=args.method)
        applied = filt.apply(data.traces, edges=args.edges)
    except ValueError as exc:
        raise _fail(args.input, exc) from exc
    filtered = applied[0] if isinstance(applied, tuple) else applied
    _write_traces(out, filtered, frame_rate=rate)
    _say(args, str(filt))
    if plot:
        from calcium.report.figures import filter_figure, save_figure
        save_figure(filter_figure(filt), plot)
        _say(args, f"frequency response -> {plot}")
    _say(args, f"filtered {filtered.shape[0]} ROI(s) -> {out}")


def cmd_noise(args):
    from calcium.signal import estimate_noise
    data = _read_traces(args.input, args.dataset, args)
    rate = _frame_rate(args, data)
    try:
        sd = np.atleast_1d(estimate_noise(data.traces, rate))
    except ValueError as exc:
        raise _fail(args.input, exc) from exc
    if args.out:
        from calcium.io import write_csv
        out = _check_new_output(args.out, overwrite=args.overwrite, inputs={"INPUT": args.input})
        write_csv(out, ["roi", "noise_sd"], [(i, float(v)) for i, v in enumerate(sd)])
        _say(args, f"noise s.d. of {sd.size} ROI(s) -> {out}")
    else:
        print("roi,noise_sd")
        for i, v in enumerate(sd):
            print(f"{i},{v:.6g}")


def _figure_paths(folder, names, *, overwrite: bool, inputs) -> list[Path]:
    """PNG paths in the --figures folder, checked against the inputs and --overwrite; the folder is created."""
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise CommandError(f"{folder}: is a file; --figures takes a folder")
    paths = [folder / f"{name}.png" for name in names]
    _protect(inputs, files=paths, flag="--figures")
    for path in paths:
        if path.exists() and not overwrite:
            raise CommandError(f"{path}: already exists; pass --overwrite to replace it")
    folder.mkdir(parents=True, exist_ok=True)
    return paths


def cmd_rhythms(args):
    from calcium.signal.rhythms import find_rhythms, phase_locking, remove_rhythms, rhythm_phase
    if args.remove and not args.out:
        raise UsageError("--remove needs --out (the file for the traces without the rhythms)")
    if args.out and not args.remove:
        raise UsageError("--out writes the traces without the rhythms: give --remove regression|notch|bandstop too")
    if (args.rhythm_trace is None) != (args.rhythm_band is None):
        raise UsageError("--rhythm-trace and --rhythm-band go together (the trace carrying the rhythm, and its band)")
    if args.rhythm_trace and not args.spikes:
        raise UsageError("--rhythm-trace needs --spikes: the spikes whose locking to the rhythm is measured")
    inputs = {"INPUT": args.input, "--neuropil": args.neuropil, "--spikes": args.spikes,
              "--rhythm-trace": args.rhythm_trace}
    out = _check_new_output(args.out, overwrite=args.overwrite, inputs=inputs) if args.out else None
    names = ["rhythm-spectrum", "rhythm-scalogram", "rhythm-spectrogram"]
    figures = _figure_paths(args.figures, names, overwrite=args.overwrite, inputs=inputs) if args.figures else None
    data = _read_traces(args.input, args.dataset, args)
    rate = _frame_rate(args, data)
    n_rois = data.traces.reshape(-1, data.traces.shape[-1]).shape[0]
    if args.roi is not None and not 0 <= args.roi < n_rois:
        raise UsageError(f"--roi {args.roi} is out of range: {args.input} has ROIs 0 to {n_rois - 1}")
    neuropil = _read_traces(args.neuropil, args.neuropil_dataset).traces if args.neuropil else None
    try:
        found = find_rhythms(data.traces, rate, segment_s=args.segment_s, min_share=args.min_share,
                             false_alarm=args.false_alarm, lowest_hz=args.lowest_hz, neuropil=neuropil)
    except ValueError as exc:
        raise _fail(args.input, exc) from exc
    print(found.summary())
    traces = data.traces.reshape(-1, data.traces.shape[-1])
    removal = None
    if out is not None:
        try:
            removal = remove_rhythms(traces, rate, found, method=args.remove) if found.rhythms else None
        except ValueError as exc:
            raise _fail(args.input, exc) from exc
        _write_traces(out, traces if removal is None else removal.cleaned, frame_rate=rate, inputs=(args.input,),
                      attrs={"rhythms_removed": json.dumps([list(b) for b in found.bands_hz]),
                             "rhythm_removal": "" if removal is None else removal.describe()})
        _say(args, ("nothing to remove: the traces are written unchanged" if removal is None
                    else removal.describe()) + f" -> {out}")
    if args.spikes:
        spikes = _read_spikes(args.spikes)
        if args.rhythm_trace:
            carrier = _read_traces(args.rhythm_trace).traces.reshape(-1, traces.shape[-1])[0]
            targets = [("the given rhythm", carrier, tuple(args.rhythm_band))]
        else:
            average = np.nanmean(np.where(np.isfinite(traces), traces, np.nan), axis=0)
            targets = [(f"{r.frequency_hz:.2f} Hz", average, r.band_hz) for r in found.rhythms]
        for label, carrier, band in targets:
            try:
                phase = rhythm_phase(carrier, rate, band)
            except ValueError as exc:
                raise _fail(args.rhythm_trace or args.input, exc) from exc
            locking = {roi: phase_locking(times, phase, n_surrogates=args.surrogates, seed=roi)
                       for roi, times in sorted(spikes.items())}
            counted = {roi: x for roi, x in locking.items() if x.n_spikes}
            locked = [roi for roi, x in counted.items() if x.p_value <= 0.05]
            print(f"phase locking to {label} ({band[0]:.3g}-{band[1]:.3g} Hz): {len(locked)} of {len(counted)} ROI(s) "
                  f"with spikes locked at p <= 0.05 (5 % expected by chance)"
                  + (f", median PLV {np.median([x.plv for x in counted.values()]):.3f} (by chance "
                     f"{np.median([x.null_plv for x in counted.values()]):.3f})" if counted else ""))
            for roi in locked[:20]:
                print(f"  ROI {roi}: {counted[roi].describe()}")
    if figures is not None:
        from calcium.report.figures import rhythm_spectrum_figure, save_figure, time_frequency_figure
        from calcium.signal.rhythms import scalogram, session_spectra, spectrogram
        spectra = found.spectra
        after = None if removal is None else session_spectra(removal.cleaned, rate, segment_s=args.segment_s)
        save_figure(rhythm_spectrum_figure(spectra.freq_hz, spectra.median_power,
                                           background=found.median_background,
                                           low_power=spectra.quantile_power(0.1), high_power=spectra.quantile_power(0.9),
                                           after=None if after is None else after.median_power,
                                           coherence=spectra.median_coherence,
                                           coherence_null=found.rhythms[0].coherence_null if found.rhythms else None,
                                           peaks_hz=[r.frequency_hz for r in found.rhythms],
                                           resolution_hz=spectra.resolution_hz), figures[0])
        if args.roi is None:
            shown, what = np.nanmean(np.where(np.isfinite(traces), traces, np.nan), axis=0), "the average of the ROIs"
        else:
            shown, what = traces[args.roi], f"ROI {args.roi}"
        try:
            wavelets = scalogram(shown, rate)
            windows = spectrogram(shown, rate, window_s=spectra.segment_s)
        except ValueError as exc:
            raise _fail(args.input, exc) from exc
        save_figure(time_frequency_figure(wavelets.time_s, wavelets.freq_hz, wavelets.amplitude,
                                          reliable=wavelets.reliable, log_frequency=True,
                                          resolution=wavelets.describe(), title=f"scalogram of {what}"), figures[1])
        save_figure(time_frequency_figure(windows.time_s, windows.freq_hz, windows.power,
                                          value_label="power (ΔF/F² / Hz)", resolution=windows.describe(),
                                          title=f"spectrogram of {what}"), figures[2])
        _say(args, "figures -> " + ", ".join(str(path) for path in figures))


def cmd_alias(args):
    from calcium.signal.rhythms import apparent_frequency, physical_frequencies
    if not args.physical_hz and not args.observed_hz:
        raise UsageError("give --physical-hz (where a known rhythm appears) and/or --observed-hz (what could cause a "
                         "peak)")
    for freq in args.physical_hz or ():
        print(f"{freq:g} Hz sampled at {args.frame_rate:g} frames/s appears at "
              f"{apparent_frequency(freq, args.frame_rate):.4g} Hz")
    for freq in args.observed_hz or ():
        try:
            candidates = physical_frequencies(freq, args.frame_rate, up_to_hz=args.up_to_hz)
        except ValueError as exc:
            raise UsageError(_cli_words(str(exc)).replace("observed_hz", "--observed-hz")) from None
        print(f"a peak at {freq:g} Hz at {args.frame_rate:g} frames/s can come from "
              + ", ".join(f"{c:.4g}" for c in candidates) + " Hz")


def cmd_indicators(args):
    from calcium.indicators import INDICATORS

    def secs(value):
        return "-" if value is None else f"{value:.3g}"

    rows = [("name", "ΔF/F 1 spike", "half-rise s", "time to peak s", "half-decay s", "conditions")]
    for ind in INDICATORS:
        cond = ind.conditions if len(ind.conditions) <= 60 else ind.conditions[:59] + "…"
        rows.append((ind.name, f"{ind.dff_single_spike:.3g}", secs(ind.half_rise_s), secs(ind.time_to_peak_s),
                     secs(ind.half_decay_s), cond))
    widths = [max(len(str(r[i])) for r in rows) for i in range(6)]
    for r in rows:
        print("  ".join(str(c).ljust(w) for c, w in zip(r, widths)).rstrip())
    print("\nsources:")
    for ind in INDICATORS:
        print(f"  {ind.name}: {ind.source}")


def cmd_simulate(args):
    from calcium.forward import NoiseModel, SpikeModel, simulate_recording
    out = Path(args.out)
    if out.exists() and any(out.iterdir()) and not args.overwrite:
        raise CommandError(f"{out}: folder exists and is not empty; pass --overwrite")
    kernel = _kernel_from_args(args, required=False)
    sim = simulate_recording(args.rois, args.duration_s, args.frame_rate, kernel=kernel,
                             indicator=None if kernel is not None else "GCaMP6s",
                             spikes=SpikeModel(rate_hz=args.rate_hz),
                             noise=NoiseModel(noise_sd=args.noise_sd, photons_per_frame=args.photons_per_frame),
                             seed=args.seed)
    out.mkdir(parents=True, exist_ok=True)
    paths = sim.save(out)
    _say(args, f"simulated {args.rois} ROI(s) x {sim.raw.shape[-1]} frames -> {out}")
    for p in (paths.values() if isinstance(paths, dict) else paths or ()):
        _say(args, f"  {p}")


def cmd_predict(args):
    from calcium.forward import predict_fluorescence
    from calcium.io import write_csv
    out = _check_new_output(args.out, overwrite=args.overwrite, inputs={"SPIKES": args.spikes})
    plot = (_check_new_output(args.plot, overwrite=args.overwrite, inputs={"SPIKES": args.spikes}, flag="--plot")
            if args.plot else None)
    spikes = _read_spikes(args.spikes)
    if not spikes:
        raise CommandError(f"{args.spikes}: holds no spike times")
    kernel = _kernel_from_args(args)
    if args.frame_rate <= 0:
        raise UsageError(f"--frame-rate must be positive, got {args.frame_rate}")
    last = max((float(t.max()) for t in spikes.values() if len(t)), default=0.0)
    duration = args.duration_s if args.duration_s is not None else last + 5 * kernel.decay_s
    n_frames = max(1, int(np.ceil(duration * args.frame_rate)))
    rois = sorted(spikes)
    try:
        pred = np.vstack([predict_fluorescence(spikes[r], kernel, args.frame_rate, n_frames,
                                               scan_offset_s=args.scan_offset_s, exposure_s=args.exposure_s)
                          for r in rois])
    except ValueError as exc:
        raise _fail(args.spikes, exc) from exc
    if out.suffix.lower() == ".csv":
        t = np.arange(n_frames) / args.frame_rate
        # (columns named as every trace CSV the tool writes: time_s, roi_<index>)
        write_csv(out, ["time_s"] + [f"roi_{r}" for r in rois], np.column_stack([t, pred.T]).tolist())
    else:
        _write_traces(out, pred, frame_rate=args.frame_rate, inputs=(args.spikes,),
                      attrs={"kernel": json.dumps(kernel.to_dict()), "rois": json.dumps(rois)})
    _say(args, f"predicted ΔF/F for {len(rois)} ROI(s) x {n_frames} frames with {kernel} -> {out}")
    if plot:
        from calcium.report.figures import prediction_figure, save_figure
        save_figure(prediction_figure(args.frame_rate, None, pred[0], spikes[rois[0]],
                                      roi_label=f"ROI {rois[0]}"), plot)
        _say(args, f"plot -> {plot}")



def cmd_infer(args):
    from calcium.pipeline import infer_file
    kernel = _kernel_from_args(args, required=False, size_needed=False)
    if args.frame_rate is not None and args.frame_rate <= 0:
        raise UsageError(f"--frame-rate must be positive, got {args.frame_rate}")
    calibration = args.calibration
    if args.spike_size is not None:  # a spike size given by hand: counted as it is
        if calibration != "session":
            raise UsageError("--spike-size fixes the single-spike size: it does not go with --calibration")
        calibration = "given"
    indicator = None
    if kernel is not None and args.indicator and calibration != "given":
        kernel, indicator = None, args.indicator  # (the table's kinetics; the sizes are estimated per ROI)
    from calcium.pipeline.executors import ExecutorError
    try:  # infer_file streams the file and checks the frame rate against the one it records
        summary = infer_file(args.input, args.out, frame_rate=args.frame_rate, kernel=kernel, indicator=indicator,
                             dataset=args.dataset, workers=args.workers, overwrite=args.overwrite,
                             progress=_progress(args), calibration=calibration, allow_raw=args.allow_raw)
    except ExecutorError as exc:  # a worker process died: one line, no traceback
        raise CommandError(str(exc)) from exc
    except (ValueError, OSError) as exc:
        raise _fail(args.input, ValueError(_cli_words(str(exc))), also=(args.out,)) from exc
    _say(args, str(summary))


def _fit_rows(fit) -> tuple[list, list]:
    """Header and rows of a kernel-fit table: each quantity with its interval (blank when not bootstrapped)."""
    k, c = fit.kernel, fit.confidence
    values = {"rise_s": k.rise_s, "decay_s": k.decay_s, "amplitude": k.amplitude, "lag_s": fit.lag_s,
              "half_rise_s": k.half_rise_s, "half_decay_s": k.half_decay_s}
    rows = [[name, value, *(getattr(c, name) if c is not None else ("", ""))] for name, value in values.items()]
    rows += [["baseline", fit.baseline, "", ""], ["residual_sd", fit.residual_sd, "", ""],
             ["r_squared", fit.r_squared, "", ""], ["n_spikes", fit.n_spikes, "", ""],
             ["n_isolated", fit.n_isolated, "", ""]]
    return ["quantity", "value", "low", "high"], rows


def _output_folder(args, *names, inputs=None) -> list[Path]:
    """Paths of the named files in --out, each checked against the inputs and --overwrite; then the folder is
    created."""
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise CommandError(f"{out}: is a file; --out takes a folder")
    _protect(inputs, files=[out / name for name in names])
    paths = [out / name for name in names]
    for path in paths:
        if path.exists() and not args.overwrite:
            raise CommandError(f"{path}: already exists; pass --overwrite to replace it")
    out.mkdir(parents=True, exist_ok=True)
    return paths


def cmd_calibrate(args):
    from calcium.calibrate import calibrate_session
    data = _read_traces(args.input, args.dataset, args)
    rate = _frame_rate(args, data)
    electrical = _read_spikes(args.electrical_spikes) if args.electrical_spikes else None
    out = _check_new_output(args.out, overwrite=args.overwrite,
                            inputs={"INPUT": args.input, "--electrical-spikes": args.electrical_spikes}) \
        if args.out else None
    try:
        calibration = calibrate_session(data.traces, rate, electrical_spikes=electrical, indicator=args.indicator,
                                        max_kinetics_rois=args.max_rois, progress=_progress(args))
    except ValueError as exc:
        raise _fail(args.input, exc) from exc
    print(calibration.summary())
    flagged = [(i, r) for i, r in enumerate(calibration.reasons) if r]
    for roi, reason in flagged[:20]:
        print(f"  ROI {roi}: {reason}")
    if len(flagged) > 20:
        print(f"  ... and {len(flagged) - 20} more")
    if out is not None:
        calibration.save(out)
        _say(args, f"calibration -> {out}")


def cmd_fit_kernel(args):
    from calcium.fit import check_kinetics, fit_kernel
    from calcium.io import write_csv
    data = _read_traces(args.trace, args.dataset, args)
    rate = _frame_rate(args, data)
    spikes = _read_spikes(args.spikes)
    roi = args.roi
    if not 0 <= roi < data.traces.shape[0]:
        raise CommandError(f"{args.trace}: has {data.traces.shape[0]} ROI(s); --roi {roi} is out of range")
    spike_roi = args.spike_roi if args.spike_roi is not None else roi
    times = spikes.get(spike_roi)
    if times is None or len(times) == 0:
        raise CommandError(f"{args.spikes}: no spike times for ROI {spike_roi} (ROIs in the file: "
                           f"{', '.join(map(str, sorted(spikes))) or 'none'})")
    if args.out:  # check before the (slow) fit
        table, figure, calibration = _output_folder(args, "kernel_fit.csv", "kernel_fit.png", "calibration.json",
                                                    inputs={"TRACE": args.trace, "SPIKES": args.spikes})
    try:
        fit = fit_kernel(data.traces[roi], times, rate, model=args.model, kernel=args.indicator,
                         max_lag_s=args.max_lag_s, n_bootstrap=args.n_bootstrap, seed=args.seed)
    except ValueError as exc:
        raise _fail(args.trace, exc) from exc
    print(fit)
    check = None
    if args.indicator:
        check = check_kinetics(fit, args.indicator, temperature_c=args.temperature_c)
        print(check)
    if args.out:
        from calcium.kernel import Kernel
        from calcium.report.figures import kernel_fit_figure, save_figure
        write_csv(table, *_fit_rows(fit))
        reference = Kernel.from_indicator(args.indicator) if args.indicator else None
        save_figure(kernel_fit_figure(fit, reference=reference,
                                      reference_label=f"published {args.indicator}" if reference else ""), figure)
        from calcium.calibrate import SessionCalibration
        SessionCalibration.from_fit(fit, indicator=args.indicator).save(calibration)
        _say(args, f"table -> {table}\nfigure -> {figure}\ncalibration -> {calibration} (reuse it with "
                   f"'calcium infer --calibration {calibration}' or [calibration] file in a run)")


def cmd_score(args):
    from calcium.io import write_csv
    from calcium.score import score_many
    trains = [_read_spikes(path) for path in (args.inferred, args.true)]
    if args.out:
        csv_path, png_path = _output_folder(args, "scores.csv", "scores.png",
                                            inputs={"INFERRED": args.inferred, "TRUE": args.true})
    table = score_many(*trains, tolerance_s=args.tolerance_s, bin_widths_s=tuple(args.bin_widths_s))
    print(table)
    if args.out:
        from calcium.report.figures import save_figure, score_figure
        # (the pooled row has an empty roi, so that the column stays numeric for whoever reads the file)
        write_csv(csv_path, table.header(), table.rows(pooled_roi=""))
        s = table.scores
        save_figure(score_figure([x.precision for x in s], [x.recall for x in s], [x.f1 for x in s],
                                 bin_widths_s=list(args.bin_widths_s),
                                 correlation=[[r for _, r in x.correlations] for x in s],
                                 labels=[f"ROI {r}" for r in table.rois], tolerance_s=args.tolerance_s), png_path)
        _say(args, f"table -> {csv_path}\nfigure -> {png_path}")


def cmd_plan(args):
    from calcium.plan import plan_detectability
    kernel = _kernel_from_args(args, required=False)
    if args.noise_sd and args.photons_per_frame:
        raise UsageError("give either --noise-sd or --photons-per-frame, not both")
    if args.out:
        csv_path, png_path = _output_folder(args, "plan.csv", "plan.png")
    plan = plan_detectability(kernel=kernel, indicator=None if kernel is not None else (args.indicator or None),
                              frame_rates=tuple(args.frame_rates),
                              noise_sd=tuple(args.noise_sd) if args.noise_sd else None,
                              photons_per_frame=tuple(args.photons_per_frame) if args.photons_per_frame else None,
                              n_trials=args.trials, false_positive_rate=args.false_positive_rate, seed=args.seed)
    print(plan)
    if args.out:
        from calcium.io import write_csv
        from calcium.report.figures import plan_figure, save_figure
        write_csv(csv_path, plan.header(), plan.rows())
        save_figure(plan_figure(plan), png_path)
        _say(args, f"table -> {csv_path}\nfigure -> {png_path}")


def cmd_init(args):
    from calcium.pipeline import write_config_template
    path = Path(args.path)
    if path.exists():
        raise CommandError(f"{path}: already exists; not overwritten")
    write_config_template(path)
    _say(args, f"configuration written: {path} (edit it, then `calcium run {path}`)")


def cmd_run(args):
    from calcium.pipeline import run_pipeline
    from calcium.pipeline.executors import ExecutorError
    try:
        summary = run_pipeline(args.config, overwrite=args.overwrite, progress=_progress(args))
    except ExecutorError as exc:  # a worker died, no scheduler at the address: one line, no traceback
        raise CommandError(str(exc)) from exc
    except ValueError as exc:
        raise _fail(args.config, exc) from exc
    _say(args, str(summary))


def cmd_report(args):
    from calcium.pipeline import write_session_report
    out = Path(args.out)
    _protect({"RESULTS": args.results, "--electrical-spikes": args.electrical_spikes},
             files=[out / "index.html"], folders=[out / "figures"])
    if (out / "index.html").exists() and not args.overwrite:
        raise CommandError(f"{out}: already holds a report; pass --overwrite to replace it")
    spikes = _read_spikes(args.electrical_spikes) if args.electrical_spikes else None
    try:
        index = write_session_report(args.results, out, electrical_spikes=spikes, indicator=args.indicator,
                                     progress=_progress(args))
    except (ValueError, OSError) as exc:
        raise _fail(args.results, exc, also=(out,)) from exc
    _say(args, f"report written: {index}")


def cmd_export_nwb(args):
    from calcium.pipeline import export_nwb, nwb_contents
    out = _check_new_output(args.out, overwrite=args.overwrite,
                            inputs={"RESULTS": args.results, "--masks": args.masks})
    try:
        contents = nwb_contents(args.results, masks=args.masks)
        path = export_nwb(args.results, out, session_description=args.description, session_start=args.session_start,
                          experimenter=args.experimenter, location=args.location, indicator=args.indicator,
                          masks=args.masks)
    except (ValueError, OSError, ImportError) as exc:
        raise _fail(args.results, exc, also=(out, args.masks)) from exc
    _say(args, f"NWB file written: {path}")
    for place, what in contents.written:
        _say(args, f"  {place}: {what}")
    for sentence in contents.absent:
        _say(args, f"  not in the results, so not in the NWB file: {sentence}")


# --------------------------------------------------------------------------- parser

def build_parser() -> argparse.ArgumentParser:
    def common_options(default):
        # before the command (`calcium --quiet infer ...`) or after it (`calcium infer ... --quiet`): the
        # command's copy of an option has no default of its own, so it never resets what was given before it
        common = argparse.ArgumentParser(add_help=False)
        common.add_argument("--quiet", action="store_true", default=default, help="no progress bars or chatter")
        common.add_argument("--debug", action="store_true", default=default,
                            help="show the full traceback on errors")
        return common

    common = common_options(argparse.SUPPRESS)
    parser = argparse.ArgumentParser(
        prog="calcium", parents=[common_options(False)],
        description="From calcium-imaging fluorescence to spikes: ΔF/F, zero-phase filters, indicator kernels, "
                    "forward model, exact non-negative deconvolution, kernel fitting, scoring, planning.")
    parser.add_argument("--version", action="version", version=f"calcium {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    def add(name, func, help_text):
        p = sub.add_parser(name, parents=[common], help=help_text, description=help_text)
        p.set_defaults(func=func)
        return p

    def traces_input(p, name="input"):
        p.add_argument(name, help="trace file: .npy, .csv (one column per ROI, optional time_s column) or .h5")
        p.add_argument("--dataset", help="dataset name inside an HDF5 file")
        p.add_argument("--frame-rate", type=_positive, help="frames per second (Hz); read from the file when it has it")
        p.add_argument("--time-column", metavar="NAME|INDEX|none",
                       help="CSV: the column holding the time in seconds (default: one named time_s or time); "
                            "'none': every column is a ROI")
        p.add_argument("--wide", action="store_true",
                       help="accept a file with many more ROIs than frames (refused by default: such files were "
                            "usually written one line per ROI)")

    def output(p, required=True, help_text="output file"):
        p.add_argument("--out", required=required, help=help_text)
        p.add_argument("--overwrite", action="store_true", help="replace an existing output")

    p = add("demo", cmd_demo, "run every stage on the bundled demo session and write an HTML report")
    p.add_argument("--out", default="calcium-demo", help="report folder (default: ./calcium-demo)")
    p.add_argument("--overwrite", action="store_true", help="replace an existing report folder")

    p = add("extract", cmd_extract, "movie + ROI masks -> neuropil-corrected fluorescence traces")
    p.add_argument("movie", help="TIFF movie (frames, height, width)")
    p.add_argument("masks", help="ROI masks: label image (0 = background) or boolean stack (.tif/.npy)")
    p.add_argument("--frame-rate", type=_positive, help="frames per second (Hz), stored with the traces")
    p.add_argument("--neuropil-gap-px", type=_finite, default=2.0,
                   help="gap between ROI and neuropil ring, pixels (default 2, common practice: it keeps the "
                        "ROI's own light spread by the point-spread function out of the ring)")
    _former(p, "--gap-px", "--neuropil-gap-px", "neuropil_gap_px", type=_finite)
    p.add_argument("--radius-px", type=_finite, default=15.0, help="outer radius of the neuropil ring (pixels)")
    p.add_argument("--neuropil-factor", default="0.7",
                   help="r in F - r*F_neuropil, or 'estimate' (per ROI from the data); default 0.7, the value of "
                        "Chen et al. 2013 for layer 2/3 cells in vivo (from memory)")
    p.add_argument("--chunk-frames", type=int, default=500, help="frames read at a time")
    output(p, help_text="output traces (.h5 keeps ROI, neuropil and factors; .npy/.csv: corrected only)")

    p = add("dff", cmd_dff, "raw fluorescence -> ΔF/F with a running-percentile baseline F0")
    traces_input(p)
    p.add_argument("--window-s", type=_positive, default=60.0,
                   help="baseline window in seconds (default 60: measured with --percentile 8 on our independent "
                        "generator, see scripts/bench_baseline_defaults.py and docs/benchmarks.md)")
    p.add_argument("--percentile", type=_finite, default=8.0, help="baseline percentile (default 8, see --window-s)")
    p.add_argument("--floor", type=_finite, help="lowest allowed F0 (otherwise F0 <= 0 is an error)")
    output(p, help_text="output file (.h5 also stores F0)")

    p = add("filter", cmd_filter, "zero-phase filter traces (low/high/band-pass, band-stop)")
    traces_input(p)
    p.add_argument("--kind", required=True, choices=["lowpass", "highpass", "bandpass", "bandstop"],
                   help="which frequencies pass")
    p.add_argument("--cutoff-hz", type=_positive, nargs="+", required=True,
                   help="cut-off in Hz (two values for bandpass/bandstop)")
    p.add_argument("--order", type=int, default=4, help="filter order (FIR: taps - 1)")
    p.add_argument("--method", choices=["butterworth", "fir"], default="butterworth",
                   help="Butterworth (IIR) or windowed-sinc FIR design, run forward and backward (default: "
                        "butterworth)")
    p.add_argument("--edges", choices=["pad", "mark", "trim"], default="pad",
                   help="edge handling: pad (default), mark the affected span, or trim it")
    p.add_argument("--plot", help="also write the frequency response to this PNG")
    output(p)

    p = add("noise", cmd_noise, "noise s.d. per ROI from the upper band of the power spectrum")
    traces_input(p)
    output(p, required=False, help_text="CSV table (default: print)")

    p = add("rhythms", cmd_rhythms, "find rhythms many ROIs share (heartbeat, breathing, flicker, mains, aliased or "
                                     "not), show them in time and frequency, remove them, and test spikes' locking")
    traces_input(p)
    p.add_argument("--segment-s", type=_positive, default=10.0,
                   help="Welch segment in seconds; the frequency resolution is 1/segment (default 10: 0.1 Hz)")
    p.add_argument("--min-share", type=_finite, default=0.25,
                   help="a rhythm must stand out in at least this share of the ROIs (default 0.25)")
    p.add_argument("--false-alarm", type=_finite, default=0.01,
                   help="chance that a session without a shared rhythm shows one (default 0.01)")
    p.add_argument("--lowest-hz", type=_positive, default=0.5, help="lowest frequency searched (default 0.5 Hz)")
    p.add_argument("--neuropil", help="trace file of each ROI's neuropil (same shape): coherence with it instead of "
                                      "with the other ROIs")
    p.add_argument("--neuropil-dataset", help="dataset of --neuropil inside an HDF5 file (calcium extract writes "
                                              "neuropil_f)")
    p.add_argument("--remove", choices=["regression", "notch", "bandstop"],
                   help="remove the rhythms found and write the traces to --out: regression keeps each cell's own "
                        "activity in the band; notch/bandstop are zero-phase filters")
    p.add_argument("--spikes", help="spike CSV (roi,time_s): how strongly each ROI's spikes lock to each rhythm "
                                    "(phase-locking value, surrogate test)")
    p.add_argument("--rhythm-trace", help="a trace file (one row, same frames) carrying a rhythm you recorded "
                                          "(breathing, running): the --spikes' locking to it")
    p.add_argument("--rhythm-band", type=_positive, nargs=2, metavar=("LOW", "HIGH"),
                   help="band of --rhythm-trace's rhythm, Hz")
    p.add_argument("--surrogates", type=int, default=999,
                   help="surrogate spike trains of the locking test (default 999)")
    p.add_argument("--figures", help="folder for the spectrum, scalogram and spectrogram (PNG)")
    p.add_argument("--roi", type=int, help="the scalogram and spectrogram of this ROI (default: of the average)")
    output(p, required=False, help_text="traces without the rhythms (.h5, .npy or .csv; with --remove)")

    p = add("alias", cmd_alias, "where a rhythm appears once sampled at a frame rate, and what could cause a peak")
    p.add_argument("--frame-rate", type=_positive, required=True, help="frames per second (Hz)")
    p.add_argument("--physical-hz", type=_positive, nargs="+", help="frequencies of known rhythms (mains, heart)")
    p.add_argument("--observed-hz", type=_positive, nargs="+", help="frequencies of peaks seen in a spectrum")
    p.add_argument("--up-to-hz", type=_positive, help="highest candidate listed (default 5 x the frame rate)")

    add("indicators", cmd_indicators, "list the reference indicator kinetics with their sources")

    p = add("simulate", cmd_simulate, "simulate a recording: spike trains -> forward model -> noisy fluorescence")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--overwrite", action="store_true", help="write into a non-empty folder")
    p.add_argument("--rois", type=int, default=10, help="number of simulated cells (default 10)")
    p.add_argument("--duration-s", type=_positive, default=60.0, help="recording length, seconds (default 60)")
    p.add_argument("--frame-rate", type=_positive, default=30.0, help="frames per second, Hz (default 30)")
    p.add_argument("--rate-hz", type=_finite, default=0.5, help="mean firing rate per ROI")
    p.add_argument("--noise-sd", type=_finite, help="ΔF/F noise s.d. (instead of a photon budget)")
    p.add_argument("--photons-per-frame", type=_finite, help="photons per frame at baseline (shot noise)")
    p.add_argument("--seed", type=int, default=0, help="seed of the random numbers, for repeatable results "
                                                       "(default 0)")
    _add_kernel_options(p, help_suffix=" (default: GCaMP6s)")

    p = add("predict", cmd_predict, "spike times -> predicted ΔF/F per frame (forward model)")
    p.add_argument("spikes", help="spike CSV: roi,time_s or one time per line")
    p.add_argument("--frame-rate", type=_positive, required=True, help="frames per second of the prediction, Hz")
    p.add_argument("--duration-s", type=_positive, help="recording length (default: last spike + 5 decays)")
    p.add_argument("--scan-offset-s", type=_finite, default=0.0, help="time the scanner reaches the ROI in a frame")
    p.add_argument("--exposure-s", type=_finite, help="average over an exposure window instead of a point sample")
    p.add_argument("--plot", help="also write a PNG plot")
    _add_kernel_options(p)
    output(p, help_text="output traces (.h5, .npy or .csv)")

    p = add("infer", cmd_infer, "ΔF/F -> inferred spikes (exact non-negative deconvolution), counts calibrated "
                                "across the file's ROIs, resumable")
    traces_input(p)
    _add_kernel_options(p, help_suffix=" (default: learned from the file's ROIs; --spike-size counts with that "
                                       "single-spike size as it is)")
    p.add_argument("--calibration", default="session", metavar="session|per-roi|FILE",
                   help="how the single-spike size of each ROI is found: 'session' (default) pools the kinetics "
                        "over the file's ROIs and estimates each ROI's size from its events, shrunk towards the "
                        "session's sizes; 'per-roi' estimates each ROI alone (counts often off by 2x, not "
                        "flagged); FILE: a calibration written by 'calcium calibrate' or 'calcium fit-kernel --out' "
                        "(its kinetics and distribution of sizes)")
    p.add_argument("--allow-raw", action="store_true",
                   help="infer even on ROIs whose values look like raw fluorescence rather than ΔF/F (their "
                        "counts are flagged as uncalibrated)")
    p.add_argument("--workers", type=int, default=os.cpu_count() or 1, help="parallel processes (default: all cores)")
    output(p, help_text="output HDF5 file; a CSV spike table is written beside it")

    p = add("calibrate", cmd_calibrate, "ΔF/F of a session -> shared kinetics and each ROI's single-spike size, "
                                        "with intervals and flags")
    traces_input(p)
    p.add_argument("--electrical-spikes", help="spike CSV (roi,time_s) of ROIs recorded electrically: the kinetics "
                                               "are fitted on them")
    p.add_argument("--indicator", help="indicator name (`calcium indicators`): its published single-spike ΔF/F is a "
                                       "weak prior, its kinetics are checked against the session's")
    p.add_argument("--max-rois", type=int, default=48, help="blind: ROIs (clearest signal first) whose kinetics "
                                                            "are pooled (default 48)")
    output(p, required=False, help_text="write the calibration (.json) for 'calcium infer --calibration'")

    p = add("fit-kernel", cmd_fit_kernel, "fit indicator kinetics and clock lag from electrically recorded spikes")
    p.add_argument("trace", help="ΔF/F trace file")
    p.add_argument("spikes", help="spike CSV (roi,time_s or one time per line)")
    p.add_argument("--dataset", help="dataset name inside an HDF5 file")
    p.add_argument("--frame-rate", type=_positive, help="frames per second (Hz)")
    p.add_argument("--roi", type=int, default=0, help="which ROI of the trace file (default 0)")
    p.add_argument("--spike-roi", type=int, help="which ROI of the spike file (default: same as --roi)")
    p.add_argument("--indicator", help="indicator to start from and to check against")
    p.add_argument("--model", choices=["double-exponential", "free"], default="double-exponential",
                   help="kernel model (default: double-exponential; 'free' also estimates a free-form response)")
    p.add_argument("--n-bootstrap", type=int, default=200,
                   help="bootstrap refits for the intervals (default 200; 0: no intervals)")
    _former(p, "--bootstrap", "--n-bootstrap", "n_bootstrap", type=int)
    p.add_argument("--max-lag-s", type=_positive, default=1.0, help="largest clock offset searched, in seconds")
    p.add_argument("--temperature-c", type=_finite, help="recording temperature, for the kinetics check")
    p.add_argument("--seed", type=int, default=0, help="seed of the random numbers, for repeatable results "
                                                       "(default 0)")
    output(p, required=False, help_text="folder for the table and figure")

    p = add("score", cmd_score, "score inferred spikes against true (electrical) spike times")
    p.add_argument("inferred", help="inferred spike CSV")
    p.add_argument("true", help="true spike CSV")
    p.add_argument("--tolerance-s", type=_positive, default=0.1, help="matching tolerance in seconds")
    p.add_argument("--bin-widths-s", type=_positive, nargs="+", default=[0.1, 0.2, 0.5, 1.0],
                   help="bin widths for the correlation of binned counts, seconds (default: 0.1 0.2 0.5 1)")
    output(p, required=False, help_text="folder for the table and figure")

    p = add("plan", cmd_plan, "will single spikes be detectable? sweep frame rate and noise by simulation")
    _add_kernel_options(p, help_suffix=" (default: GCaMP6s)")
    p.add_argument("--frame-rates", type=_positive, nargs="+", default=[7.5, 15.0, 30.0, 60.0],
                   help="frame rates to compare, Hz (default: 7.5 15 30 60)")
    p.add_argument("--noise-sd", type=_finite, nargs="+", help="ΔF/F noise s.d. levels")
    p.add_argument("--photons-per-frame", type=_finite, nargs="+",
                   help="photons per frame at baseline, one or more levels (instead of --noise-sd)")
    _former(p, "--photons", "--photons-per-frame", "photons_per_frame", type=_finite, nargs="+")
    p.add_argument("--trials", type=int, default=200,
                   help="simulated trials per frame rate and noise level (default 200)")
    p.add_argument("--false-positive-rate", type=_finite, default=0.01,
                   help="false detections allowed per spike-free window, the detection threshold's level "
                        "(default 0.01)")
    p.add_argument("--seed", type=int, default=0, help="seed of the random numbers, for repeatable results "
                                                       "(default 0)")
    output(p, required=False, help_text="folder for the table and figure")

    p = add("report", cmd_report, "write the HTML report of a results file (from `calcium run` or `calcium infer`)")
    p.add_argument("results", help="results HDF5 file")
    p.add_argument("--out", default="calcium-report", help="report folder (default: ./calcium-report)")
    p.add_argument("--electrical-spikes", help="spike CSV of electrically recorded cells, for the comparison")
    p.add_argument("--indicator", help="indicator whose published kinetics frame the fitted ones")
    p.add_argument("--overwrite", action="store_true", help="replace an existing report")

    p = add("export-nwb", cmd_export_nwb, "export a results file (of `calcium run` or `calcium infer`) to NWB: "
                                          "ROIs, ΔF/F, model fit, activity, and each ROI's spike times in the Units "
                                          "table (needs the optional extra `nwb`)")
    p.add_argument("results", help="results HDF5 file of `calcium run` or `calcium infer`")
    p.add_argument("--description", default="calcium imaging session",
                   help="NWB session description (default: 'calcium imaging session')")
    p.add_argument("--session-start", help="session start time, ISO 8601 such as 2024-03-01T10:15:00+01:00 "
                                           "(default: the modification time of the run's input file)")
    p.add_argument("--experimenter", help="name of the experimenter, recorded in the file (default: none)")
    p.add_argument("--location", help="brain area of the imaging plane (default: 'unknown')")
    p.add_argument("--indicator", help="indicator name recorded in the NWB imaging plane (default: 'unknown')")
    p.add_argument("--masks", help="ROI masks (.tif/.npy: label image or boolean stack), stored as the ROIs' "
                                   "pixel masks (default: the run's mask file for a movie run; otherwise each ROI "
                                   "gets one placeholder pixel of weight 0)")
    output(p, help_text="output .nwb file")

    p = add("init", cmd_init, "write a commented pipeline configuration (TOML)")
    p.add_argument("path", nargs="?", default="calcium.toml",
                   help="configuration file to write (default: calcium.toml), with every key commented")

    p = add("run", cmd_run, "run the whole-session pipeline described by a configuration file")
    p.add_argument("config", help="TOML configuration (see `calcium init`)")
    p.add_argument("--overwrite", action="store_true", help="replace an output made with other parameters")
    return parser


def _version() -> str:
    from calcium import __version__
    return __version__


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_USAGE
    import warnings

    def show_warning(message, category, filename, lineno, file=None, line=None):
        print(f"calcium {args.command}: warning: {message}", file=sys.stderr)

    warnings.showwarning = show_warning
    try:
        args.func(args)
    except BrokenPipeError:  # output piped into `head` and the like (an OSError: caught first)
        sys.stderr.close()
        return 0
    except (CommandError, ValueError, OSError) as exc:
        if args.debug:
            raise
        print(f"calcium {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USAGE if isinstance(exc, UsageError) else EXIT_DATA
    except KeyboardInterrupt:
        print(f"calcium {args.command}: interrupted", file=sys.stderr)
        return 130
    return 0


if __name__ == "__main__":
    sys.exit(main())
