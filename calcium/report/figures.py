"""Figures for people: one function per picture, each returning a matplotlib Figure.

Every function takes plain numpy arrays and numbers (results of the science
modules are unpacked by the caller), keyword-only options after the data,
labels its axes with units and gives the figure a title. Figures are built
with :class:`matplotlib.figure.Figure` on an Agg canvas: nothing here touches
the pyplot state machine, opens a window or calls ``show``, so the functions
are safe in scripts, workers and tests. :func:`save_figure` writes a PNG
atomically and closes the figure.

The look is shared by all figures: white background, light grid, no top or
right frame, and one palette (:data:`PALETTE`) chosen so that every pair of
colours stays distinct under simulated protanopia, deuteranopia and
tritanopia (checked in ``tests/test_report.py`` with the simulation of
Machado, Oliveira & Fernandes, 2009). Ordered quantities (counts, noise
levels) use the ``cividis`` colour map, which was built to read the same with
and without red-green colour-vision deficiency (Nuñez, Anderton & Renslow,
2018).

References
----------
Machado, G. M., Oliveira, M. M. & Fernandes, L. A. F. (2009). A
physiologically-based model for simulation of color vision deficiency.
IEEE Transactions on Visualization and Computer Graphics 15(6), 1291-1298.

Nuñez, J. R., Anderton, C. R. & Renslow, R. S. (2018). Optimizing colormaps
with consideration for color vision deficiency to enable accurate
interpretation of scientific data. PLoS ONE 13(7), e0199239.
"""
from __future__ import annotations

import io
import math
import numbers
import sys
import warnings
from pathlib import Path
from types import MappingProxyType

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter

from .._checks import as_spike_times, check_frame_rate, check_int, check_positive

__all__ = [
    "PALETTE",
    "stages_figure",
    "zoom_figure",
    "noise_figure",
    "distribution_figure",
    "filter_response_figure",
    "filter_figure",
    "prediction_figure",
    "kernel_figure",
    "kernel_fit_figure",
    "kernel_evidence_figure",
    "calibration_figure",
    "raster_figure",
    "score_figure",
    "detection_figure",
    "planner_figure",
    "plan_figure",
    "rhythm_spectrum_figure",
    "time_frequency_figure",
    "rhythm_removal_figure",
    "save_figure",
    "figure_png_bytes",
]

# ---------------------------------------------------------------------------
# the look
# ---------------------------------------------------------------------------
#: Named colours of every figure (hex sRGB). ``ink``, ``orange``, ``blue`` and
#: ``plum`` draw lines and markers; ``sand`` and ``grey`` shade areas and draw
#: secondary lines. See the module notes for how they were checked.
PALETTE = MappingProxyType({
    "ink": "#1b2a49",     # recorded data, main traces
    "orange": "#d9730d",  # baselines, predictions, fitted models
    "blue": "#3a8bd3",    # filtered traces, free-form estimates
    "plum": "#9c2f6b",    # inferred spikes, denoised fits, references
    "sand": "#f0cf4c",    # published ranges (as a light fill)
    "grey": "#9a9a9a",    # missing frames, residuals, guide lines
})
_TEXT = "#26303f"
_FRAME = "#6b7380"
_GRID = "#e3e6eb"
_SEQUENTIAL = "cividis"
_TITLE_SIZE = 12
_LABEL_SIZE = 10
_TICK_SIZE = 8.5
_LEGEND_SIZE = 8
_WIDTH_IN = 8.0


def _figure(height_in: float, *, width_in: float = _WIDTH_IN) -> Figure:
    """A white Figure on its own Agg canvas, laid out by matplotlib's constrained layout."""
    # whole quarter inches: at the usual dpi values (multiples of 4) the image is a whole number of pixels
    height_in = max(1.0, round(height_in * 4) / 4)
    fig = Figure(figsize=(width_in, height_in), facecolor="white", layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _style(ax, *, grid_axis: str = "both") -> None:
    """Apply the shared look to one Axes."""
    ax.set_facecolor("white")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(_FRAME)
        ax.spines[side].set_linewidth(0.8)
    ax.tick_params(colors=_FRAME, labelcolor=_TEXT, labelsize=_TICK_SIZE, width=0.8, length=3)
    ax.xaxis.label.set_color(_TEXT)
    ax.yaxis.label.set_color(_TEXT)
    ax.xaxis.label.set_size(_LABEL_SIZE)
    ax.yaxis.label.set_size(_LABEL_SIZE)
    if grid_axis:
        ax.grid(True, axis=grid_axis, color=_GRID, linewidth=0.7)
    ax.set_axisbelow(True)


def _title(fig: Figure, text: str) -> None:
    fig.suptitle(text, fontsize=_TITLE_SIZE, color=_TEXT, fontweight="bold", x=0.01, ha="left", wrap=True)


def _panel_title(ax, text: str) -> None:
    ax.set_title(text, fontsize=_LABEL_SIZE, color=_TEXT, loc="left")


def _legend(ax, **kw) -> None:
    handles, _ = ax.get_legend_handles_labels()
    if handles:
        ax.legend(fontsize=_LEGEND_SIZE, labelcolor=_TEXT, frameon=True, facecolor="white",
                  edgecolor="none", framealpha=0.85, **{"loc": "upper right", **kw})


def _levels_colours(n: int) -> list:
    """``n`` colours of an ordered series from the sequential map (its pale yellow end left out)."""
    cmap = colormaps[_SEQUENTIAL]
    if n == 1:
        return [cmap(0.0)]
    return [cmap(0.8 * i / (n - 1)) for i in range(n)]


# ---------------------------------------------------------------------------
# argument checks (each names the argument it rejects)
# ---------------------------------------------------------------------------
def _vector(values, name: str, *, length: int | None = None, finite: bool = False,
            allow_empty: bool = True) -> np.ndarray:
    """``values`` as a 1-D float64 array (NaN allowed unless ``finite``)."""
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name} must be a 1-D numeric array: {exc}") from None
    if arr.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array, got shape {arr.shape}")
    if length is not None and arr.size != length:
        raise ValueError(f"{name} must have {length} value(s) (one per frame or point), got {arr.size}")
    if not allow_empty and arr.size == 0:
        raise ValueError(f"{name} must not be empty")
    if finite and not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must hold finite numbers only; found NaN or inf")
    return arr


def _spike_times(times, name: str) -> np.ndarray:
    """Spike times in seconds as a sorted 1-D array (a repeated time = several spikes)."""
    return as_spike_times(times, name, warn_unsorted=False)


def _trace(values, name: str, n_frames: int | None = None) -> np.ndarray:
    """One trace (frames,), NaN allowed, at least one frame, ``n_frames`` long if given."""
    return _vector(values, name, length=n_frames, allow_empty=False)


def _missing_mask(missing, raw: np.ndarray) -> np.ndarray:
    """Boolean mask of missing frames from ``missing`` (mask or object with ``.mask``) or from NaN in ``raw``."""
    if missing is None:
        return ~np.isfinite(raw)
    mask = getattr(missing, "mask", missing)
    mask = np.asarray(mask)
    if mask.dtype != bool:
        raise ValueError(f"missing must be a boolean mask of shape ({raw.size},), got dtype {mask.dtype}")
    if mask.shape != raw.shape:
        raise ValueError(f"missing must have shape ({raw.size},) like raw, got {mask.shape}")
    return mask


def _label(text, name: str) -> str:
    if not isinstance(text, str):
        raise ValueError(f"{name} must be a string, got {text!r}")
    return text


# ---------------------------------------------------------------------------
# drawing helpers
# ---------------------------------------------------------------------------
def _runs(mask: np.ndarray) -> np.ndarray:
    """(start, stop) index pairs of the runs of True in a 1-D boolean mask (stop exclusive)."""
    edges = np.diff(np.concatenate([[0], mask.astype(np.int8), [0]]))
    return np.column_stack([np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)])


def _shade_missing(ax, frame_rate: float, mask: np.ndarray, *, label: bool) -> None:
    """Grey bands over missing frames; frame k covers (k - 1/2, k + 1/2) / frame_rate.

    A band narrower than 1/400 of the recording is widened to that (about two
    pixels) around its centre so that a lone missing frame stays visible.
    """
    if not mask.any():
        return
    min_width = mask.size / frame_rate / 400.0
    boxes = []
    for a, b in _runs(mask):
        left, right = (a - 0.5) / frame_rate, (b - 0.5) / frame_rate
        if right - left < min_width:
            middle = 0.5 * (left + right)
            left, right = middle - 0.5 * min_width, middle + 0.5 * min_width
        boxes.append([(left, 0.0), (left, 1.0), (right, 1.0), (right, 0.0)])
    bands = PolyCollection(boxes, transform=ax.get_xaxis_transform(), facecolors=PALETTE["grey"],
                           alpha=0.3, linewidths=0,
                           label=f"missing frames ({int(mask.sum())})" if label else None)
    ax.add_collection(bands, autolim=False)


def _spike_counts(times: np.ndarray):
    """Distinct times and how many spikes fall on each."""
    if times.size == 0:
        return times, np.zeros(0, dtype=int)
    return np.unique(times, return_counts=True)


def _stems(ax, times: np.ndarray, *, colour: str, label: str) -> None:
    """Vertical stems at the spike times, as tall as the number of spikes there."""
    where, counts = _spike_counts(times)
    if where.size:
        ax.vlines(where, 0, counts, color=colour, linewidth=1.0, label=label)
        ax.plot(where, counts, "o", color=colour, markersize=2.5)
        ax.set_ylim(0, max(1.0, float(counts.max())) * 1.15)
    else:
        ax.set_ylim(0, 1)
        ax.text(0.5, 0.5, "no spikes", transform=ax.transAxes, ha="center", va="center",
                color=_FRAME, fontsize=_LEGEND_SIZE)
    ax.yaxis.get_major_locator().set_params(integer=True)


def _ticks(ax, times: np.ndarray, *, colour: str) -> None:
    """One short vertical tick per spike on a single row."""
    ax.eventplot([times], colors=[colour], lineoffsets=0.5, linelengths=0.8, linewidths=0.9)
    ax.set_ylim(0, 1)
    ax.set_yticks([])
    if times.size == 0:
        ax.text(0.5, 0.5, "no spikes", transform=ax.transAxes, ha="center", va="center",
                color=_FRAME, fontsize=_LEGEND_SIZE)


def _prefix(roi_label: str, text: str) -> str:
    return f"{roi_label}: {text}" if roi_label else text


