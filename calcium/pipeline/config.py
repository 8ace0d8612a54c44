"""Configuration of a whole-session run: a TOML file, read into frozen dataclasses.

One section per stage. Every key has a default, so a configuration file only
needs the keys that differ; :func:`write_config_template` writes a file that
lists every key with its default, what it means and the values allowed.

Rules applied by :func:`load_config`:

* an unknown section or key is an error (a typo must not be silently ignored);
* a value of the wrong type or outside its range is an error naming the key
  (``section.key``), the value and what is allowed;
* relative paths are taken relative to the folder of the configuration file.

Errors are :class:`ConfigError`, a :class:`ValueError`.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import numbers
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

__all__ = [
    "ConfigError",
    "InputsConfig",
    "OutputConfig",
    "ExtractionConfig",
    "DffConfig",
    "FilterConfig",
    "RhythmsConfig",
    "NoiseConfig",
    "InferenceConfig",
    "QualityConfig",
    "KernelFitConfig",
    "ScoringConfig",
    "ReportConfig",
    "NwbConfig",
    "ExecutionConfig",
    "RunConfig",
    "load_config",
    "write_config_template",
    "config_from_dict",
]


class ConfigError(ValueError):
    """A configuration file or value is wrong; the message names the key (``section.key``)."""


# ---------------------------------------------------------------------------
# value kinds: each parses one TOML value and says in words what it accepts
# ---------------------------------------------------------------------------
def _is_number(value) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def _fail(key: str, value, allowed: str):
    raise ConfigError(f"{key} = {value!r} is not allowed: {allowed}")


class _Kind:
    """How one key is parsed; ``allowed`` is the text used in messages and in the template."""

    allowed = ""

    def parse(self, value, key: str, base: Path):
        raise NotImplementedError

    def to_toml(self, value) -> str:
        return _toml_value(value)


class _Number(_Kind):
    def __init__(self, *, gt=None, ge=None, lt=None, le=None):
        self.gt, self.ge, self.lt, self.le = gt, ge, lt, le
        parts = []
        if gt is not None:
            parts.append(f"> {gt:g}")
        if ge is not None:
            parts.append(f">= {ge:g}")
        if lt is not None:
            parts.append(f"< {lt:g}")
        if le is not None:
            parts.append(f"<= {le:g}")
        self.allowed = "a number " + " and ".join(parts) if parts else "a finite number"

    def check(self, value, key):
        if not _is_number(value) or not math.isfinite(value):
            _fail(key, value, self.allowed)
        value = float(value)
        if ((self.gt is not None and not value > self.gt) or (self.ge is not None and not value >= self.ge)
                or (self.lt is not None and not value < self.lt) or (self.le is not None and not value <= self.le)):
            _fail(key, value, self.allowed)
        return value

    def parse(self, value, key, base):
        return self.check(value, key)


class _Integer(_Kind):
    def __init__(self, *, ge=None, le=None):
        self.ge, self.le = ge, le
        if ge is not None and le is not None:
            self.allowed = f"a whole number from {ge} to {le}"
        elif ge is not None:
            self.allowed = f"a whole number >= {ge}"
        else:
            self.allowed = "a whole number"

    def parse(self, value, key, base):
        if isinstance(value, bool) or not isinstance(value, numbers.Integral):
            _fail(key, value, self.allowed)
        value = int(value)
        if (self.ge is not None and value < self.ge) or (self.le is not None and value > self.le):
            _fail(key, value, self.allowed)
        return value


class _Bool(_Kind):
    allowed = "true or false"

    def parse(self, value, key, base):
        if not isinstance(value, bool):
            _fail(key, value, self.allowed)
        return value


class _Choice(_Kind):
    def __init__(self, *options):
        self.options = options
        self.allowed = "one of " + ", ".join(f'"{o}"' for o in options)

    def parse(self, value, key, base):
        if value not in self.options:
            _fail(key, value, self.allowed)
        return value


class _Text(_Kind):
    def __init__(self, allowed="a text string"):
        self.allowed = allowed

    def parse(self, value, key, base):
        if not isinstance(value, str):
            _fail(key, value, self.allowed)
        return value


class _Path(_Kind):
    def __init__(self, allowed="a file path (relative to this file's folder)"):
        self.allowed = allowed

    def parse(self, value, key, base):
        if isinstance(value, os.PathLike):
            value = os.fspath(value)
        if not isinstance(value, str) or not value.strip():
            _fail(key, value, self.allowed)
        path = Path(os.path.expanduser(value))
        return path if path.is_absolute() else Path(os.path.abspath(base / path))

    def to_toml(self, value) -> str:
        return _toml_value(str(value))


class _NumberOrText(_Kind):
    """A number in a range, or one of a few words (e.g. ``"estimate"``)."""

    def __init__(self, number: _Number, *words):
        self.number, self.words = number, words
        self.allowed = number.allowed + " or " + " or ".join(f'"{w}"' for w in words)

    def parse(self, value, key, base):
        if isinstance(value, str) and value in self.words:
            return value
        if not _is_number(value):
            _fail(key, value, self.allowed)
        try:
            return self.number.check(value, key)
        except ConfigError:
            _fail(key, value, self.allowed)


class _NumberList(_Kind):
    """One number or a list of numbers (returned as a tuple of floats)."""

    def __init__(self, number: _Number, *, min_len=1, max_len=None, scalar_ok=True):
        self.number, self.min_len, self.max_len, self.scalar_ok = number, min_len, max_len, scalar_ok
        count = f"{min_len} to {max_len}" if max_len and max_len != min_len else f"{min_len}" if max_len \
            else "one or more" if min_len == 1 else f"at least {min_len}"
        self.allowed = f"a list of {count} numbers, each {number.allowed[len('a number '):] or 'finite'}"
        if scalar_ok:
            self.allowed = "a number or " + self.allowed

    def parse(self, value, key, base):
        items = [value] if (self.scalar_ok and _is_number(value)) else value
        if not isinstance(items, (list, tuple)) or not (self.min_len <= len(items) <= (self.max_len or 10 ** 9)):
            _fail(key, value, self.allowed)
        out = []
        for item in items:
            try:
                out.append(self.number.check(item, key))
            except ConfigError:
                _fail(key, value, self.allowed)
        return tuple(out)


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, numbers.Integral):
        return str(int(value))
    if isinstance(value, numbers.Real):
        text = repr(float(value))
        return text if ("." in text or "e" in text or "n" in text) else text + ".0"
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)  # a TOML basic string is a JSON string
    if isinstance(value, os.PathLike):
        return json.dumps(os.fspath(value), ensure_ascii=False)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {value!r} as TOML")


def _key(default, kind: _Kind, doc: str, *, example=None, hashed: bool = True):
    """A dataclass field with its TOML kind, its comment, and whether it changes the results."""
    return field(default=default, metadata={"kind": kind, "doc": doc, "example": example, "hashed": hashed})


# ---------------------------------------------------------------------------
# sections
# ---------------------------------------------------------------------------
@dataclass(frozen=True)
class InputsConfig:
    """[inputs]: what to analyse. Give ``traces`` or ``movie`` + ``masks``."""

    traces: Path | None = _key(None, _Path(), "Fluorescence traces (rois, frames): .npy, .csv or .h5/.hdf5. "
                               "Give this, or movie + masks.", example="traces.h5", hashed=False)
    traces_dataset: str | None = _key(None, _Text("an HDF5 dataset name"),
                                      "HDF5 traces only: the dataset to read (default: 'traces', else the "
                                      "only 1-D/2-D numeric dataset).", example="traces")
    movie: Path | None = _key(None, _Path(), "Imaging movie (frames, height, width): .tif/.tiff/.npy; "
                              "needs masks.", example="movie.tif", hashed=False)
    masks: Path | None = _key(None, _Path(), "ROI masks: label image (0 = background) or boolean stack "
                              "(.tif/.tiff/.npy).", example="masks.tif", hashed=False)
    frame_rate: float | None = _key(None, _Number(gt=0), "Frames per second (Hz). Omit to take it from the "
                                    "traces file (CSV time column or HDF5 'frame_rate' attribute).",
                                    example=30.0)
    electrical_spikes: Path | None = _key(None, _Path(), "Optional: electrically recorded spike times, CSV "
                                          "'roi,time_s[,count]' (seconds from the first frame). Enables the "
                                          "kernel fit and the scoring for those ROIs.", example="ephys_spikes.csv",
                                          hashed=False)


@dataclass(frozen=True)
class OutputConfig:
    """[output]: where the results go."""

    folder: Path = _key(Path("results"), _Path("a folder path (relative to this file's folder)"),
                        "Output folder (created if needed): results.h5, spikes.csv, report/, results.nwb.",
                        hashed=False)
    f0: bool = _key(False, _Bool(), "Also store the baseline F0 of every frame in results.h5 (4 bytes per ROI and "
                                    "frame; F0 = F / (1 + ΔF/F) where F is known). Its minimum per ROI and the F0 "
                                    "quality flags are always stored.")


@dataclass(frozen=True)
class ExtractionConfig:
    """[extraction]: movie + masks -> fluorescence traces (used only with a movie)."""

    neuropil_gap_px: int = _key(2, _Integer(ge=0, le=1000), "Pixels left out between a ROI and its neuropil ring (common practice: a "
                                "gap of a couple of pixels keeps the ROI's own light, spread by the microscope's "
                                "point-spread function, out of the ring).")
    neuropil_radius_px: int = _key(15, _Integer(ge=1, le=10000), "Outer radius of the neuropil ring, pixels.")
    neuropil_factor: float | str = _key(0.7, _NumberOrText(_Number(ge=0, le=2), "estimate"),
                                        "Neuropil subtraction factor r in F = F_roi - r * F_neuropil, or "
                                        "\"estimate\" to estimate r per ROI (default 0.7: the value of Chen et al. "
                                        "2013 for layer 2/3 cells in vivo, from memory).")
    chunk_frames: int = _key(500, _Integer(ge=1, le=10 ** 7), "Frames read from the movie at a time.",
                             hashed=False)


@dataclass(frozen=True)
class DffConfig:
    """[dff]: baseline F0 (running low percentile) and ΔF/F = (F - F0) / F0."""

    window_s: float = _key(60.0, _Number(gt=0), "Running window for the F0 percentile, seconds (default measured "
                           "with percentile = 8 on our independent generator, scripts/bench_baseline_defaults.py: "
                           "F0 within 0.7 % for sparse cells and 4.8 % for cells firing at 3 Hz, counts 1.00 and "
                           "0.97 of the truth).")
    percentile: float = _key(8.0, _Number(ge=0, le=100), "Percentile of the smoothed trace taken as F0 (default: "
                             "see window_s).")
    smooth_s: float = _key(1.0, _Number(ge=0), "Moving-average width before the percentile, seconds (0 = none).")
    floor: float | None = _key(None, _Number(gt=0), "Optional: clip F0 from below at this value instead of "
                               "flagging the ROI when F0 <= 0.", example=1.0)


FILTER_KINDS = ("none", "lowpass", "highpass", "bandpass", "bandstop")


@dataclass(frozen=True)
class FilterConfig:
    """[filter]: optional zero-phase filter applied to ΔF/F before inference."""

    kind: str = _key("none", _Choice(*FILTER_KINDS), "Filter type; \"none\" skips this stage.")
    cutoff_hz: tuple = _key((5.0,), _NumberList(_Number(gt=0), min_len=1, max_len=2),
                            "Cut-off frequency in Hz; [low, high] for bandpass/bandstop. Must lie below "
                            "half the frame rate.")
    order: int = _key(4, _Integer(ge=1, le=64), "Filter order (of one pass; forward-backward doubles it).")
    method: str = _key("butterworth", _Choice("butterworth", "fir"), "Filter design.")


@dataclass(frozen=True)
class RhythmsConfig:
    """[rhythms]: periodic artefacts the ROIs share (heartbeat, breathing, flicker, mains), searched once per run."""

    action: str = _key("report", _Choice("report", "remove", "off"),
                       "report: search the inference's input of up to max_rois ROIs for narrow-band rhythms that many "
                       "ROIs share, describe them in the report, and leave their bands out of every ROI's noise "
                       "estimate; remove: also remove them from every ROI before the inference (with method); off: "
                       "no search.")
    method: str = _key("regression", _Choice("regression", "notch", "bandstop"),
                       "With action = \"remove\": regression subtracts from each ROI the part of each band that "
                       "follows the session's shared component, keeping the cell's own activity in the band; notch: "
                       "a zero-phase second-order notch per band; bandstop: a zero-phase Butterworth band-stop per "
                       "band. Measured in scripts/bench_rhythms.py (12 sessions with a rhythm of 1-2.5 noise s.d., "
                       "against their rhythm-free twins): the inference's false positives rose by 4 % after "
                       "regression, by 71 % after notches and by 89 % after band-stops, which take part of every "
                       "transient out when the band lies below 2 Hz.")
    segment_s: float = _key(10.0, _Number(gt=0), "Welch segment, s: the frequency resolution is 1 / segment_s "
                            "(calcium.signal.rhythms.SEGMENT_S, where the choice is explained).")
    min_share: float = _key(0.25, _Number(gt=0, lt=1), "A rhythm must stand out in at least this share of the ROIs "
                            "searched (our reading of 'many ROIs': a quarter of the field).")
    false_alarm: float = _key(0.01, _Number(gt=0, lt=1), "Probability that a session without any shared rhythm "
                              "shows one (measured: none of 200 rhythm-free 10-minute sessions of 60 ROIs did, and 1 "
                              "of 80 two-minute sessions of 10 ROIs).")
    lowest_hz: float = _key(0.5, _Number(gt=0), "Lowest frequency searched, Hz (raised to what the segment "
                            "resolves: 3.75 bins).")
    max_rois: int = _key(500, _Integer(ge=2), "ROIs searched, spread evenly over the session; the rest are "
                         "treated with what these show (measured: the search takes 1.6 s on 500 ROIs x 36,000 frames; "
                         "the benchmark's sessions of 60 ROIs were enough to find every rhythm of 1 noise s.d.).")


@dataclass(frozen=True)
class NoiseConfig:
    """[noise]: noise level of the (filtered) ΔF/F, from the flat upper band of its power spectrum."""

    band_hz: tuple | None = _key(None, _NumberList(_Number(gt=0), min_len=2, max_len=2, scalar_ok=False),
                                 "Optional: the band [low, high] in Hz taken as flat noise (default: a quarter "
                                 "to half the frame rate).", example=[7.5, 15.0])
    average: str = _key("arithmetic", _Choice("arithmetic", "median", "geometric", "mean", "logmeanexp"),
                        "How the spectrum is averaged over the band: arithmetic, median or geometric mean (median "
                        "and geometric resist narrow peaks; 'mean' and 'logmeanexp' are their former names, "
                        "accepted for one release).")


@dataclass(frozen=True)
class InferenceConfig:
    """[inference]: spike inference (non-negative deconvolution) on the (filtered) ΔF/F."""

    indicator: str | None = _key(None, _Text("an indicator name known to calcium.indicators"),
                                 "Indicator whose published kinetics give the kernel (and the reference range "
                                 "in the report). Omit to estimate the kernel from each trace.",
                                 example="GCaMP6s")
    rise_s: float | None = _key(None, _Number(ge=0), "Optional: kernel rise time constant, s (0 = instantaneous). "
                                "Give with decay_s to fix the kernel yourself.", example=0.05)
    decay_s: float | None = _key(None, _Number(gt=0), "Optional: kernel decay time constant, s.", example=1.0)
    spike_size: float | None = _key(None, _Number(gt=0), "Optional: peak ΔF/F of one spike (default: the "
                                    "kernel's, or estimated from the sizes of the events).", example=0.2)
    penalty: float | None = _key(None, _Number(ge=0), "Optional: sparsity penalty (default: chosen per ROI so "
                                 "that the residual matches the noise).", example=0.1)
    order: int = _key(2, _Integer(ge=1, le=2), "Order of the AR model when the kernel is estimated "
                      "(1: instantaneous rise, 2: finite rise).")
    threshold: float = _key(0.5, _Number(gt=0), "Events smaller than this many spikes are dropped; larger ones "
                            "are rounded to whole spikes.")


@dataclass(frozen=True)
class CalibrationConfig:
    """[calibration]: how the kinetics and each ROI's single-spike size are learned (see calcium.calibrate)."""

    source: str = _key("auto", _Choice("auto", "paired", "session", "per-roi", "indicator", "given", "file"),
                       "Where the counts' calibration comes from. auto: ROIs with electrical spikes when "
                       "inputs.electrical_spikes is given (paired), else the whole session (session); paired: fits "
                       "of the ROIs with electrical spikes; session: blind, kinetics pooled over the ROIs and each "
                       "ROI's spike size from its events, shrunk towards the session's sizes; per-roi: each ROI "
                       "alone (not recommended: counts are often off by 2x); indicator: the published kinetics of "
                       "inference.indicator, sizes still estimated per ROI; given: inference.rise_s, decay_s and "
                       "spike_size as they are; file: the calibration in calibration.file.")
    file: Path | None = _key(None, _Path("a calibration file (.json) written by calcium calibrate or calcium infer"),
                             "With source = \"file\": a calibration of another session (or of this one) to reuse.",
                             example="calibration.json", hashed=False)
    max_rois: int = _key(64, _Integer(ge=1), "The session's kinetics and its distribution of spike sizes are "
                         "learned on at most this many ROIs (spread evenly over the session, paired ROIs always "
                         "included); every ROI's own size is then estimated from its events. 64 ROIs give the "
                         "session's median size to about 3 % (0.25 / sqrt(64), with a spread of log sizes of 0.25 "
                         "across cells, Chen et al. 2013, from memory) in about 1 s (measured, 36,000 frames).")


