"""Figures (matplotlib, Agg) and a static HTML report.

:mod:`calcium.report.figures` draws one picture per function from plain
arrays and returns a :class:`matplotlib.figure.Figure`; :func:`save_figure`
writes it as a PNG. :class:`HtmlReport` gathers sections, text, figures and
sortable tables into a self-contained folder (``index.html`` + ``figures/``).
:mod:`calcium.report.session` lays out the session report, one function per
section, from data it is handed (``calcium.pipeline`` reads the results file).
"""
from .figures import (
    PALETTE,
    calibration_figure,
    distribution_figure,
    figure_png_bytes,
    filter_figure,
    filter_response_figure,
    kernel_figure,
    kernel_evidence_figure,
    kernel_fit_figure,
    noise_figure,
    plan_figure,
    detection_figure,
    planner_figure,
    prediction_figure,
    raster_figure,
    rhythm_removal_figure,
    rhythm_spectrum_figure,
    save_figure,
    score_figure,
    stages_figure,
    time_frequency_figure,
    zoom_figure,
)
from .html import HtmlReport

__all__ = [
    "PALETTE",
    "HtmlReport",
    "calibration_figure",
    "distribution_figure",
    "figure_png_bytes",
    "filter_figure",
    "filter_response_figure",
    "kernel_figure",
    "kernel_evidence_figure",
    "kernel_fit_figure",
    "noise_figure",
    "plan_figure",
    "detection_figure",
    "planner_figure",
    "prediction_figure",
    "raster_figure",
    "rhythm_removal_figure",
    "rhythm_spectrum_figure",
    "save_figure",
    "score_figure",
    "stages_figure",
    "time_frequency_figure",
    "zoom_figure",
]