# ---------------------------------------------------------------------------
# figures
# ---------------------------------------------------------------------------
def stages_figure(frame_rate, raw, *, f0=None, dff=None, filtered=None, denoised=None,
                  spike_times=None, true_spike_times=None, missing=None, roi_label="") -> Figure:
    """One ROI through the stages: raw F, ΔF/F and its fits, inferred and recorded spikes.

    Parameters
    ----------
    frame_rate : float
        Frames per second (Hz); frame k is drawn at k / frame_rate s.
    raw : array_like, shape (frames,)
        Raw fluorescence F (arbitrary units). NaN/inf mark missing frames.
    f0 : array_like, shape (frames,), optional
        Baseline F0, drawn over ``raw``.
    dff, filtered, denoised : array_like, shape (frames,), optional
        ΔF/F, its filtered version and the denoised (model) fit, drawn together
        on the second row (left out when all three are None).
    spike_times : array_like, optional
        Inferred spike times (s); a repeated time means several spikes and is
        drawn as one stem as tall as the count. Adds a row.
    true_spike_times : array_like, optional
        Electrically recorded spike times (s), drawn as ticks on their own row.
    missing : array_like of bool, shape (frames,), or object with ``.mask``, optional
        Missing frames, shaded grey on the trace rows. Default: the frames
        where ``raw`` is NaN or inf.
    roi_label : str
        Name of the ROI, put in the title.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import numpy as np
    >>> fig = stages_figure(30.0, 100 + np.zeros(90), spike_times=[0.5, 0.5, 2.0])
    >>> [ax.get_ylabel() for ax in fig.axes]
    ['F (a.u.)', 'spikes']
    """
    frame_rate = check_frame_rate(frame_rate)
    roi_label = _label(roi_label, "roi_label")
    raw = _trace(raw, "raw")
    n = raw.size
    time_s = np.arange(n) / frame_rate
    f0 = None if f0 is None else _trace(f0, "f0", n)
    lines = {key: _trace(value, key, n) for key, value in
             (("dff", dff), ("filtered", filtered), ("denoised", denoised)) if value is not None}
    inferred = None if spike_times is None else _spike_times(spike_times, "spike_times")
    recorded = None if true_spike_times is None else _spike_times(true_spike_times, "true_spike_times")
    mask = _missing_mask(missing, raw)

    rows = [("raw", 2.0)]
    if lines:
        rows.append(("dff", 2.4))
    if inferred is not None:
        rows.append(("spikes", 1.1))
    if recorded is not None:
        rows.append(("recorded", 0.55))
    fig = _figure(1.0 + 1.25 * sum(h for _, h in rows))
    axes = fig.subplots(len(rows), 1, sharex=True, squeeze=False,
                        gridspec_kw={"height_ratios": [h for _, h in rows]})[:, 0]
    title = "stages of analysis"
    if mask.any():
        title += f" ({int(mask.sum())} of {n} frames missing)"
    _title(fig, _prefix(roi_label, title))

    for ax, (kind, _) in zip(axes, rows):
        _style(ax)
        if kind == "raw":
            ax.plot(time_s, raw, color=PALETTE["ink"], linewidth=0.8, label="raw F")
            if f0 is not None:
                ax.plot(time_s, f0, color=PALETTE["orange"], linewidth=1.6, label="baseline F0")
            _shade_missing(ax, frame_rate, mask, label=True)
            ax.set_ylabel("F (a.u.)")
            _legend(ax, ncol=3)
        elif kind == "dff":
            style = {"dff": (PALETTE["ink"], 0.7, "ΔF/F"),
                     "filtered": (PALETTE["blue"], 1.2, "filtered"),
                     "denoised": (PALETTE["plum"], 1.4, "denoised fit")}
            for key, values in lines.items():
                colour, width, label = style[key]
                ax.plot(time_s, values, color=colour, linewidth=width, label=label)
            _shade_missing(ax, frame_rate, mask, label=False)
            ax.set_ylabel("ΔF/F")
            _legend(ax, ncol=3)
        elif kind == "spikes":
            _stems(ax, inferred, colour=PALETTE["plum"], label=None)
            ax.set_ylabel("spikes")
            _panel_title(ax, f"inferred spikes: {inferred.size} in total, "
                             f"stem height = spikes at that time")
        else:
            _ticks(ax, recorded, colour=PALETTE["ink"])
            ax.set_ylabel("recorded", rotation=0, ha="right", va="center")
            _panel_title(ax, f"electrically recorded spikes: {recorded.size}")
    axes[-1].set_xlabel("time (s)")
    axes[-1].set_xlim(time_s[0] - 0.5 / frame_rate, time_s[-1] + 0.5 / frame_rate)
    return fig


def zoom_figure(frame_rate, dff, *, denoised=None, spike_times=None, true_spike_times=None, start_s=0.0,
                duration_s=20.0, roi_label="") -> Figure:
    """A stretch of one ROI close up: ΔF/F with the model fit, the inferred spikes with their counts and the
    electrically recorded spikes.

    Parameters
    ----------
    frame_rate : float
        Frames per second (Hz); frame k is drawn at k / frame_rate s.
    dff : array_like, shape (frames,)
        ΔF/F of the whole recording (NaN at missing frames).
    denoised : array_like, shape (frames,), optional
        The model fit (denoised ΔF/F), drawn over ``dff``.
    spike_times : array_like, optional
        Inferred spike times (s) of the whole recording; a repeated time means
        several spikes: one stem as tall as their number, the number written
        above it.
    true_spike_times : array_like, optional
        Electrically recorded spike times (s) on the imaging clock, drawn as
        ticks on their own row.
    start_s, duration_s : float
        The stretch drawn (s).
    roi_label : str
        Name of the ROI, put in the title.

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> import numpy as np
    >>> fig = zoom_figure(30.0, np.zeros(900), spike_times=[2.0, 2.0, 5.0], start_s=1.0, duration_s=10.0)
    >>> fig.axes[1].get_title(loc="left")
    'inferred spikes: 3 in this window (2 times), stem height and number = spikes at that time'
    """
    frame_rate = check_frame_rate(frame_rate)
    dff = _trace(dff, "dff")
    fit = None if denoised is None else _trace(denoised, "denoised", dff.size)
    inferred = None if spike_times is None else _spike_times(spike_times, "spike_times")
    recorded = None if true_spike_times is None else _spike_times(true_spike_times, "true_spike_times")
    duration_s = check_positive(duration_s, "duration_s")
    total_s = dff.size / frame_rate
    if not (isinstance(start_s, numbers.Real) and 0.0 <= start_s < total_s):
        raise ValueError(f"start_s must be a time within the recording (0 to {total_s:g} s), got {start_s!r}")
    a = int(math.floor(start_s * frame_rate))
    b = min(dff.size, a + max(2, int(round(duration_s * frame_rate))))
    time_s = np.arange(a, b) / frame_rate
    low, high = (a - 0.5) / frame_rate, (b - 0.5) / frame_rate
    rows = [("dff", 2.6)]
    if inferred is not None:
        rows.append(("spikes", 1.2))
    if recorded is not None:
        rows.append(("recorded", 0.55))
    fig = _figure(1.0 + 1.25 * sum(h for _, h in rows))
    axes = fig.subplots(len(rows), 1, sharex=True, squeeze=False,
                        gridspec_kw={"height_ratios": [h for _, h in rows]})[:, 0]
    _title(fig, _prefix(_label(roi_label, "roi_label"), f"close-up, {time_s[0]:.3g} to {high:.3g} s"))
    for ax, (kind, _) in zip(axes, rows):
        _style(ax)
        if kind == "dff":
            ax.plot(time_s, dff[a:b], color=PALETTE["ink"], linewidth=0.9, marker="o", markersize=1.6,
                    label="ΔF/F (one dot per frame)")
            if fit is not None:
                ax.plot(time_s, fit[a:b], color=PALETTE["plum"], linewidth=1.6, label="model fit")
            _shade_missing(ax, frame_rate, ~np.isfinite(dff[a:b]), label=False)
            ax.set_ylabel("ΔF/F")
            _legend(ax, ncol=2, loc="lower right", bbox_to_anchor=(1.0, 1.0))  # above the data, never over it
        elif kind == "spikes":
            inside = inferred[(inferred >= low) & (inferred < high)]
            where, counts = _spike_counts(inside)
            _stems(ax, inside, colour=PALETTE["plum"], label=None)
            for t, k in zip(where, counts):
                ax.annotate(str(int(k)), (t, k), xytext=(0, 2), textcoords="offset points", ha="center",
                            va="bottom", fontsize=_LEGEND_SIZE, color=_TEXT)
            ax.set_ylim(0, max(1.0, float(counts.max()) if counts.size else 1.0) * 1.45)
            ax.set_ylabel("spikes")
            _panel_title(ax, f"inferred spikes: {inside.size} in this window ({where.size} times), stem height "
                             f"and number = spikes at that time")
        else:
            inside = recorded[(recorded >= low) & (recorded < high)]
            _style(ax, grid_axis="")
            _ticks(ax, inside, colour=PALETTE["ink"])
            ax.set_ylabel("recorded", rotation=0, ha="right", va="center")
            _panel_title(ax, f"electrically recorded spikes: {inside.size} in this window")
    axes[-1].set_xlabel("time (s)")
    axes[-1].set_xlim(low, high)
    return fig


def noise_figure(noise_sd, *, labels=None, unit="ΔF/F", max_bars=40) -> Figure:
    """Noise level of every ROI: bars for a few ROIs, a strip of points for many.

    Parameters
    ----------
    noise_sd : array_like, shape (rois,)
        Noise standard deviation per ROI. NaN marks a ROI without an estimate
        (counted in the title, not drawn).
    labels : sequence of str, optional
        One name per ROI (default: the ROI index). Bars carry them under the
        axis; the strip names its three noisiest ROIs.
    unit : str
        Unit of ``noise_sd`` for the axis label.
    max_bars : int
        Up to this many ROIs are drawn as bars.

    Returns
    -------
    matplotlib.figure.Figure
    """
    noise = _vector(noise_sd, "noise_sd", allow_empty=False)
    n = noise.size
    names = _names(labels, n, "labels")
    unit = _label(unit, "unit")
    max_bars = check_int(max_bars, "max_bars", minimum=1)
    ok = np.isfinite(noise)
    fig = _figure(3.6 if n <= max_bars else 3.2)
    ax = fig.add_subplot()
    _style(ax, grid_axis="y")
    title = f"noise per ROI ({n} ROIs"
    title += f", {int((~ok).sum())} without an estimate)" if (~ok).any() else ")"
    _title(fig, title)
    index = np.arange(n)
    if ok.any():
        median = float(np.median(noise[ok]))
        ax.axhline(median, color=PALETTE["orange"], linewidth=1.2, linestyle="--",
                   label=f"median {median:.3g} {unit}")
    if n <= max_bars:
        ax.bar(index[ok], noise[ok], color=PALETTE["blue"], width=0.7)
        ax.set_xticks(index, names, rotation=90 if n > 12 else 0, fontsize=_TICK_SIZE)
        ax.set_xlim(-0.7, n - 0.3)
    else:
        ax.plot(index[ok], noise[ok], "o", color=PALETTE["blue"], markersize=2.5, alpha=0.8,
                markeredgewidth=0)
        worst = index[ok][np.argsort(noise[ok])[::-1][:3]]
        for i in worst:
            ax.annotate(names[i], (i, noise[i]), xytext=(3, 3), textcoords="offset points",
                        fontsize=_LEGEND_SIZE, color=_TEXT)
        ax.set_xlim(-0.01 * n, 1.01 * n)
    ax.set_xlabel("ROI")
    ax.set_ylabel(f"noise SD ({unit})" if unit else "noise SD")
    ax.set_ylim(bottom=0)
    _legend(ax)
    return fig