@dataclass(frozen=True)
class QualityConfig:
    """[quality]: thresholds of the per-ROI quality flags."""

    min_snr: float = _key(3.0, _Number(ge=0), "Flag 'low SNR' below this signal-to-noise ratio (peak of the "
                          "denoised ΔF/F over the noise s.d.).")
    max_missing_fraction: float = _key(0.1, _Number(ge=0, le=1), "Flag 'many missing frames' above this "
                                       "fraction of missing frames.")
    saturation_frames: int = _key(3, _Integer(ge=0), "Flag 'saturation suspected' when the raw maximum is "
                                  "reached in at least this many frames (0 = never).")


@dataclass(frozen=True)
class KernelFitConfig:
    """[kernel_fit]: fit of the indicator kernel to ROIs with electrical spikes."""

    model: str = _key("double-exponential", _Choice("double-exponential", "free"),
                      "Kernel model fitted to ΔF/F from the electrical spikes (\"free\" also estimates a free-form "
                      "response; the double exponential is fitted either way).")
    max_lag_s: float = _key(1.0, _Number(gt=0), "Largest clock offset between electrical and imaging clocks "
                            "considered, either sign, s.")
    n_bootstrap: int = _key(200, _Integer(ge=0, le=100000), "Bootstrap refits for the confidence intervals "
                            "(0 = none).")
    confidence: float = _key(0.9, _Number(gt=0, lt=1), "Level of the bootstrap intervals (0.9: common practice for "
                                                          "percentile intervals, Efron & Tibshirani 1993).")
    seed: int = _key(0, _Integer(ge=0), "Seed of the bootstrap (fixed, so reruns give the same intervals).")
    min_isolated_spikes: int = _key(3, _Integer(ge=1), "Fewest isolated spikes a ROI needs for a fit.")


