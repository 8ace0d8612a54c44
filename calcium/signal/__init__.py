"""Signal stages: baseline and ΔF/F, zero-phase filters and detrending, noise level."""
from .baseline import DeltaF, RowsDeltaF, delta_f_over_f, delta_f_over_f_rows
from .filters import DetrendResult, FilterResult, ZeroPhaseFilter, design_filter, detrend, zero_phase_filter
from .noise import estimate_noise

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
]