def _names(labels, n: int, name: str) -> list:
    if labels is None:
        return [str(i) for i in range(n)]
    if isinstance(labels, str):
        raise ValueError(f"{name} must be a sequence of {n} string(s), got a single string")
    names = [str(label) for label in labels]
    if len(names) != n:
        raise ValueError(f"{name} must have {n} entries (one per ROI), got {len(names)}")
    return names


def distribution_figure(values, *, name, unit, reference_range=None, reference_label="published range",
                        bins="auto", max_points=12) -> Figure:
    """One quantity over ROIs: each value as a point when there are few, else a histogram; with an optional
    shaded reference range.

    Parameters
    ----------
    values : array_like, shape (n,)
        The values (one per ROI, fit, ...). NaN/inf are left out and counted in
        the title.
    name : str
        What the values are ("half-decay time").
    unit : str
        Their unit ("s"); empty for a pure number.
    reference_range : (low, high), optional
        A published range, shaded; the legend says how many values fall outside.
    reference_label : str
        Legend text for the shaded range.
    bins : int or str
        Passed to :func:`numpy.histogram_bin_edges`; at most 80 bins are drawn.
    max_points : int
        Up to this many finite values, each is drawn as a point (a histogram of
        a handful of values shows bins, not values).

    Returns
    -------
    matplotlib.figure.Figure

    Examples
    --------
    >>> fig = distribution_figure([0.21, 0.25, 0.4], name="half-decay time", unit="s")
    >>> fig.axes[0].get_ylabel(), len(fig.axes[0].patches)
    ('', 0)
    """
    name = _label(name, "name")
    max_points = check_int(max_points, "max_points", minimum=0)
    unit = _label(unit, "unit")
    reference_label = _label(reference_label, "reference_label")
    arr = _vector(values, "values")
    ok = np.isfinite(arr)
    data = arr[ok]
    if reference_range is not None:
        low, high = _vector(reference_range, "reference_range", length=2, finite=True)
        if low > high:
            raise ValueError(f"reference_range must be (low, high) with low <= high, got {tuple(reference_range)}")
    fig = _figure(2.4 if 0 < data.size <= max_points else 3.4)
    ax = fig.add_subplot()
    _style(ax, grid_axis="y")
    title = f"{name}: {data.size} value(s)"
    if (~ok).any():
        title += f", {int((~ok).sum())} not available"
    _title(fig, title)
    if reference_range is not None:
        outside = int(np.sum((data < low) | (data > high)))
        ax.axvspan(low, high, color=PALETTE["sand"], alpha=0.45, linewidth=0,
                   label=f"{reference_label} ({outside} of {data.size} outside)")
    few = 0 < data.size <= max_points
    if data.size:
        if few:
            # one row per value, in increasing order, so equal values stay apart
            order = np.sort(data)
            ax.plot(order, np.arange(order.size), "o", color=PALETTE["blue"], markersize=7,
                    markeredgecolor="white", markeredgewidth=0.8, label=f"{data.size} value(s)")
            ax.set_ylim(-0.8, order.size - 0.2)
            ax.set_yticks([])
            # a span of at least ±15 % around the median, so that a small spread is not drawn as a large one
            middle, half = float(np.median(order)), 0.15 * abs(float(np.median(order)))
            low_x, high_x = min(order[0], middle - half), max(order[-1], middle + half)
            if reference_range is not None:
                low_x, high_x = min(low_x, low), max(high_x, high)
            if high_x > low_x:
                pad = 0.05 * (high_x - low_x)
                ax.set_xlim(low_x - pad, high_x + pad)
        else:
            if isinstance(bins, numbers.Integral):
                bins = check_int(bins, "bins", minimum=1)
            edges = np.histogram_bin_edges(data, bins=bins)
            if edges.size > 81:
                edges = np.linspace(edges[0], edges[-1], 81)
            ax.hist(data, bins=edges, color=PALETTE["blue"], edgecolor="white", linewidth=0.5)
        median = float(np.median(data))
        ax.axvline(median, color=PALETTE["ink"], linestyle="--", linewidth=1.2,
                   label=f"median {median:.3g} {unit}".rstrip())
    else:
        ax.text(0.5, 0.5, "no finite values", transform=ax.transAxes, ha="center", va="center",
                color=_FRAME)
    ax.set_xlabel(f"{name} ({unit})" if unit else name)
    if not few:
        ax.set_ylabel("count")
        ax.yaxis.get_major_locator().set_params(integer=True)
    _legend(ax, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=3)  # above the values, never over them
    return fig


def _gain_db(gain, name: str, n: int, floor_db: float) -> np.ndarray:
    """Amplitude gain (linear, or complex response) -> 20 log10 |gain| in dB, floored."""
    arr = np.asarray(gain)
    if np.iscomplexobj(arr):
        arr = np.abs(arr)
    arr = _vector(arr, name, length=n, finite=True)
    if np.any(arr < 0):
        raise ValueError(f"{name} must be an amplitude gain >= 0 (or a complex response)")
    with np.errstate(divide="ignore"):
        db = 20.0 * np.log10(arr)
    return np.maximum(db, floor_db)


def _end_at_floor(gain_db: np.ndarray, floor_db: float) -> np.ndarray:
    """``gain_db`` with the stretches at the floor left out (NaN), except their first point, so that a line
    reaches the bottom of the axis where it crosses the floor instead of running flat along it."""
    out = gain_db.copy()
    at_floor = gain_db <= floor_db
    first = at_floor & ~np.concatenate([[False], at_floor[:-1]])
    out[at_floor & ~first] = np.nan
    return out


def filter_response_figure(freq_hz, single_pass_gain, zero_phase_gain, *, half_power_hz=None,
                           frame_rate=None, floor_db=-80.0, log_frequency=False,
                           title="filter gain, one pass and forward-backward (zero phase)") -> Figure:
    """Gain of a filter in dB against frequency, one pass and forward-backward.

    Parameters
    ----------
    freq_hz : array_like, shape (n,)
        Frequencies (Hz).
    single_pass_gain, zero_phase_gain : array_like, shape (n,)
        Amplitude gain |H(f)| of one pass of the filter and of the zero-phase
        (forward-backward) filter, as linear ratios (a complex frequency
        response is turned into its modulus). Drawn as 20·log10(gain) dB.
    half_power_hz : float or sequence of float, optional
        -3 dB frequencies of the zero-phase filter, marked by vertical lines.
    frame_rate : float, optional
        Frame rate (Hz): the Nyquist frequency frame_rate / 2 ends the axis.
    floor_db : float
        Gains below this many dB are drawn at it (a stop band can reach -inf).
    log_frequency : bool
        Logarithmic frequency axis (zero frequencies are then not drawn).
    title : str
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Running a filter forward and then backward squares its amplitude gain, so
    the zero-phase filter loses 6 dB where one pass loses 3 dB; both levels
    are drawn as horizontal guides.
    """
    freq = _vector(freq_hz, "freq_hz", finite=True, allow_empty=False)
    if isinstance(floor_db, bool) or not isinstance(floor_db, numbers.Real) or not np.isfinite(floor_db) \
            or floor_db >= -6:
        raise ValueError(f"floor_db must be a finite number below -6 dB, got {floor_db!r}")
    floor_db = float(floor_db)
    single = _gain_db(single_pass_gain, "single_pass_gain", freq.size, floor_db)
    zero = _gain_db(zero_phase_gain, "zero_phase_gain", freq.size, floor_db)
    corners = [] if half_power_hz is None else list(_vector(np.atleast_1d(half_power_hz), "half_power_hz",
                                                            finite=True))
    nyquist = None if frame_rate is None else check_frame_rate(frame_rate) / 2.0
    fig = _figure(3.6)
    ax = fig.add_subplot()
    _style(ax)
    _title(fig, _label(title, "title"))
    keep = freq > 0 if log_frequency else np.ones(freq.size, bool)
    clipped = bool(np.any(single <= floor_db) or np.any(zero <= floor_db))
    ax.plot(freq[keep], _end_at_floor(single, floor_db)[keep], color=PALETTE["blue"], linewidth=1.4,
            linestyle="--", label="one pass")
    ax.plot(freq[keep], _end_at_floor(zero, floor_db)[keep], color=PALETTE["ink"], linewidth=1.8,
            label="zero phase (forward-backward)")
    ax.axhline(-3.0, color=PALETTE["orange"], linewidth=1.0, linestyle=":", label="-3 dB (half power)")
    ax.axhline(-6.0, color=PALETTE["plum"], linewidth=1.0, linestyle=":", label="-6 dB")
    for k, corner in enumerate(corners):
        label = "zero-phase -3 dB at " + ", ".join(f"{c:.3g}" for c in corners) + " Hz" if k == 0 else None
        ax.axvline(corner, color=PALETTE["orange"], linewidth=1.0, label=label)
    if log_frequency:
        ax.set_xscale("log")
    high = nyquist if nyquist is not None else float(freq.max())
    low = float(freq[keep].min()) if log_frequency else 0.0
    if high > low:
        ax.set_xlim(low, high)
    lowest = float(min(single.min(), zero.min()))
    ax.set_ylim(max(floor_db, lowest - 3.0), max(3.0, float(max(single.max(), zero.max())) + 1.0))
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("gain (dB)")
    # above the curves, never over them; a note (a handle drawn nowhere) says where the lines stop
    handles, labels = ax.get_legend_handles_labels()
    if clipped:
        handles.append(Line2D([], [], linestyle="none"))
        labels.append(f"below {floor_db:g} dB: not drawn")
    ax.legend(handles, labels, fontsize=_LEGEND_SIZE, labelcolor=_TEXT, frameon=True, facecolor="white",
              edgecolor="none", framealpha=0.85, loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=3)
    return fig