@dataclass(frozen=True)
class ScoringConfig:
    """[scoring]: inferred against electrical spikes (ROIs with electrical spikes only)."""

    tolerance_s: float = _key(0.1, _Number(gt=0), "Largest |t_inferred - t_true| counted as a detection, s.")
    bin_widths_s: tuple = _key((0.1, 0.2, 0.5, 1.0), _NumberList(_Number(gt=0), min_len=1),
                               "Bin widths for the correlation of binned spike counts, s.")
    van_rossum_tau_s: float | None = _key(None, _Number(gt=0), "Optional: time constant of the van Rossum "
                                          "distance, s (default: tolerance_s).", example=0.1)


@dataclass(frozen=True)
class ReportConfig:
    """[report]: the HTML report written at the end."""

    enabled: bool = _key(True, _Bool(), "Write the HTML report (report/index.html).", hashed=False)
    n_examples: int = _key(6, _Integer(ge=0, le=100), "Example ROIs shown across the stages.", hashed=False)


@dataclass(frozen=True)
class NwbConfig:
    """[nwb]: optional export to NWB (needs the optional dependency pynwb)."""

    enabled: bool = _key(False, _Bool(), "Also write results.nwb (ΔF/F and inferred activity).", hashed=False)
    session_description: str = _key("calcium imaging session", _Text(), "NWB session description.",
                                    hashed=False)
    session_start: str | None = _key(None, _Text("an ISO 8601 date-time, e.g. 2024-03-01T10:15:00+01:00"),
                                     "Session start (ISO 8601). Omit to use the input file's modification time.",
                                     example="2024-03-01T10:15:00+01:00", hashed=False)
    experimenter: str | None = _key(None, _Text(), "Optional: experimenter.", example="A. Researcher",
                                    hashed=False)
    location: str | None = _key(None, _Text(), "Optional: brain area imaged.", example="V1", hashed=False)


