"""Signal stages: baseline and ΔF/F, zero-phase filters and detrending, noise level, shared rhythms."""
from .baseline import DeltaF, RowsDeltaF, delta_f_over_f, delta_f_over_f_rows
from .filters import DetrendResult, FilterResult, ZeroPhaseFilter, design_filter, detrend, zero_phase_filter
from .noise import estimate_noise
from .rhythms import (PhaseLocking, Rhythm, RhythmPhase, RhythmRemoval, Scalogram, SessionRhythms, SessionSpectra,
                      Spectrogram, apparent_frequency, find_rhythms, phase_locking, physical_frequencies,
                      remove_rhythms, rhythm_phase, scalogram, session_spectra, shared_component, spectrogram)

__all__ = [
    "DeltaF",
    "delta_f_over_f",
    "RowsDeltaF",
    "delta_f_over_f_rows",
    "ZeroPhaseFilter",
    "FilterResult",
    "DetrendResult",
    "design_filter",
    "zero_phase_filter",
    "detrend",
    "estimate_noise",
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
    "RhythmPhase",
    "rhythm_phase",
    "PhaseLocking",
    "phase_locking",
]