def filter_figure(filt, *, n_points=1024, floor_db=-80.0, log_frequency=False) -> Figure:
    """Gain of a designed zero-phase filter (from :func:`calcium.signal.design_filter`).

    Reads only the filter's documented ``frequency_response(n_points)``,
    ``half_power_hz``, ``frame_rate``, ``kind`` and ``order`` and draws them
    with :func:`filter_response_figure`.

    Parameters
    ----------
    filt : ZeroPhaseFilter
    n_points : int
        Frequencies from 0 Hz to the Nyquist frequency.
    floor_db, log_frequency
        As in :func:`filter_response_figure`.

    Returns
    -------
    matplotlib.figure.Figure
    """
    n_points = check_int(n_points, "n_points", minimum=2)
    if not callable(getattr(filt, "frequency_response", None)):
        raise ValueError(f"filt must be a designed filter with a frequency_response method, "
                         f"got {type(filt).__name__}")
    freq, single, zero = filt.frequency_response(n_points)
    return filter_response_figure(freq, single, zero, half_power_hz=filt.half_power_hz,
                                  frame_rate=filt.frame_rate, floor_db=floor_db, log_frequency=log_frequency,
                                  title=f"{filt.kind} filter of order {filt.order}, one pass and "
                                        f"forward-backward (zero phase)")


def _pearson(a: np.ndarray, b: np.ndarray) -> float:
    ok = np.isfinite(a) & np.isfinite(b)
    if ok.sum() < 2 or np.std(a[ok]) == 0 or np.std(b[ok]) == 0:
        return math.nan
    return float(np.corrcoef(a[ok], b[ok])[0, 1])


def prediction_figure(frame_rate, recorded_dff, predicted_dff, spike_times, *, roi_label="") -> Figure:
    """Recorded ΔF/F against the ΔF/F predicted from spikes, with the residual and the spikes.

    Parameters
    ----------
    frame_rate : float
        Frames per second (Hz).
    recorded_dff : array_like, shape (frames,), or None
        Recorded ΔF/F (NaN marks missing frames: shaded, and left out of the
        correlation in the title); None draws the prediction alone (no
        residual panel).
    predicted_dff : array_like, shape (frames,)
        Predicted ΔF/F.
    spike_times : array_like
        Spike times (s) the prediction was made from.
    roi_label : str
        Name of the ROI, put in the title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    frame_rate = check_frame_rate(frame_rate)
    roi_label = _label(roi_label, "roi_label")
    predicted = _trace(predicted_dff, "predicted_dff")
    n = predicted.size
    recorded = None if recorded_dff is None else _trace(recorded_dff, "recorded_dff")
    if recorded is not None and recorded.size != n:
        raise ValueError(f"recorded_dff and predicted_dff must have the same number of frames, got {recorded.size} "
                         f"and {n}")
    spikes = _spike_times(spike_times, "spike_times")
    time_s = np.arange(n) / frame_rate
    fig = _figure(5.4 if recorded is not None else 4.0)
    if recorded is None:  # a prediction alone: ΔF/F and the spikes it was made from
        axes = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [2.6, 0.6]})
        _title(fig, _prefix(roi_label, "ΔF/F predicted from spikes"))
        top, spike_ax = axes
    else:
        axes = fig.subplots(3, 1, sharex=True, gridspec_kw={"height_ratios": [2.6, 1.2, 0.6]})
        mask = ~np.isfinite(recorded)
        r = _pearson(recorded, predicted)
        _title(fig, _prefix(roi_label, "recorded and predicted ΔF/F" + ("" if math.isnan(r) else
                                                                        f" (r = {r:.3f})")))
        top, residual_ax, spike_ax = axes
    _style(top)
    # the thin recording is drawn over the thick prediction so both stay visible
    top.plot(time_s, predicted, color=PALETTE["orange"], linewidth=1.8, label="predicted from spikes")
    if recorded is not None:
        top.plot(time_s, recorded, color=PALETTE["ink"], linewidth=0.7, label="recorded")
        _shade_missing(top, frame_rate, mask, label=True)
        _style(residual_ax)
        residual_ax.axhline(0.0, color=_FRAME, linewidth=0.6)
        residual_ax.plot(time_s, recorded - predicted, color=PALETTE["grey"], linewidth=0.8)
        _shade_missing(residual_ax, frame_rate, mask, label=False)
        residual_ax.set_ylabel("residual\n(ΔF/F)")
    top.set_ylabel("ΔF/F")
    _legend(top, ncol=3)
    _style(spike_ax, grid_axis="x")
    _ticks(spike_ax, spikes, colour=PALETTE["plum"])
    spike_ax.set_ylabel("spikes", rotation=0, ha="right", va="center")
    _panel_title(spike_ax, f"spikes used for the prediction: {spikes.size}")
    spike_ax.set_xlabel("time (s)")
    spike_ax.set_xlim(time_s[0] - 0.5 / frame_rate, time_s[-1] + 0.5 / frame_rate)
    return fig


def _response(values, name: str, time: np.ndarray) -> np.ndarray:
    """An impulse response on ``time``: an array, or a kernel sampled by its ``impulse_response``."""
    if callable(getattr(values, "impulse_response", None)):
        step = np.diff(time)
        if time[0] != 0 or time.size < 2 or step[0] <= 0 or not np.allclose(step, step[0], rtol=1e-6, atol=0):
            raise ValueError(f"{name} is a kernel: time_s must then be evenly spaced from 0 "
                             f"(k / frame_rate), got {time[:3]}...")
        return _vector(values.impulse_response(1.0 / float(step[0]), time.size), name, length=time.size)
    return _vector(values, name, length=time.size)


def calibration_figure(time_s, session_response, spread_responses, spike_size, spike_size_low, spike_size_high,
                       calibrated, *, kinetics_label="session kernel") -> Figure:
    """The session calibration: the shared kernel with its spread, and every ROI's single-spike size.

    Parameters
    ----------
    time_s : array_like, shape (n,)
        Time after the spike (s).
    session_response : array_like, shape (n,)
        The session kernel (ΔF/F after one spike of the median size).
    spread_responses : array_like, shape (m, n)
        Kernels at the ends of the per-ROI range of the kinetics (drawn as a
        band: their point-wise minimum and maximum); may be empty.
    spike_size, spike_size_low, spike_size_high : array_like, shape (rois,)
        Single-spike ΔF/F of each ROI and its 90 % interval (NaN: none).
    calibrated : array_like of bool, shape (rois,)
        ROIs whose size was identified; the others are drawn hollow.
    kinetics_label : str
        Legend text of the kernel.

    Returns
    -------
    matplotlib.figure.Figure
    """
    time = _vector(time_s, "time_s", finite=True, allow_empty=False)
    response = _vector(session_response, "session_response", length=time.size)
    spread = np.asarray(spread_responses, dtype=np.float64).reshape(-1, time.size) if np.size(spread_responses) \
        else np.zeros((0, time.size))
    size = _vector(spike_size, "spike_size")
    low = _vector(spike_size_low, "spike_size_low", length=size.size)
    high = _vector(spike_size_high, "spike_size_high", length=size.size)
    good = np.asarray(calibrated, dtype=bool).reshape(-1)
    if good.size != size.size:
        raise ValueError(f"calibrated must have one value per ROI ({size.size}), got {good.size}")
    fig = _figure(3.6)
    left, right = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1.0, 1.3]})
    for ax in (left, right):
        _style(ax)
    n_bad = int((~good).sum())
    _title(fig, f"session calibration: {size.size - n_bad} of {size.size} ROI(s) calibrated")
    if spread.shape[0]:
        left.fill_between(time, spread.min(axis=0), spread.max(axis=0), color=PALETTE["sand"], alpha=0.6,
                          linewidth=0, label="per-ROI range of the kinetics")
    left.plot(time, response, color=PALETTE["orange"], linewidth=1.8, label=_label(kinetics_label, "kinetics_label"))
    left.axhline(0.0, color=_FRAME, linewidth=0.6)
    left.set_xlabel("time after the spike (s)")
    left.set_ylabel("ΔF/F of one spike")
    _legend(left, loc="upper right")
    index = np.arange(size.size)
    for mask, filled, label in ((good, True, "calibrated"), (~good, False, "uncalibrated (count not trusted)")):
        shown = mask & np.isfinite(size)
        if not shown.any():
            continue
        below = np.where(np.isfinite(low[shown]), size[shown] - low[shown], 0.0)
        above = np.where(np.isfinite(high[shown]), high[shown] - size[shown], 0.0)
        right.errorbar(index[shown], size[shown], yerr=[np.maximum(below, 0), np.maximum(above, 0)], fmt="o",
                       color=PALETTE["blue"] if filled else PALETTE["plum"], markersize=4,
                       markerfacecolor=PALETTE["blue"] if filled else "white", elinewidth=1.0, capsize=2,
                       label=label)
    right.set_xlabel("ROI")
    right.set_ylabel("single-spike ΔF/F (90 % interval)")
    if np.isfinite(size).any():
        _legend(right, loc="best")
    return fig


def kernel_figure(time_s, *, fitted=None, free_form=None, reference=None, free_form_time_s=None,
                  fitted_label="fitted model", free_form_label="free-form estimate",
                  reference_label="reference kinetics", normalise=False, title="response to one spike") -> Figure:
    """Impulse responses (ΔF/F after one spike) compared on one time axis.

    Parameters
    ----------
    time_s : array_like, shape (n,)
        Time after the spike (s).
    fitted, free_form, reference : array_like, shape (n,), or kernel, optional
        A fitted parametric kernel (line), a free-form per-frame estimate
        (points joined by a thin line) and a reference from the literature
        (dashed). At least one is required. Instead of an array, an object
        with an ``impulse_response(frame_rate, n_frames)`` method (a
        :class:`calcium.kernel.Kernel`) may be given; ``time_s`` must then be
        ``k / frame_rate`` for k = 0, 1, ...
    free_form_time_s : array_like, optional
        Times (s) of the ``free_form`` samples when they differ from
        ``time_s`` (e.g. a fine grid for the smooth curves and the frame
        times for the per-frame estimate).
    fitted_label, free_form_label, reference_label : str
        Legend texts.
    normalise : bool
        Scale each curve to a peak of 1 to compare shapes only.
    title : str
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    time = _vector(time_s, "time_s", finite=True, allow_empty=False)
    free_time = time if free_form_time_s is None else \
        _vector(free_form_time_s, "free_form_time_s", finite=True, allow_empty=False)
    curves = []
    for key, values, label, axis in (("fitted", fitted, fitted_label, time),
                                     ("free_form", free_form, free_form_label, free_time),
                                     ("reference", reference, reference_label, time)):
        if values is not None:
            curves.append((key, axis, _response(values, key, axis), _label(label, f"{key}_label")))
    if not curves:
        raise ValueError("kernel_figure needs at least one of fitted, free_form or reference")
    fig = _figure(3.6)
    ax = fig.add_subplot()
    _style(ax)
    _title(fig, _label(title, "title"))
    ax.axhline(0.0, color=_FRAME, linewidth=0.6)
    for key, axis, values, label in curves:
        if normalise:
            peak = np.nanmax(np.abs(values)) if np.isfinite(values).any() else 0.0
            values = values / peak if peak > 0 else values
        if key == "fitted":
            ax.plot(axis, values, color=PALETTE["orange"], linewidth=2.0, label=label)
        elif key == "free_form":
            ax.plot(axis, values, color=PALETTE["blue"], linewidth=0.8, marker="o", markersize=3,
                    label=label)
        else:
            ax.plot(axis, values, color=PALETTE["plum"], linewidth=1.6, linestyle="--", label=label)
    ax.set_xlabel("time after spike (s)")
    ax.set_ylabel("response (peak = 1)" if normalise else "ΔF/F per spike")
    ax.set_xlim(float(min(time.min(), free_time.min())), float(max(time.max(), free_time.max())))
    _legend(ax)
    return fig