@dataclass(frozen=True)
class ExecutionConfig:
    """[execution]: how the work is spread; never changes the results."""

    backend: str = _key("processes", _Choice("serial", "processes", "dask"),
                        "serial (one process), processes (this machine's cores) or dask (a cluster).",
                        hashed=False)
    workers: int = _key(0, _Integer(ge=0, le=100000), "Worker processes (0 = one per core). With dask and "
                        "no scheduler: workers of the local cluster.", hashed=False)
    chunk_rois: int = _key(0, _Integer(ge=0, le=10 ** 7), "ROIs per work unit (0 = automatic, from the "
                           "number of frames). A finished unit is saved and never redone after an "
                           "interruption. Changing it makes earlier results unusable for resuming.")
    scheduler: str | None = _key(None, _Text("a dask scheduler address such as tcp://10.0.0.5:8786"),
                                 "dask only: address of a running scheduler (the input files must be readable "
                                 "at the same paths on its workers). Omit to start a local cluster on "
                                 "127.0.0.1.", example="tcp://10.0.0.5:8786", hashed=False)


_SECTIONS = {
    "inputs": InputsConfig,
    "output": OutputConfig,
    "extraction": ExtractionConfig,
    "dff": DffConfig,
    "filter": FilterConfig,
    "rhythms": RhythmsConfig,
    "noise": NoiseConfig,
    "inference": InferenceConfig,
    "calibration": CalibrationConfig,
    "quality": QualityConfig,
    "kernel_fit": KernelFitConfig,
    "scoring": ScoringConfig,
    "report": ReportConfig,
    "nwb": NwbConfig,
    "execution": ExecutionConfig,
}


