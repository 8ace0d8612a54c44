"""Spike inference: exact non-negative deconvolution of ΔF/F traces and whole-spike counts."""
from .api import SpikeInference, infer_spikes, infer_spikes_many
from .ar import ARDeconvolution, check_ar_coefficients, deconvolve_ar
from .convex import ConvexDeconvolution, deconvolve_convex
from .counts import SpikeUnit, events_to_spikes, quantal_size, refit_on_support, spike_unit
from .estimate import PenaltySearch, estimate_ar_coefficients, estimate_noise_sd, penalty_for_noise

__all__ = [
    "ARDeconvolution",
    "ConvexDeconvolution",
    "PenaltySearch",
    "SpikeInference",
    "SpikeUnit",
    "check_ar_coefficients",
    "deconvolve_ar",
    "deconvolve_convex",
    "estimate_ar_coefficients",
    "estimate_noise_sd",
    "events_to_spikes",
    "infer_spikes",
    "infer_spikes_many",
    "penalty_for_noise",
    "quantal_size",
    "refit_on_support",
    "spike_unit",
]