def kernel_fit_figure(fit, *, reference=None, reference_label="published kinetics", duration_s=None,
                      samples_per_frame=8) -> Figure:
    """A fitted kernel (from :func:`calcium.fit.fit_kernel`) against its free form and a reference.

    Reads the fit's documented ``kernel``, ``frame_rate``, ``impulse_response``
    and ``impulse_time_s`` (the free-form estimate, None unless
    ``model="free"``), ``r_squared``, ``n_isolated`` and ``lag_s``.

    Parameters
    ----------
    fit : KernelFit
    reference : Kernel, optional
        Published kinetics to compare with (e.g. ``Kernel.from_indicator(name)``),
        drawn dashed.
    reference_label : str
        Legend text for ``reference``.
    duration_s : float, optional
        Length of the time axis (s). Default: the free-form estimate's span,
        or five decay time constants of the fitted kernel.
    samples_per_frame : int
        The smooth curves are drawn this many times finer than the frames.

    Returns
    -------
    matplotlib.figure.Figure
    """
    kernel = getattr(fit, "kernel", None)
    if kernel is None or not callable(getattr(kernel, "impulse_response", None)):
        raise ValueError(f"fit must be a kernel fit with a kernel, got {type(fit).__name__}")
    frame_rate = check_frame_rate(fit.frame_rate)
    samples_per_frame = check_int(samples_per_frame, "samples_per_frame", minimum=1)
    free = fit.impulse_response
    free_time = None if free is None else _vector(fit.impulse_time_s, "fit.impulse_time_s", finite=True)
    if duration_s is None:
        duration_s = float(free_time.max()) if free_time is not None and free_time.size else 5.0 * kernel.decay_s
    duration_s = check_positive(duration_s, "duration_s")
    fine_rate = frame_rate * samples_per_frame
    time = np.arange(int(math.floor(duration_s * fine_rate)) + 1) / fine_rate
    title = (f"fitted response to one spike: R² = {fit.r_squared:.3f}, {fit.n_isolated} isolated spikes, "
             f"clock lag {fit.lag_s * 1e3:.0f} ms")
    return kernel_figure(time, fitted=kernel, free_form=free, free_form_time_s=free_time, reference=reference,
                         fitted_label="fitted double exponential", reference_label=reference_label,
                         title=title)


def kernel_evidence_figure(time_s, mean_dff, spread_low, spread_high, *, n_spikes, fit_time_s, fitted,
                           fitted_low=None, fitted_high=None, reference_low=None, reference_high=None,
                           reference_label="published range", spread_label="10-90 % of the spikes",
                           roi_label="") -> Figure:
    """A fitted kernel drawn over the data it was fitted to: the average ΔF/F around isolated spikes.

    Parameters
    ----------
    time_s : array_like, shape (points,)
        Time from the spike (s) of the average.
    mean_dff, spread_low, spread_high : array_like, shape (points,)
        Average ΔF/F around the isolated spikes and the band of its spread.
    n_spikes : int
        Number of isolated spikes averaged (in the title).
    fit_time_s : array_like, shape (samples,)
        Time from the spike (s) of the curves below.
    fitted : array_like, shape (samples,)
        The fitted kernel's response to one spike.
    fitted_low, fitted_high : array_like, shape (samples,), optional
        Ends of the fitted kernel's bootstrap band.
    reference_low, reference_high : array_like, shape (samples,), optional
        Ends of the published range of the indicator's response.
    reference_label, spread_label : str
        Legend texts of the published range and of the data's spread.
    roi_label : str
        Name of the ROI, put in the title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    time_s = _vector(time_s, "time_s", finite=True, allow_empty=False)
    n = time_s.size
    mean_dff = _vector(mean_dff, "mean_dff", length=n)
    low, high = _vector(spread_low, "spread_low", length=n), _vector(spread_high, "spread_high", length=n)
    n_spikes = check_int(n_spikes, "n_spikes", minimum=0)
    fit_time = _vector(fit_time_s, "fit_time_s", finite=True, allow_empty=False)
    m = fit_time.size
    curve = _vector(fitted, "fitted", length=m)
    band = [None if v is None else _vector(v, name, length=m) for v, name in
            ((fitted_low, "fitted_low"), (fitted_high, "fitted_high"),
             (reference_low, "reference_low"), (reference_high, "reference_high"))]
    fig = _figure(3.6)
    ax = fig.add_subplot()
    _style(ax)
    _title(fig, _prefix(_label(roi_label, "roi_label"), f"fitted kernel over the average of {n_spikes} isolated "
                                                         f"recorded spike(s)"))
    if band[2] is not None and band[3] is not None:
        ax.fill_between(fit_time, band[2], band[3], color=PALETTE["sand"], alpha=0.45, linewidth=0,
                        label=_label(reference_label, "reference_label"))
    ax.fill_between(time_s, low, high, color=PALETTE["grey"], alpha=0.3, linewidth=0,
                    label=_label(spread_label, "spread_label"))
    ax.plot(time_s, mean_dff, "o-", color=PALETTE["ink"], linewidth=0.9, markersize=2.5,
            label="average ΔF/F (one dot per frame)")
    if band[0] is not None and band[1] is not None:
        ax.fill_between(fit_time, band[0], band[1], color=PALETTE["orange"], alpha=0.3, linewidth=0,
                        label="bootstrap interval of the fit")
    ax.plot(fit_time, curve, color=PALETTE["orange"], linewidth=1.8, label="fitted kernel")
    ax.axvline(0.0, color=PALETTE["grey"], linewidth=0.8, linestyle=":")
    ax.set_xlabel("time from the recorded spike (s)")
    ax.set_ylabel("ΔF/F")
    ax.set_xlim(min(time_s[0], fit_time[0]), max(time_s[-1], fit_time[-1]))
    _legend(ax, loc="lower right", bbox_to_anchor=(1.0, 1.0), ncol=3)
    return fig


def _spike_trains(spike_times_per_roi):
    """(row names, list of sorted time arrays) from a sequence or a dict ROI -> times."""
    if isinstance(spike_times_per_roi, dict):
        keys = sorted(spike_times_per_roi)
        trains = [_spike_times(spike_times_per_roi[k], f"spike_times_per_roi[{k!r}]") for k in keys]
        return [str(k) for k in keys], trains
    if isinstance(spike_times_per_roi, np.ndarray) and spike_times_per_roi.ndim == 1 \
            and spike_times_per_roi.dtype != object:
        raise ValueError("spike_times_per_roi must be a sequence of arrays (one per ROI) or a dict "
                         "ROI -> times, got a single 1-D array")
    try:
        trains = [_spike_times(t, f"spike_times_per_roi[{i}]") for i, t in enumerate(spike_times_per_roi)]
    except TypeError:
        raise ValueError("spike_times_per_roi must be a sequence of arrays (one per ROI) or a dict "
                         f"ROI -> times, got {type(spike_times_per_roi).__name__}") from None
    return [str(i) for i in range(len(trains))], trains


def raster_figure(spike_times_per_roi, duration_s, *, max_rois=200, max_events=50_000,
                  max_bins=600) -> Figure:
    """Inferred spikes of all ROIs: ticks for a few ROIs, an image of binned counts for many.

    Parameters
    ----------
    spike_times_per_roi : sequence of array_like, or dict ROI -> array_like
        Spike times (s) of each ROI (dict keys become row names, sorted).
    duration_s : float
        Length of the recording (s); the time axis runs from 0 to it.
    max_rois : int
        Up to this many ROIs (and at most ``max_events`` spikes) are drawn as
        one row of ticks each. Beyond, ROIs are summed in groups of
        ceil(rois / max_rois) consecutive ROIs and time into at most
        ``max_bins`` bins, and the counts drawn as an image: the PNG stays
        the same size however many ROIs there are.
    max_events : int
        Most spikes drawn as individual ticks.
    max_bins : int
        Most time bins of the image.

    Returns
    -------
    matplotlib.figure.Figure
        In image mode, ``fig.axes[0].images[0].get_array()`` holds the counts
        (rows = ROI groups, columns = time bins).
    """
    names, trains = _spike_trains(spike_times_per_roi)
    n = len(trains)
    if n == 0:
        raise ValueError("spike_times_per_roi must hold at least one ROI")
    duration = check_positive(duration_s, "duration_s")
    max_rois = check_int(max_rois, "max_rois", minimum=1)
    max_events = check_int(max_events, "max_events", minimum=0)
    max_bins = check_int(max_bins, "max_bins", minimum=1)
    total = int(sum(t.size for t in trains))
    fig = _figure(min(7.5, 2.0 + 0.16 * min(n, max_rois)) if n <= max_rois else 5.2)
    ax = fig.add_subplot()
    ax.set_xlabel("time (s)")
    if n <= max_rois and total <= max_events:
        _style(ax, grid_axis="x")
        _title(fig, f"inferred spikes: {n} ROI(s), {total} spike(s)")
        ax.eventplot(trains, colors=PALETTE["plum"], lineoffsets=np.arange(n), linelengths=0.8,
                     linewidths=0.8)
        ax.set_ylim(n - 0.5, -0.5)
        step = max(1, int(math.ceil(n / 25)))
        ax.set_yticks(np.arange(0, n, step), [names[i] for i in range(0, n, step)])
        ax.set_xlim(0, duration)
        ax.set_ylabel("ROI")
        return fig
    _style(ax, grid_axis="")
    group = max(1, int(math.ceil(n / max_rois)))
    n_rows = int(math.ceil(n / group))
    n_bins = max_bins
    rows = np.concatenate([np.full(t.size, i // group) for i, t in enumerate(trains)]) if total else np.zeros(0)
    times = np.concatenate(trains) if total else np.zeros(0)
    counts, _, _ = np.histogram2d(rows, times, bins=(n_rows, n_bins), range=((0, n_rows), (0, duration)))
    bin_s = duration / n_bins
    image = ax.imshow(counts, aspect="auto", interpolation="nearest", cmap=_SEQUENTIAL,
                      extent=(0, duration, n_rows * group, 0), vmin=0)
    what = f"{group} ROIs per row, " if group > 1 else ""
    _title(fig, f"inferred spikes: {n} ROIs, {total} spikes ({what}bins of {bin_s:.3g} s)")
    ax.set_ylabel("ROI")
    colourbar = fig.colorbar(image, ax=ax, pad=0.01, fraction=0.04)
    colourbar.set_label(f"spikes per bin ({group} ROI{'s' if group > 1 else ''} × {bin_s:.3g} s)",
                        fontsize=_LEGEND_SIZE, color=_TEXT)
    colourbar.ax.tick_params(labelsize=_TICK_SIZE, colors=_FRAME, labelcolor=_TEXT)
    colourbar.outline.set_visible(False)
    return fig


def _per_roi_matrix(values, name: str, n_cols: int) -> np.ndarray:
    """``values`` as a (rows, n_cols) array; a 1-D array is one row."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.ndim == 1:
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != n_cols:
        raise ValueError(f"{name} must have shape ({n_cols},) or (rois, {n_cols}), got {arr.shape}")
    return arr