@dataclass(frozen=True)
class RunConfig:
    """A whole-session configuration: one frozen dataclass per section.

    Attributes
    ----------
    inputs, output, extraction, dff, filter, rhythms, noise, inference, calibration, quality, kernel_fit, scoring, report, nwb, execution
        The sections (see each class for its keys).
    source : pathlib.Path or None
        The TOML file the configuration was read from, if any.
    text : str or None
        The TOML text as read (kept in the results for provenance).
    """

    inputs: InputsConfig = field(default_factory=InputsConfig)
    output: OutputConfig = field(default_factory=OutputConfig)
    extraction: ExtractionConfig = field(default_factory=ExtractionConfig)
    dff: DffConfig = field(default_factory=DffConfig)
    filter: FilterConfig = field(default_factory=FilterConfig)
    rhythms: RhythmsConfig = field(default_factory=RhythmsConfig)
    noise: NoiseConfig = field(default_factory=NoiseConfig)
    inference: InferenceConfig = field(default_factory=InferenceConfig)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)
    quality: QualityConfig = field(default_factory=QualityConfig)
    kernel_fit: KernelFitConfig = field(default_factory=KernelFitConfig)
    scoring: ScoringConfig = field(default_factory=ScoringConfig)
    report: ReportConfig = field(default_factory=ReportConfig)
    nwb: NwbConfig = field(default_factory=NwbConfig)
    execution: ExecutionConfig = field(default_factory=ExecutionConfig)
    source: Path | None = field(default=None, compare=False)
    text: str | None = field(default=None, compare=False, repr=False)

    def __post_init__(self):
        _check_consistency(self)

    def to_dict(self) -> dict:
        """Every key of every section (paths as text, tuples as lists), None for keys not set."""
        out = {}
        for name in _SECTIONS:
            section = getattr(self, name)
            out[name] = {f.name: _plain(getattr(section, f.name)) for f in dataclasses.fields(section)}
        return out

    def result_parameters(self) -> dict:
        """The keys that change the results (what the results file's hash covers)."""
        out = {}
        for name in _SECTIONS:
            section = getattr(self, name)
            kept = {f.name: _plain(getattr(section, f.name)) for f in dataclasses.fields(section)
                    if f.metadata.get("hashed", True)}
            if kept:
                out[name] = kept
        return out

    def to_toml(self) -> str:
        """The configuration as TOML text (keys not set are left out)."""
        lines = []
        for name in _SECTIONS:
            section = getattr(self, name)
            lines.append(f"[{name}]")
            for f in dataclasses.fields(section):
                value = getattr(section, f.name)
                if value is not None:
                    lines.append(f"{f.name} = {f.metadata['kind'].to_toml(value)}")
            lines.append("")
        return "\n".join(lines)

    def replace(self, **sections) -> "RunConfig":
        """A copy with some keys changed: ``config.replace(dff={"window_s": 30.0})``.

        Values go through the same checks as a file's (paths relative to the
        configuration file's folder, or to the working folder).
        """
        data = self.to_dict()
        for name, changes in sections.items():
            if name not in _SECTIONS:
                raise ConfigError(f"unknown section [{name}]; sections are: {', '.join(_SECTIONS)}")
            if not isinstance(changes, dict):
                raise ConfigError(f"[{name}] changes must be a dict of key -> value, got {changes!r}")
            data[name].update(changes)
        data = {s: {k: v for k, v in keys.items() if v is not None} for s, keys in data.items()}
        base = self.source.parent if self.source is not None else Path.cwd()
        return config_from_dict(data, base=base, source=self.source, text=None)


