"""calcium: from calcium-imaging fluorescence to spikes.

The public API is re-exported here. Names are loaded on first use (PEP 562), so
``import calcium`` and the command line start quickly and the heavier
dependencies (cvxpy, numba, h5py) are imported only by the stages that need them;
the same names are imported explicitly under ``TYPE_CHECKING`` so that type checkers
and IDEs see every export (a test checks that the two lists agree).
"""
from importlib import import_module
from typing import TYPE_CHECKING
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("calcium-counts")  # (the distribution's name; the package is `calcium`)
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"

_EXPORTS = {
    "calcium._checks": ["CalciumInputError", "MissingDataError", "MissingFrames"],
    "calcium.io": ["TraceData", "read_traces", "write_traces", "read_spike_times", "write_spike_table", "Movie",
                   "open_movie", "read_masks", "write_hdf5", "read_hdf5"],
    "calcium.extract": ["Extraction", "extract_traces", "estimate_neuropil_factor", "neuropil_rings"],
    "calcium.signal": ["DeltaF", "delta_f_over_f", "ZeroPhaseFilter", "FilterResult", "DetrendResult",
                       "design_filter", "zero_phase_filter", "detrend", "estimate_noise"],
    "calcium.signal.rhythms": ["SessionSpectra", "session_spectra", "spectrogram", "scalogram", "find_rhythms",
                               "SessionRhythms", "Rhythm", "apparent_frequency", "physical_frequencies",
                               "remove_rhythms", "RhythmRemoval", "shared_component", "rhythm_phase",
                               "phase_locking", "PhaseLocking"],
    "calcium.kernel": ["Kernel", "time_constants_from_half_times"],
    "calcium.indicators": ["INDICATORS", "IndicatorKinetics", "get_indicator", "indicator_names"],
    "calcium.forward": ["predict_fluorescence", "simulate_recording", "SimulatedRecording", "SpikeModel",
                        "BaselineModel", "NoiseModel"],
    "calcium.io.nwb": ["read_nwb_traces"],
    "calcium.infer": ["deconvolve_ar", "ARDeconvolution", "deconvolve_convex", "ConvexDeconvolution",
                      "estimate_ar_coefficients", "penalty_for_noise", "infer_spikes", "infer_spikes_many",
                      "SpikeInference"],
    "calcium.calibrate": ["SessionCalibration", "CalibratedInference", "calibrate_session", "infer_session",
                          "load_calibration"],
    "calcium.fit": ["fit_kernel", "KernelFit", "KernelIntervals", "check_kinetics", "KineticsCheck"],
    "calcium.score": ["score_spikes", "score_many", "SpikeScore", "ScoreTable", "match_spikes",
                      "van_rossum_distance"],
    "calcium.plan": ["plan_detectability", "DetectabilityPlan"],
    "calcium.pipeline": ["run_pipeline", "write_config_template", "load_config", "infer_file", "RunConfig",
                         "RunSummary", "ConfigError", "OutputError", "open_results", "read_results",
                         "write_session_report", "export_nwb"],
    "calcium.report": ["HtmlReport"],
}

if TYPE_CHECKING:  # the same names, imported for type checkers and IDEs (at run time: on first use)
    from ._checks import CalciumInputError, MissingDataError, MissingFrames
    from .io import (TraceData, read_traces, write_traces, read_spike_times, write_spike_table, Movie, open_movie,
                        read_masks, write_hdf5, read_hdf5)
    from .extract import Extraction, extract_traces, estimate_neuropil_factor, neuropil_rings
    from .signal import (DeltaF, delta_f_over_f, ZeroPhaseFilter, FilterResult, DetrendResult, design_filter,
                            zero_phase_filter, detrend, estimate_noise)
    from .signal.rhythms import (SessionSpectra, session_spectra, spectrogram, scalogram, find_rhythms,
                                 SessionRhythms, Rhythm, apparent_frequency, physical_frequencies, remove_rhythms,
                                 RhythmRemoval, shared_component, rhythm_phase, phase_locking, PhaseLocking)
    from .kernel import Kernel, time_constants_from_half_times
    from .indicators import INDICATORS, IndicatorKinetics, get_indicator, indicator_names
    from .forward import (predict_fluorescence, simulate_recording, SimulatedRecording, SpikeModel, BaselineModel,
                          NoiseModel)
    from .io.nwb import read_nwb_traces
    from .infer import (deconvolve_ar, ARDeconvolution, deconvolve_convex, ConvexDeconvolution,
                           estimate_ar_coefficients, penalty_for_noise, infer_spikes, infer_spikes_many,
                           SpikeInference)
    from .calibrate import SessionCalibration, CalibratedInference, calibrate_session, infer_session, load_calibration
    from .fit import fit_kernel, KernelFit, KernelIntervals, check_kinetics, KineticsCheck
    from .score import score_spikes, score_many, SpikeScore, ScoreTable, match_spikes, van_rossum_distance
    from .plan import plan_detectability, DetectabilityPlan
    from .pipeline import (run_pipeline, write_config_template, load_config, infer_file, RunConfig, RunSummary,
                              ConfigError, OutputError, open_results, read_results, write_session_report,
                              export_nwb)
    from .report import HtmlReport

_WHERE = {name: module for module, names in _EXPORTS.items() for name in names}

__all__ = ["__version__", *_WHERE]


def __getattr__(name):
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module 'calcium' has no attribute {name!r}")
    value = getattr(import_module(module), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(_WHERE))