def score_figure(precision, recall, f1, *, bin_widths_s=None, correlation=None, labels=None,
                 tolerance_s=None, max_bars=20) -> Figure:
    """Scores of spike inference against recorded spikes, per ROI.

    Parameters
    ----------
    precision, recall, f1 : array_like, shape (rois,)
        Per-ROI scores in [0, 1] (NaN where undefined, e.g. no spikes).
    bin_widths_s : array_like, shape (bins,), optional
        Bin widths (s) at which ``correlation`` was computed.
    correlation : array_like, shape (bins,) or (rois, bins), optional
        Correlation of binned spike counts; adds a panel against bin width
        (one thin line per ROI, the median bold). Needs ``bin_widths_s``.
    labels : sequence of str, optional
        ROI names for the bars (default: ROI index).
    tolerance_s : float, optional
        Matching tolerance (s), quoted in the title.
    max_bars : int
        Up to this many ROIs the scores are grouped bars per ROI; beyond, a
        strip of points per score with the median marked.

    Returns
    -------
    matplotlib.figure.Figure
    """
    p = _vector(precision, "precision", allow_empty=False)
    n = p.size
    scores = {"precision": p, "recall": _vector(recall, "recall", length=n), "F1": _vector(f1, "f1", length=n)}
    for key, arr in scores.items():
        if np.any((arr[np.isfinite(arr)] < 0) | (arr[np.isfinite(arr)] > 1)):
            raise ValueError(f"{key.lower()} must lie in [0, 1] (NaN allowed)")
    names = _names(labels, n, "labels")
    max_bars = check_int(max_bars, "max_bars", minimum=1)
    if tolerance_s is not None:
        tolerance_s = check_positive(tolerance_s, "tolerance_s")
    widths = corr = None
    if correlation is not None:
        if bin_widths_s is None:
            raise ValueError("correlation needs bin_widths_s (the bin widths in s it was computed at)")
        widths = _vector(bin_widths_s, "bin_widths_s", finite=True, allow_empty=False)
        if np.any(widths <= 0):
            raise ValueError("bin_widths_s must be positive")
        corr = _per_roi_matrix(correlation, "correlation", widths.size)
    colours = {"precision": PALETTE["blue"], "recall": PALETTE["orange"], "F1": PALETTE["ink"]}
    fig = _figure(3.8)
    axes = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1.6, 1]}) if corr is not None else [fig.add_subplot()]
    title = f"spike inference scores ({n} ROI{'s' if n != 1 else ''}"
    title += f", matching tolerance {tolerance_s:g} s)" if tolerance_s is not None else ")"
    _title(fig, title)
    ax = axes[0]
    _style(ax, grid_axis="y")
    if n <= max_bars:
        width = 0.26
        for k, (key, arr) in enumerate(scores.items()):
            ax.bar(np.arange(n) + (k - 1) * width, np.nan_to_num(arr, nan=0.0), width=width,
                   color=colours[key], label=key)
        ax.set_xticks(np.arange(n), names, rotation=90 if n > 8 else 0, fontsize=_TICK_SIZE)
        ax.set_xlabel("ROI")
    else:
        for k, (key, arr) in enumerate(scores.items()):
            ok = np.isfinite(arr)
            # spread the points of one score evenly across its column, by ROI order
            spread = k + np.linspace(-0.3, 0.3, max(int(ok.sum()), 1))[: int(ok.sum())]
            ax.plot(spread, arr[ok], "o", color=colours[key], markersize=2.5, alpha=0.7,
                    markeredgewidth=0)
            if ok.any():
                med = float(np.median(arr[ok]))
                ax.hlines(med, k - 0.38, k + 0.38, color=_TEXT, linewidth=2.0)
                ax.annotate(f"median {med:.2f}", (k, med), xytext=(0, 4), textcoords="offset points",
                            ha="center", fontsize=_LEGEND_SIZE, color=_TEXT)
        ax.set_xticks(range(3), list(scores))
    ax.set_ylim(0, 1.08)
    ax.set_ylabel("score (0 to 1)")
    if n <= max_bars:
        _legend(ax, ncol=3, loc="lower right", bbox_to_anchor=(1.0, 1.0))  # above the bars, never over them
    if corr is not None:
        ax = axes[1]
        _style(ax)
        order = np.argsort(widths)
        for row in corr:
            ax.plot(widths[order], row[order], color=PALETTE["grey"], linewidth=0.6, alpha=0.6)
        if corr.shape[0] > 1:
            with warnings.catch_warnings():  # an all-NaN bin width gives NaN, said once here
                warnings.simplefilter("ignore", RuntimeWarning)
                median = np.nanmedian(corr, axis=0)
            ax.plot(widths[order], median[order], color=PALETTE["ink"], linewidth=2.0, marker="o",
                    markersize=4, label="median over ROIs")
        else:
            ax.plot(widths[order], corr[0][order], color=PALETTE["ink"], linewidth=2.0, marker="o",
                    markersize=4, label="correlation")
        if widths.size > 1 and widths.max() / widths.min() > 4:
            ax.set_xscale("log")
            # plain numbers at the bin widths used, not powers of ten
            ax.xaxis.set_major_locator(FixedLocator(np.unique(widths)))
            ax.xaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:g}"))
            ax.xaxis.set_minor_formatter(NullFormatter())
        ax.set_ylim(min(0.0, float(np.nanmin(corr)) - 0.05) if np.isfinite(corr).any() else 0.0, 1.02)
        ax.set_xlabel("bin width (s)")
        ax.set_ylabel("correlation of binned counts (r)")
        _legend(ax, loc="lower right")
    return fig