def _plain(value):
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, tuple):
        return list(value)
    return value


def _check_consistency(config: RunConfig) -> None:
    inputs = config.inputs
    if inputs.traces is not None and (inputs.movie is not None or inputs.masks is not None):
        raise ConfigError("inputs.traces and inputs.movie/inputs.masks were both given; give traces, "
                          "or movie + masks")
    if inputs.traces is None and inputs.movie is None:
        raise ConfigError("inputs: give inputs.traces (a traces file), or inputs.movie + inputs.masks")
    if (inputs.movie is None) != (inputs.masks is None):
        given, missing = ("movie", "masks") if inputs.masks is None else ("masks", "movie")
        raise ConfigError(f"inputs.{given} was given without inputs.{missing}; a movie needs ROI masks")
    if inputs.traces_dataset is not None and (
            inputs.traces is None or inputs.traces.suffix.lower() not in (".h5", ".hdf5")):
        raise ConfigError(f"inputs.traces_dataset = {inputs.traces_dataset!r} only applies to HDF5 traces "
                          f"(.h5/.hdf5), but inputs.traces = {str(inputs.traces)!r}")
    flt = config.filter
    needed = 2 if flt.kind in ("bandpass", "bandstop") else 1
    if flt.kind != "none" and len(flt.cutoff_hz) != needed:
        what = "[low, high]" if needed == 2 else "one number"
        raise ConfigError(f"filter.cutoff_hz = {list(flt.cutoff_hz)!r} is not allowed: filter.kind = "
                          f"{flt.kind!r} needs {what}")
    if needed == 2 and flt.kind != "none" and not flt.cutoff_hz[0] < flt.cutoff_hz[1]:
        raise ConfigError(f"filter.cutoff_hz = {list(flt.cutoff_hz)!r} is not allowed: low must be below high")
    inf = config.inference
    if (inf.rise_s is None) != (inf.decay_s is None):
        raise ConfigError("inference.rise_s and inference.decay_s must be given together (or neither)")
    if inf.rise_s is not None and inf.rise_s >= inf.decay_s:
        raise ConfigError(f"inference.rise_s = {inf.rise_s!r} is not allowed: it must be shorter than "
                          f"inference.decay_s = {inf.decay_s!r}")
    if inf.indicator is not None and inf.decay_s is not None:
        raise ConfigError("inference.indicator and inference.rise_s/decay_s were both given; give one kernel")
    cal = config.calibration
    if cal.source == "file" and cal.file is None:
        raise ConfigError("calibration.source = \"file\" needs calibration.file (a calibration .json); give it or "
                          "choose another calibration.source")
    if cal.file is not None and cal.source != "file":
        raise ConfigError(f"calibration.file is given but calibration.source = {cal.source!r}; set "
                          f"calibration.source = \"file\" to use it")
    if cal.source == "paired" and inputs.electrical_spikes is None:
        raise ConfigError("calibration.source = \"paired\" needs inputs.electrical_spikes (spike times of some "
                          "ROIs); give them or set calibration.source = \"session\"")
    if cal.source == "indicator" and inf.indicator is None:
        raise ConfigError("calibration.source = \"indicator\" needs inference.indicator")
    if cal.source == "given" and inf.decay_s is None and inf.indicator is None:
        raise ConfigError("calibration.source = \"given\" needs the kernel: inference.rise_s and decay_s (or "
                          "inference.indicator), and optionally inference.spike_size")
    band = config.noise.band_hz
    if band is not None and not band[0] < band[1]:
        raise ConfigError(f"noise.band_hz = {list(band)!r} is not allowed: low must be below high")


# ---------------------------------------------------------------------------
# reading
# ---------------------------------------------------------------------------
def _parse_section(name: str, values, base: Path):
    cls = _SECTIONS[name]
    if not isinstance(values, dict):
        raise ConfigError(f"[{name}] must be a table of key = value lines, got {values!r}")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    unknown = [key for key in values if key not in fields]
    if unknown:
        raise ConfigError(f"unknown key {name}.{unknown[0]}; the keys of [{name}] are: {', '.join(fields)}")
    parsed = {}
    for key, value in values.items():
        kind: _Kind = fields[key].metadata["kind"]
        parsed[key] = kind.parse(value, f"{name}.{key}", base)
    for key, spec in fields.items():  # default paths are relative to the file's folder too
        if key not in parsed and isinstance(spec.metadata["kind"], _Path) and spec.default is not None:
            parsed[key] = spec.metadata["kind"].parse(str(spec.default), f"{name}.{key}", base)
    return cls(**parsed)


def config_from_dict(data: dict, *, base=None, source=None, text=None) -> RunConfig:
    """Build a :class:`RunConfig` from nested dicts ``{section: {key: value}}``.

    Parameters
    ----------
    data : dict
        Sections and keys as in the TOML file; missing ones take defaults.
    base : path-like, optional
        Folder that relative paths are resolved against (default: the
        working folder).
    source, text : optional
        Recorded in the result (the file and the text it was read from).

    Raises
    ------
    ConfigError
        Unknown section or key, bad value, inconsistent inputs.
    """
    base = Path(os.path.abspath(base if base is not None else Path.cwd()))
    if not isinstance(data, dict):
        raise ConfigError(f"a configuration must be a table of sections, got {type(data).__name__}")
    unknown = [name for name in data if name not in _SECTIONS]
    if unknown:
        raise ConfigError(f"unknown section [{unknown[0]}]; the sections are: {', '.join(_SECTIONS)}")
    sections = {name: _parse_section(name, data.get(name, {}), base) for name in _SECTIONS}
    return RunConfig(**sections, source=Path(source) if source is not None else None, text=text)