def detection_figure(frame_rates, detection_probability, *, noise_sd, probability_error=None,
                   shortest_interval_s=None, target_probability=None, noise_unit="ΔF/F",
                   title="spike detection against frame rate", session_frame_rate=None) -> Figure:
    """Probability of detecting a spike against frame rate, one line per noise level.

    Parameters
    ----------
    frame_rates : array_like, shape (rates,)
        Frame rates (Hz) that were evaluated.
    detection_probability : array_like, shape (levels, rates) or (rates,)
        Detection probability in [0, 1] for each noise level and frame rate.
    noise_sd : float or array_like, shape (levels,)
        The noise levels (standard deviation, in ``noise_unit``).
    probability_error : array_like, optional
        Error bars: half-widths with the shape of ``detection_probability``,
        or (2, levels, rates) for separate lower and upper distances.
    shortest_interval_s : array_like, shape (levels, rates) or (rates,), optional
        Shortest interval between two spikes that is still resolved (s); adds
        a second panel. NaN where none is resolved.
    target_probability : float, optional
        A required detection probability, drawn as a horizontal guide.
    noise_unit : str
        Unit of ``noise_sd`` for the legend.
    title : str
        Figure title.
    session_frame_rate : float, optional
        The frame rate of the session being planned for, marked on both panels.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    Each noise level has its own marker and dash pattern besides its colour, so that lines that lie on top of
    each other (every spike detected) or are printed in grey stay apart.
    """
    rates = _vector(frame_rates, "frame_rates", finite=True, allow_empty=False)
    if session_frame_rate is not None:
        session_frame_rate = check_frame_rate(session_frame_rate)
    if np.any(rates <= 0):
        raise ValueError("frame_rates must be positive (Hz)")
    prob = _per_roi_matrix(detection_probability, "detection_probability", rates.size)
    levels = np.atleast_1d(_vector(np.atleast_1d(noise_sd), "noise_sd", finite=True))
    if levels.size != prob.shape[0]:
        raise ValueError(f"noise_sd must have one value per row of detection_probability "
                         f"({prob.shape[0]}), got {levels.size}")
    finite = prob[np.isfinite(prob)]
    if np.any((finite < 0) | (finite > 1)):
        raise ValueError("detection_probability must lie in [0, 1] (NaN allowed)")
    yerr = None
    if probability_error is not None:
        err = np.asarray(probability_error, dtype=np.float64)
        if err.ndim == 1:
            err = err[None, :]
        if err.shape == prob.shape:
            yerr = np.stack([err, err])
        elif err.shape == (2,) + prob.shape:
            yerr = err
        else:
            raise ValueError(f"probability_error must have shape {prob.shape} or {(2,) + prob.shape}, "
                             f"got {np.shape(probability_error)}")
        if np.any(yerr[np.isfinite(yerr)] < 0):
            raise ValueError("probability_error must hold distances >= 0")
    interval = None if shortest_interval_s is None else \
        _per_roi_matrix(shortest_interval_s, "shortest_interval_s", rates.size)
    if interval is not None and interval.shape[0] != levels.size:
        raise ValueError(f"shortest_interval_s must have {levels.size} row(s), one per noise level")
    noise_unit = _label(noise_unit, "noise_unit")
    fig = _figure(3.8)
    axes = fig.subplots(1, 2) if interval is not None else [fig.add_subplot()]
    _title(fig, _label(title, "title"))
    colours = _levels_colours(levels.size)
    order = np.argsort(rates)
    log_x = rates.max() / rates.min() > 20
    ax = axes[0]
    _style(ax)
    markers, dashes = "osD^v<>p", ["-", "--", ":", "-."]
    for i, level in enumerate(levels):
        ax.errorbar(rates[order], prob[i, order], yerr=None if yerr is None else yerr[:, i, order],
                    color=colours[i], linewidth=1.5, marker=markers[i % len(markers)],
                    linestyle=dashes[i % len(dashes)], markersize=5.5 - 1.2 * (i % 3), capsize=2.5,
                    label=f"{level:.3g}")
    session_axes = [ax]
    if target_probability is not None:
        target = check_positive(target_probability, "target_probability")
        if target > 1:
            raise ValueError(f"target_probability must lie in (0, 1], got {target_probability!r}")
        ax.axhline(target, color=PALETTE["orange"], linestyle="--", linewidth=1.0)
        ax.annotate(f"target {target:.2g}", (0.01, target), xycoords=("axes fraction", "data"),
                    xytext=(0, 3), textcoords="offset points", fontsize=_LEGEND_SIZE, color=_TEXT)
    ax.set_ylim(-0.02, 1.04)
    ax.set_xlabel("frame rate (Hz)")
    ax.set_ylabel("detection probability")
    _panel_title(ax, "probability of detecting one spike")
    if log_x:
        ax.set_xscale("log")
    _legend(ax, loc="lower right", title=f"noise SD ({noise_unit})" if noise_unit else "noise SD",
            title_fontsize=_LEGEND_SIZE)
    if interval is not None:
        ax = axes[1]
        _style(ax)
        session_axes.append(ax)
        for i, level in enumerate(levels):
            ax.plot(rates[order], interval[i, order], color=colours[i], linewidth=1.5,
                    marker=markers[i % len(markers)], linestyle=dashes[i % len(dashes)],
                    markersize=5.5 - 1.2 * (i % 3), label=f"{level:.3g}")
        ax.set_xlabel("frame rate (Hz)")
        ax.set_ylabel("shortest resolvable interval (s)")
        _panel_title(ax, "two spikes told apart when at least this far apart")
        if log_x:
            ax.set_xscale("log")
        positive = interval[np.isfinite(interval) & (interval > 0)]
        if positive.size and positive.max() / positive.min() > 20:
            ax.set_yscale("log")
    if session_frame_rate is not None:
        for axis in session_axes:
            axis.axvline(session_frame_rate, color=PALETTE["grey"], linewidth=1.0, linestyle=":", zorder=0)
            axis.annotate(f"this session, {session_frame_rate:g} Hz", (session_frame_rate, 0.03),
                          xycoords=("data", "axes fraction"), xytext=(-2, 0), textcoords="offset points",
                          rotation=90, ha="right", va="bottom", fontsize=_LEGEND_SIZE, color=_TEXT)
    return fig


def plan_figure(plan, *, target_probability=None, session_frame_rate=None) -> Figure:
    """Draw a detectability plan (from :func:`calcium.plan.plan_detectability`).

    Reads the plan's documented ``frame_rates``, ``noise_sd``, ``detection``
    and ``detection_ci`` (indexed [frame rate, noise level]; the 95 % Wilson
    intervals become asymmetric error bars), ``shortest_resolved_interval_s``
    and ``false_positive_rate``, and draws them with :func:`detection_figure`.

    Parameters
    ----------
    plan : DetectabilityPlan
    target_probability : float, optional
        A required detection probability, drawn as a guide.
    session_frame_rate : float, optional
        The frame rate of the session being planned for, marked on the figure.

    Returns
    -------
    matplotlib.figure.Figure
    """
    try:
        rates = np.asarray(plan.frame_rates, dtype=np.float64)
        detection = np.asarray(plan.detection, dtype=np.float64)
        ci = np.asarray(plan.detection_ci, dtype=np.float64)
    except AttributeError:
        raise ValueError(f"plan must be a detectability plan, got {type(plan).__name__}") from None
    if detection.ndim != 2 or ci.shape != detection.shape + (2,):
        raise ValueError(f"plan.detection must be (frame rates, noise levels) and plan.detection_ci that plus (2,); "
                         f"got {detection.shape} and {ci.shape}")
    # [rate, noise] -> [noise, rate]; error bars are distances below and above the estimate
    error = np.stack([detection - ci[..., 0], ci[..., 1] - detection]).transpose(0, 2, 1)
    shortest = getattr(plan, "shortest_resolved_interval_s", None)
    shortest = None if shortest is None or np.size(shortest) == 0 else np.asarray(shortest, dtype=np.float64).T
    return detection_figure(rates, detection.T, noise_sd=np.asarray(plan.noise_sd, dtype=np.float64),
                          probability_error=np.clip(error, 0.0, None), shortest_interval_s=shortest,
                          target_probability=target_probability, session_frame_rate=session_frame_rate,
                          title=f"spike detection against frame rate (false-positive rate "
                                f"{plan.false_positive_rate:.2g}, bars: 95 % intervals)")


# ---------------------------------------------------------------------------
# periodic artefacts (calcium.signal.rhythms)
# ---------------------------------------------------------------------------
def rhythm_spectrum_figure(freq_hz, median_power, *, background=None, low_power=None, high_power=None,
                           after=None, neuropil=None, coherence=None, coherence_null=None, peaks_hz=(),
                           peak_labels=None, resolution_hz=None, title="power spectrum of the session") -> Figure:
    """Power spectrum of a session (median over ROIs) with its background, shared peaks and coherence.

    Parameters
    ----------
    freq_hz : array_like, shape (bins,)
        Frequencies (Hz); 0 Hz is not drawn (logarithmic power axis).
    median_power : array_like, shape (bins,)
        Median over ROIs of the power spectral density (ΔF/F² / Hz).
    background : array_like, shape (bins,), optional
        The aperiodic background (median over ROIs), dashed.
    low_power, high_power : array_like, shape (bins,), optional
        A range over ROIs (e.g. the 10th and 90th percentiles), shaded.
    after : array_like, shape (bins,), optional
        The median spectrum after the rhythms were removed.
    neuropil : array_like, shape (bins,), optional
        The median spectrum of the ROIs' neuropil (in relative units, F /
        mean(F) − 1, comparable with ΔF/F).
    coherence : array_like, shape (bins,), optional
        Median coherence of the ROIs with their reference; adds a panel.
    coherence_null : float, optional
        The coherence independent traces exceed with probability 0.01, drawn
        as a guide in the coherence panel.
    peaks_hz : sequence of float
        Frequencies of the shared rhythms found, marked on both panels.
    peak_labels : sequence of str, optional
        One label per peak (default: its frequency).
    resolution_hz : float, optional
        Frequency resolution, quoted in the title.
    title : str

    Returns
    -------
    matplotlib.figure.Figure
    """
    freq = _vector(freq_hz, "freq_hz", finite=True, allow_empty=False)
    n = freq.size
    median = _vector(median_power, "median_power", length=n)
    extra = {key: None if value is None else _vector(value, key, length=n) for key, value in
             (("background", background), ("low_power", low_power), ("high_power", high_power), ("after", after),
              ("neuropil", neuropil), ("coherence", coherence))}
    peaks = list(_vector(np.atleast_1d(np.asarray(peaks_hz, dtype=np.float64)), "peaks_hz", finite=True))
    labels = [f"{p:.3g} Hz" for p in peaks] if peak_labels is None else [str(x) for x in peak_labels]
    if len(labels) != len(peaks):
        raise ValueError(f"peak_labels must have one entry per peak ({len(peaks)}), got {len(labels)}")
    title = _label(title, "title")
    if resolution_hz is not None:
        title += f" (resolution {check_positive(resolution_hz, 'resolution_hz'):.3g} Hz)"
    has_coherence = extra["coherence"] is not None
    fig = _figure(5.4 if has_coherence else 3.8)
    axes = fig.subplots(2 if has_coherence else 1, 1, sharex=True, squeeze=False,
                        gridspec_kw={"height_ratios": [2.2, 1.0] if has_coherence else [1.0]})[:, 0]
    _title(fig, title)
    keep = freq > 0
    ax = axes[0]
    _style(ax)
    if extra["low_power"] is not None and extra["high_power"] is not None:
        ax.fill_between(freq[keep], extra["low_power"][keep], extra["high_power"][keep], color=PALETTE["sand"],
                        alpha=0.5, linewidth=0, label="ROIs, 10-90 %")
    ax.plot(freq[keep], median[keep], color=PALETTE["ink"], linewidth=1.2, label="median over ROIs")
    if extra["background"] is not None:
        ax.plot(freq[keep], extra["background"][keep], color=PALETTE["orange"], linewidth=1.4, linestyle="--",
                label="aperiodic background")
    if extra["after"] is not None:
        ax.plot(freq[keep], extra["after"][keep], color=PALETTE["blue"], linewidth=1.1, label="after removal")
    if extra["neuropil"] is not None:
        ax.plot(freq[keep], extra["neuropil"][keep], color=PALETTE["grey"], linewidth=1.1, label="neuropil (median)")
    ax.set_yscale("log")
    ax.set_ylabel("power (ΔF/F² / Hz)")
    for axis in axes:
        for k, peak in enumerate(peaks):
            axis.axvline(peak, color=PALETTE["plum"], linewidth=0.9, linestyle=":",
                         label="shared rhythm" if (k == 0 and axis is ax) else None)
    for peak, text in zip(peaks, labels):
        ax.annotate(text, (peak, 1.0), xycoords=("data", "axes fraction"), xytext=(3, -10), textcoords="offset points",
                    fontsize=_LEGEND_SIZE, color=PALETTE["plum"])
    _legend(ax, ncol=2)
    if has_coherence:
        cax = axes[1]
        _style(cax)
        cax.plot(freq[keep], extra["coherence"][keep], color=PALETTE["ink"], linewidth=1.1,
                 label="median coherence with the reference")
        if coherence_null is not None:
            cax.axhline(float(coherence_null), color=PALETTE["grey"], linewidth=1.0, linestyle="--",
                        label="chance level (p = 0.01)")
        cax.set_ylim(0.0, 1.0)
        cax.set_ylabel("coherence")
        _legend(cax, loc="upper right")
    axes[-1].set_xlabel("frequency (Hz)")
    axes[-1].set_xlim(float(freq[keep].min()) if keep.any() else 0.0, float(freq.max()))
    return fig