def load_config(path) -> RunConfig:
    """Read a TOML configuration file.

    Parameters
    ----------
    path : str or path-like
        The ``.toml`` file (see :func:`write_config_template`).

    Returns
    -------
    RunConfig
        Every section, defaults filled in, paths made absolute (relative
        paths are relative to the file's folder).

    Raises
    ------
    ConfigError
        The file is missing or not valid TOML, or a key is unknown, has a
        wrong type or an out-of-range value (the message names
        ``section.key``, the value and what is allowed).

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     name = os.path.join(folder, "run.toml")
    ...     _ = open(name, "w").write('[inputs]\\ntraces = "f.npy"\\nframe_rate = 30.0\\n')
    ...     config = load_config(name)
    ...     config.inputs.traces == Path(folder, "f.npy").resolve(), config.dff.window_s
    (True, 60.0)
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(f"configuration file not found: {path}") from None
    except OSError as exc:
        raise ConfigError(f"cannot read configuration file {path}: {exc}") from None
    try:
        text = raw.decode("utf-8")
        data = tomllib.loads(text)
    except UnicodeDecodeError:
        raise ConfigError(f"{path} is not a UTF-8 text file") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path} is not valid TOML: {exc}") from None
    try:
        return config_from_dict(data, base=Path(os.path.abspath(path)).parent, source=path.resolve(), text=text)
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc}") from None


# ---------------------------------------------------------------------------
# the template
# ---------------------------------------------------------------------------
_HEADER = """\
# Configuration of a whole-session run of `calcium`.
#
#   calcium run {name}          (or: calcium.pipeline.run_pipeline("{name}"))
#
# Every key is listed with its default. Lines starting with '#' are comments;
# keys shown commented out are optional and unset. Relative paths are taken
# relative to the folder of this file. An unknown key or an out-of-range value
# stops the run with a message naming it.
#
# Rerunning the same command after an interruption (crash, Ctrl-C, power
# loss) continues where it stopped. A rerun with changed results-affecting
# keys is refused unless --overwrite is given; [output], [report], [nwb] and
# [execution] (except chunk_rois) can be changed freely.
"""


def _comment_lines(text: str, width: int = 100) -> list[str]:
    words, lines, line = text.split(), [], "#"
    for word in words:
        if len(line) + 1 + len(word) > width:
            lines.append(line)
            line = "#"
        line += " " + word
    lines.append(line)
    return lines


def template_text(name: str = "session.toml") -> str:
    """The text :func:`write_config_template` writes."""
    lines = [_HEADER.format(name=name)]
    for section, cls in _SECTIONS.items():
        lines.append("")
        title = cls.__doc__.split("\n")[0].split(": ", 1)[1].replace("``", "")
        lines.extend(_comment_lines(title[:1].upper() + title[1:]))
        lines.append(f"[{section}]")
        for f in dataclasses.fields(cls):
            kind: _Kind = f.metadata["kind"]
            lines.extend(_comment_lines(f"{f.metadata['doc']} Allowed: {kind.allowed}."))
            if f.default is None:
                lines.append(f"# {f.name} = {kind.to_toml(f.metadata['example'])}")
            else:
                lines.append(f"{f.name} = {kind.to_toml(f.default)}")
    return "\n".join(lines) + "\n"


def write_config_template(path) -> Path:
    """Write a commented TOML configuration listing every key and its default.

    Parameters
    ----------
    path : str or path-like
        The file to create (conventionally ``something.toml``). It must not
        exist yet: an existing file is never overwritten.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    FileExistsError
        If ``path`` exists.
    ConfigError
        If the folder of ``path`` does not exist.

    Notes
    -----
    The template sets ``inputs.traces = "traces.h5"`` as a placeholder; edit
    the [inputs] section before running.
    """
    path = Path(path)
    if path.exists():
        raise FileExistsError(f"{path} already exists; not overwriting it (choose another name or delete it)")
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise ConfigError(f"cannot write {path}: folder {folder} does not exist")
    text = template_text(path.name).replace('# traces = "traces.h5"', 'traces = "traces.h5"', 1)
    # "x" mode: refuse atomically if the file appeared in the meantime.
    with open(path, "x", encoding="utf-8") as handle:
        handle.write(text)
    return path


def parameters_digest(parameters: dict) -> str:
    """SHA-256 (hex) of a JSON-serialisable dict, with sorted keys."""
    return hashlib.sha256(json.dumps(parameters, sort_keys=True, default=str).encode("utf-8")).hexdigest()