def _time_bins(n: int, most: int) -> np.ndarray:
    """Edges of at most ``most`` equal groups of ``n`` columns (the drawing needs no more)."""
    return np.linspace(0, n, min(n, most) + 1).round().astype(np.int64)


def time_frequency_figure(time_s, freq_hz, values, *, reliable=None, value_label="amplitude (ΔF/F)",
                          resolution="", log_frequency=False, title="time-frequency map", max_columns=1500) -> Figure:
    """A spectrogram or a scalogram: values over time (x) and frequency (y), on the cividis colour map.

    Parameters
    ----------
    time_s : array_like, shape (times,)
        Times of the columns (s).
    freq_hz : array_like, shape (freqs,)
        Frequencies of the rows (Hz), increasing.
    values : array_like, shape (freqs, times)
        Power or amplitude; NaN is drawn blank.
    reliable : array_like of bool, shape (freqs, times), optional
        False where the values are disturbed by an edge (a wavelet's cone of
        influence): drawn paler, with the boundary outlined.
    value_label : str
        Colour-bar label.
    resolution : str
        The time and frequency resolution in words, put under the title.
    log_frequency : bool
        Logarithmic frequency axis (for wavelets).
    title : str
    max_columns : int
        Columns drawn at most; longer series are averaged in groups of
        consecutive columns.

    Returns
    -------
    matplotlib.figure.Figure
    """
    time = _vector(time_s, "time_s", finite=True, allow_empty=False)
    freq = _vector(freq_hz, "freq_hz", finite=True, allow_empty=False)
    grid = np.asarray(values, dtype=np.float64)
    if grid.shape != (freq.size, time.size):
        raise ValueError(f"values must have shape (freqs, times) = ({freq.size}, {time.size}), got {grid.shape}")
    if np.any(np.diff(freq) <= 0):
        raise ValueError("freq_hz must increase")
    mask = None
    if reliable is not None:
        mask = np.asarray(reliable, dtype=bool)
        if mask.shape != grid.shape:
            raise ValueError(f"reliable must have the shape of values {grid.shape}, got {mask.shape}")
    max_columns = check_int(max_columns, "max_columns", minimum=2)
    edges = _time_bins(time.size, max_columns)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # (a group of NaN only stays NaN)
        shown = np.stack([np.nanmean(grid[:, a:b], axis=1) for a, b in zip(edges[:-1], edges[1:])], axis=1)
        shown_time = np.array([time[a:b].mean() for a, b in zip(edges[:-1], edges[1:])])
        shown_mask = None if mask is None else np.stack([mask[:, a:b].all(axis=1)
                                                         for a, b in zip(edges[:-1], edges[1:])], axis=1)
    fig = _figure(3.8)
    ax = fig.add_subplot()
    _style(ax, grid_axis="")
    _title(fig, _label(title, "title"))
    if resolution:
        _panel_title(ax, _label(resolution, "resolution"))
    finite = shown[np.isfinite(shown)]
    top = float(np.quantile(finite, 0.995)) if finite.size else 1.0
    image = ax.pcolormesh(shown_time, freq, shown, cmap=_SEQUENTIAL, shading="nearest", vmin=0.0,
                          vmax=top if top > 0 else None, rasterized=True)
    if shown_mask is not None and not shown_mask.all():
        ax.pcolormesh(shown_time, freq, np.where(shown_mask, np.nan, 1.0), cmap="Greys", vmin=0.0, vmax=4.0,
                      alpha=0.45, shading="nearest", rasterized=True)
        ax.contour(shown_time, freq, shown_mask.astype(float), levels=[0.5], colors="white", linewidths=0.8)
    if log_frequency:
        ax.set_yscale("log")
    colorbar = fig.colorbar(image, ax=ax, pad=0.01)
    colorbar.set_label(_label(value_label, "value_label"), color=_TEXT, fontsize=_LABEL_SIZE)
    colorbar.ax.tick_params(labelsize=_TICK_SIZE, colors=_FRAME, labelcolor=_TEXT)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("frequency (Hz)")
    return fig


def rhythm_removal_figure(frame_rate, before, after, *, spikes_before=None, spikes_after=None, start_s=0.0,
                          duration_s=30.0, roi_label="", band_label="") -> Figure:
    """One ROI before and after a rhythm was removed: its ΔF/F and the spikes inferred from each.

    Parameters
    ----------
    frame_rate : float
        Frames per second (Hz).
    before, after : array_like, shape (frames,)
        ΔF/F with and without the rhythm (NaN at missing frames).
    spikes_before, spikes_after : array_like, optional
        Spike times (s) inferred from each; a row of ticks each.
    start_s, duration_s : float
        The stretch of the recording drawn.
    roi_label : str
        Name of the ROI, put in the title.
    band_label : str
        What was removed ("10.0 Hz"), put in the title.

    Returns
    -------
    matplotlib.figure.Figure
    """
    frame_rate = check_frame_rate(frame_rate)
    first = _trace(before, "before")
    second = _trace(after, "after", first.size)
    duration_s = check_positive(duration_s, "duration_s")
    if not (isinstance(start_s, numbers.Real) and 0.0 <= start_s < first.size / frame_rate):
        raise ValueError(f"start_s must be a time within the recording (0 to {first.size / frame_rate:g} s), got "
                         f"{start_s!r}")
    trains = [(name, None if times is None else _spike_times(times, name))
              for name, times in (("spikes_before", spikes_before), ("spikes_after", spikes_after))]
    a = int(start_s * frame_rate)
    b = min(first.size, a + max(2, int(round(duration_s * frame_rate))))
    time_s = np.arange(a, b) / frame_rate
    rows = [("trace", 2.4)] + [(name, 0.55) for name, times in trains if times is not None]
    fig = _figure(1.2 + 1.25 * sum(h for _, h in rows))
    axes = fig.subplots(len(rows), 1, sharex=True, squeeze=False,
                        gridspec_kw={"height_ratios": [h for _, h in rows]})[:, 0]
    what = f" ({_label(band_label, 'band_label')})" if band_label else ""
    _title(fig, _prefix(_label(roi_label, "roi_label"), f"before and after removing the rhythm{what}"))
    ax = axes[0]
    _style(ax)
    ax.plot(time_s, first[a:b], color=PALETTE["grey"], linewidth=0.9, label="ΔF/F with the rhythm")
    ax.plot(time_s, second[a:b], color=PALETTE["ink"], linewidth=1.0, label="after removal")
    ax.set_ylabel("ΔF/F")
    _legend(ax, ncol=2)
    colours = {"spikes_before": PALETTE["orange"], "spikes_after": PALETTE["plum"]}
    names = {"spikes_before": "inferred before", "spikes_after": "inferred after"}
    for axis, (name, _) in zip(axes[1:], [r for r in rows[1:]]):
        times = dict(trains)[name]
        inside = times[(times >= time_s[0]) & (times <= time_s[-1])]
        _style(axis, grid_axis="")
        _ticks(axis, inside, colour=colours[name])
        axis.set_ylabel(names[name], rotation=0, ha="right", va="center")
        _panel_title(axis, f"{names[name]}: {times.size} spike(s) in the recording, {inside.size} shown")
    axes[-1].set_xlabel("time (s)")
    axes[-1].set_xlim(time_s[0], time_s[-1])
    return fig


# ---------------------------------------------------------------------------
# output
# ---------------------------------------------------------------------------
def _close(fig: Figure) -> None:
    """Release a figure: drop it from pyplot's registry if pyplot is in use, then clear it."""
    pyplot = sys.modules.get("matplotlib.pyplot")
    if pyplot is not None:
        pyplot.close(fig)  # a no-op for figures pyplot did not make
    fig.clear()


def _check_figure(fig) -> Figure:
    if not isinstance(fig, Figure):
        raise ValueError(f"fig must be a matplotlib.figure.Figure, got {type(fig).__name__}")
    return fig


def _check_dpi(dpi) -> float:
    dpi = check_positive(dpi, "dpi")
    if not 10 <= dpi <= 600:
        raise ValueError(f"dpi must lie between 10 and 600, got {dpi!r}")
    return dpi


def figure_png_bytes(fig, *, dpi=100, close=True) -> bytes:
    """The PNG image of ``fig`` as bytes (rendered by Agg).

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    dpi : float
        Pixels per inch; the image is ``fig.get_size_inches() * dpi`` pixels.
    close : bool
        Close the figure afterwards (it cannot be drawn again).

    Returns
    -------
    bytes
    """
    fig = _check_figure(fig)
    dpi = _check_dpi(dpi)
    buffer = io.BytesIO()
    try:
        fig.savefig(buffer, format="png", dpi=dpi, facecolor=fig.get_facecolor())
    finally:
        if close:
            _close(fig)
    return buffer.getvalue()


def save_figure(fig, path, *, dpi=100) -> Path:
    """Write ``fig`` to a PNG file atomically, then close the figure.

    The image is written to a temporary file in the destination folder and
    moved onto ``path`` (:func:`os.replace`), so a reader never sees half a
    file. The folder is created if needed.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : str or path-like
        Destination; must end in ``.png``.
    dpi : float
        Pixels per inch: the image is ``fig.get_size_inches() * dpi`` pixels.

    Returns
    -------
    pathlib.Path
        ``path``.
    """
    from ..io.results import atomic_output

    fig = _check_figure(fig)
    path = Path(path)
    if path.suffix.lower() != ".png":
        raise ValueError(f"path must end in .png, got {str(path)!r}")
    data = figure_png_bytes(fig, dpi=dpi, close=True)
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(path) as tmp:
        tmp.write_bytes(data)
    return path


def planner_figure(*args, **kwargs) -> Figure:
    """Former name of :func:`detection_figure` (kept for one release; it warns)."""
    warnings.warn("planner_figure is the former name of detection_figure; it will be removed in a later release",
                  DeprecationWarning, stacklevel=2)
    return detection_figure(*args, **kwargs)
