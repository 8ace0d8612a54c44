"""Tests of calcium.report: figures (matplotlib, Agg) and the static HTML report."""
from __future__ import annotations

import html
import itertools
import re
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import scipy.signal
from matplotlib.collections import LineCollection, PolyCollection
from matplotlib.figure import Figure
from PIL import Image

import calcium
from calcium.report import (
    PALETTE,
    HtmlReport,
    distribution_figure,
    filter_figure,
    filter_response_figure,
    kernel_figure,
    kernel_fit_figure,
    noise_figure,
    plan_figure,
    detection_figure,
    prediction_figure,
    raster_figure,
    save_figure,
    score_figure,
    stages_figure,
)

FRAME_RATE = 30.0
HOSTILE = "<script>alert('x')</script> & \"quotes\""


# ---------------------------------------------------------------------------
# small example data (seeded)
# ---------------------------------------------------------------------------
def _trace_data(n=300, seed=1):
    rng = np.random.default_rng(seed)
    raw = 100.0 + rng.normal(0.0, 2.0, n)
    raw[40:46] = np.nan
    f0 = np.full(n, 100.0)
    dff = (raw - f0) / f0
    return raw, f0, dff


def _every_figure():
    """(name, builder, axis labels that must appear) for every figure function."""
    raw, f0, dff = _trace_data()
    rng = np.random.default_rng(2)
    time_s = np.arange(45) / FRAME_RATE
    sos = scipy.signal.butter(4, 3.0, fs=FRAME_RATE, output="sos")
    freq, response = scipy.signal.sosfreqz(sos, worN=256, fs=FRAME_RATE)
    rates = np.array([5.0, 10.0, 20.0, 40.0, 80.0, 160.0])
    return [
        ("stages", lambda: stages_figure(FRAME_RATE, raw, f0=f0, dff=dff, filtered=dff * 0.5, denoised=dff * 0.2,
                                         spike_times=[1.0, 1.0, 2.5], true_spike_times=[1.01, 2.49],
                                         roi_label="ROI 7"), {"time (s)", "ΔF/F", "F (a.u.)"}),
        ("stages-raw-only", lambda: stages_figure(FRAME_RATE, raw), {"time (s)", "F (a.u.)"}),
        ("noise-bars", lambda: noise_figure(rng.uniform(0.01, 0.05, 9)), {"noise SD (ΔF/F)", "ROI"}),
        ("noise-strip", lambda: noise_figure(rng.uniform(0.01, 0.05, 300)), {"noise SD (ΔF/F)", "ROI"}),
        ("distribution", lambda: distribution_figure(rng.normal(0.6, 0.1, 80), name="half-decay time", unit="s",
                                                     reference_range=(0.4, 0.8)), {"half-decay time (s)", "count"}),
        ("filter", lambda: filter_response_figure(freq, np.abs(response), np.abs(response) ** 2,
                                                  half_power_hz=2.6, frame_rate=FRAME_RATE),
         {"frequency (Hz)", "gain (dB)"}),
        ("prediction", lambda: prediction_figure(FRAME_RATE, dff, dff * 0.8, [1.0, 2.0], roi_label="ROI 2"),
         {"time (s)", "ΔF/F"}),
        ("kernel", lambda: kernel_figure(time_s, fitted=np.exp(-time_s / 0.4), free_form=np.exp(-time_s[::3] / 0.5),
                                         free_form_time_s=time_s[::3], reference=np.exp(-time_s / 0.45)),
         {"time after spike (s)", "ΔF/F per spike"}),
        ("raster-ticks", lambda: raster_figure([np.sort(rng.uniform(0, 10, 12)) for _ in range(15)], 10.0),
         {"time (s)", "ROI"}),
        ("raster-image", lambda: raster_figure([np.sort(rng.uniform(0, 10, 5)) for _ in range(400)], 10.0,
                                               max_rois=100), {"time (s)", "ROI"}),
        ("score-bars", lambda: score_figure(rng.uniform(size=6), rng.uniform(size=6), rng.uniform(size=6),
                                            bin_widths_s=[0.1, 0.5, 1.0], correlation=rng.uniform(size=(6, 3)),
                                            tolerance_s=0.1), {"bin width (s)", "score (0 to 1)"}),
        ("score-strip", lambda: score_figure(rng.uniform(size=60), rng.uniform(size=60), rng.uniform(size=60)),
         {"score (0 to 1)"}),
        ("planner", lambda: detection_figure(rates, rng.uniform(size=(3, 6)), noise_sd=[0.01, 0.03, 0.1],
                                           probability_error=np.full((3, 6), 0.05),
                                           shortest_interval_s=np.outer([1, 2, 3], 1 / rates),
                                           target_probability=0.9),
         {"frame rate (Hz)", "detection probability", "shortest resolvable interval (s)"}),
    ]


FIGURES = _every_figure()


def _axis_labels(fig: Figure) -> set:
    return {label for ax in fig.axes for label in (ax.get_xlabel(), ax.get_ylabel()) if label}


# ---------------------------------------------------------------------------
# the look: colours
# ---------------------------------------------------------------------------
def _linear_rgb(hex_colour: str) -> np.ndarray:
    # sRGB transfer function, IEC 61966-2-1:1999
    c = np.array([int(hex_colour[i:i + 2], 16) / 255.0 for i in (1, 3, 5)])
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def _cielab(linear_rgb: np.ndarray) -> np.ndarray:
    # sRGB (D65) -> XYZ -> CIELAB, CIE 15:2004 formulas
    xyz = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]) \
        @ np.clip(linear_rgb, 0.0, 1.0)
    t = xyz / np.array([0.95047, 1.0, 1.08883])
    f = np.where(t > (6 / 29) ** 3, np.cbrt(t), t / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


# Machado, Oliveira & Fernandes (2009), IEEE TVCG 15(6):1291-1298, severity 1.0 matrices (linear RGB)
_DICHROMACY = {
    "protanopia": np.array([[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
    "tritanopia": np.array([[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
                            [0.004733, 0.691367, 0.303900]]),
}


@pytest.mark.parametrize("vision", ["normal"] + sorted(_DICHROMACY))
def test_palette_colours_stay_distinct_under_simulated_colour_blindness(vision):
    # Machado et al. (2009) simulation; CIELAB ΔE*ab (CIE 1976). A ΔE of about 10 is easily told apart
    # side by side (common practice); normal vision gets a stricter 30.
    matrix = np.eye(3) if vision == "normal" else _DICHROMACY[vision]
    lab = {name: _cielab(matrix @ _linear_rgb(colour)) for name, colour in PALETTE.items()}
    floor = 30.0 if vision == "normal" else 10.0
    for (a, la), (b, lb) in itertools.combinations(lab.items(), 2):
        assert np.linalg.norm(la - lb) >= floor, (vision, a, b)


@pytest.mark.parametrize("name", ["ink", "orange", "blue", "plum"])
def test_line_colours_have_3_to_1_contrast_on_white(name):
    # WCAG 2.1 success criterion 1.4.11 (non-text contrast >= 3:1), relative luminance per WCAG 2.1
    luminance = float(_linear_rgb(PALETTE[name]) @ [0.2126, 0.7152, 0.0722])
    assert (1.0 + 0.05) / (luminance + 0.05) >= 3.0


# ---------------------------------------------------------------------------
# every figure: runs, is labelled, writes a readable PNG of the right size
# ---------------------------------------------------------------------------
@pytest.mark.parametrize("name,build,labels", FIGURES, ids=[f[0] for f in FIGURES])
def test_every_figure_writes_a_png_of_the_expected_size(tmp_path, name, build, labels):
    fig = build()
    assert isinstance(fig, Figure)
    assert fig._suptitle is not None and fig._suptitle.get_text().strip()
    assert labels <= _axis_labels(fig)
    width_in, height_in = fig.get_size_inches()
    path = save_figure(fig, tmp_path / f"{name}.png", dpi=60)
    with Image.open(path) as image:  # PIL reads it back as a PNG of figure size x dpi
        assert image.format == "PNG"
        assert image.size == (round(width_in * 60), round(height_in * 60))
        colours = image.convert("RGB").getcolors(maxcolors=1 << 20)
    assert len(colours) > 20  # something was drawn, not a blank canvas
    assert sorted(p.name for p in tmp_path.iterdir()) == [f"{name}.png"]  # no temporary file left over


def test_save_figure_closes_the_figure_and_refuses_other_suffixes(tmp_path):
    fig = noise_figure([0.1, 0.2])
    with pytest.raises(ValueError, match="path"):
        save_figure(fig, tmp_path / "noise.jpg")
    save_figure(fig, tmp_path / "sub" / "noise.png", dpi=40)
    assert fig.axes == []  # closed: cleared after writing
    assert (tmp_path / "sub" / "noise.png").is_file()


def test_library_never_touches_pyplot():
    # a fresh interpreter: drawing and saving every kind of figure must not import matplotlib.pyplot
    code = ("import sys, tempfile, os\n"
            "import calcium.report as r\n"
            "f = r.stages_figure(10.0, [1.0, 2.0, 3.0], spike_times=[0.1])\n"
            "r.save_figure(f, os.path.join(tempfile.mkdtemp(), 'a.png'))\n"
            "print('matplotlib.pyplot' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"


# ---------------------------------------------------------------------------
# what the figures draw
# ---------------------------------------------------------------------------
def test_repeated_spike_times_become_one_stem_as_tall_as_the_count():
    times = [0.5, 0.5, 0.5, 1.2, 2.0, 2.0]
    fig = stages_figure(FRAME_RATE, np.ones(90), spike_times=times, true_spike_times=[0.5])
    spikes_ax = fig.axes[1]
    stems = [c for c in spikes_ax.collections if isinstance(c, LineCollection)]
    assert len(stems) == 1
    tops = sorted((seg[0, 0], seg[1, 1]) for seg in stems[0].get_segments())
    where, counts = np.unique(times, return_counts=True)  # numpy as the reference counter
    np.testing.assert_allclose(tops, np.column_stack([where, counts]))
    assert "6 in total" in spikes_ax.get_title(loc="left")


def test_missing_frames_are_shaded_half_a_frame_beyond_each_end():
    # each frame stands for the interval of half a frame period either side of k / frame_rate
    # (sample-and-hold view of a frame, common practice)
    raw = np.ones(100)
    raw[20:25] = np.nan
    fig = stages_figure(FRAME_RATE, raw)
    shades = [c for c in fig.axes[0].collections if isinstance(c, PolyCollection)]
    assert len(shades) == 1
    xs = np.concatenate([p.vertices[:, 0] for p in shades[0].get_paths()])
    assert xs.min() == pytest.approx(19.5 / FRAME_RATE)
    assert xs.max() == pytest.approx(24.5 / FRAME_RATE)
    assert "5 of 100 frames missing" in fig._suptitle.get_text()


def test_a_lone_missing_frame_in_a_long_recording_stays_visible():
    raw = np.ones(30_000)
    raw[1000] = np.nan
    fig = stages_figure(FRAME_RATE, raw)
    band = [c for c in fig.axes[0].collections if isinstance(c, PolyCollection)][0].get_paths()[0].vertices[:, 0]
    duration_s = raw.size / FRAME_RATE
    assert band.max() - band.min() == pytest.approx(duration_s / 400)  # widened to 1/400 of the axis
    assert 0.5 * (band.max() + band.min()) == pytest.approx(1000 / FRAME_RATE)  # still centred on the frame


def test_missing_frames_can_be_given_explicitly():
    mask = np.zeros(50, bool)
    mask[[3, 4]] = True
    fig = stages_figure(FRAME_RATE, np.ones(50), missing=mask)
    assert "2 of 50 frames missing" in fig._suptitle.get_text()
    with pytest.raises(ValueError, match="missing"):
        stages_figure(FRAME_RATE, np.ones(50), missing=np.zeros(49, bool))


def test_zero_phase_gain_in_db_is_twice_the_single_pass_loss():
    # A Butterworth filter is 3.01 dB down at its cutoff (Butterworth 1930; scipy.signal.butter);
    # forward-backward squares the gain, hence 6.02 dB down there (scipy.signal.filtfilt docs).
    sos = scipy.signal.butter(4, 3.0, fs=FRAME_RATE, output="sos")
    freq, response = scipy.signal.sosfreqz(sos, worN=2048, fs=FRAME_RATE)
    fig = filter_response_figure(freq, np.abs(response), np.abs(response) ** 2, frame_rate=FRAME_RATE)
    ax = fig.axes[0]
    lines = {line.get_label(): line for line in ax.get_lines()}
    single = lines["one pass"]
    zero = lines["zero phase (forward-backward)"]
    assert np.interp(3.0, single.get_xdata(), single.get_ydata()) == pytest.approx(-10 * np.log10(2), abs=0.01)
    assert np.interp(3.0, zero.get_xdata(), zero.get_ydata()) == pytest.approx(-20 * np.log10(2), abs=0.01)
    guides = sorted(line.get_ydata()[0] for line in ax.get_lines() if line.get_label().startswith("-"))
    assert guides == [-6.0, -3.0]
    assert ax.get_xlim()[1] == pytest.approx(FRAME_RATE / 2)  # Nyquist
    assert ax.get_ylim()[0] >= -80.0  # the stop band is floored, not -inf


def test_filter_figure_draws_a_designed_filter():
    filters = pytest.importorskip("calcium.signal.filters")
    filt = filters.design_filter("bandpass", (0.5, 3.0), FRAME_RATE)
    fig = filter_figure(filt, n_points=512)
    verticals = [line for line in fig.axes[0].get_lines() if line.get_xdata()[0] == line.get_xdata()[-1]]
    assert sorted(line.get_xdata()[0] for line in verticals) == pytest.approx(sorted(filt.half_power_hz))


def test_kernel_objects_are_sampled_at_the_given_times():
    kernel_module = pytest.importorskip("calcium.kernel")
    kernel = kernel_module.Kernel(0.05, 0.5)
    time_s = np.arange(40) / FRAME_RATE
    fig = kernel_figure(time_s, fitted=kernel)
    line = [l for l in fig.axes[0].get_lines() if l.get_label() == "fitted model"][0]
    np.testing.assert_allclose(line.get_ydata(), kernel.impulse_response(FRAME_RATE, 40))
    with pytest.raises(ValueError, match="evenly spaced"):
        kernel_figure(time_s ** 2, fitted=kernel)


def test_kernel_fit_figure_draws_the_fit_its_free_form_and_the_reference():
    fit_module = pytest.importorskip("calcium.fit")
    forward = pytest.importorskip("calcium.forward")
    kernel_module = pytest.importorskip("calcium.kernel")
    rng = np.random.default_rng(3)
    truth = kernel_module.Kernel(0.05, 0.6, amplitude=0.3)
    spikes = np.sort(rng.uniform(0.0, 95.0, 40))
    dff = forward.predict_fluorescence(spikes, truth, FRAME_RATE, 3000) + rng.normal(0.0, 0.02, 3000)
    fit = fit_module.fit_kernel(dff, spikes, FRAME_RATE, model="free", n_bootstrap=0)
    fig = kernel_fit_figure(fit, reference=truth, samples_per_frame=4)
    lines = {line.get_label(): line for line in fig.axes[0].get_lines()}
    fitted = lines["fitted double exponential"]
    np.testing.assert_allclose(fitted.get_xdata()[:5], np.arange(5) / (4 * FRAME_RATE))
    np.testing.assert_allclose(fitted.get_ydata(), fit.kernel.impulse_response(4 * FRAME_RATE, fitted.get_xdata().size))
    free = lines["free-form estimate"]
    np.testing.assert_allclose(free.get_xdata(), fit.impulse_time_s)
    np.testing.assert_allclose(free.get_ydata(), fit.impulse_response)
    assert "published kinetics" in lines
    assert f"{fit.n_isolated} isolated spikes" in fig._suptitle.get_text()


def test_raster_of_thousands_of_rois_is_an_image_of_binned_counts(tmp_path):
    rng = np.random.default_rng(5)
    trains = [np.sort(rng.uniform(0, 60.0, rng.integers(0, 20))) for _ in range(3000)]
    fig = raster_figure(trains, 60.0, max_rois=150, max_bins=300)
    image = fig.axes[0].images[0].get_array()
    rows = np.concatenate([np.full(t.size, i // 20) for i, t in enumerate(trains)])
    expected, _, _ = np.histogram2d(rows, np.concatenate(trains), bins=(150, 300), range=((0, 150), (0, 60.0)))
    np.testing.assert_array_equal(image, expected)  # numpy's 2-D histogram as the reference
    assert image.sum() == sum(t.size for t in trains)
    size = (fig.get_size_inches() * 100).round()
    path = save_figure(fig, tmp_path / "raster.png")
    assert path.stat().st_size < 400_000
    with Image.open(path) as png:
        assert png.size == tuple(size.astype(int))


def test_raster_of_few_rois_draws_one_row_of_ticks_per_roi():
    trains = {3: [0.1, 0.5], 1: [0.2], 7: []}
    fig = raster_figure(trains, 1.0)
    ax = fig.axes[0]
    assert not ax.images
    assert len(ax.collections) == 3
    assert [t.get_text() for t in ax.get_yticklabels()] == ["1", "3", "7"]  # dict keys, sorted


def test_planner_draws_one_line_per_noise_level_with_error_bars():
    rates = np.array([10.0, 20.0, 40.0])
    prob = np.array([[0.9, 0.95, 0.99], [0.5, 0.7, 0.8]])
    lower = np.full((2, 3), 0.05)
    upper = np.full((2, 3), 0.01)
    fig = detection_figure(rates, prob, noise_sd=[0.01, 0.05], probability_error=np.stack([lower, upper]))
    ax = fig.axes[0]
    assert [c.get_label() for c in ax.containers] == ["0.01", "0.05"]
    np.testing.assert_allclose([c.lines[0].get_ydata() for c in ax.containers], prob)
    for container, level in zip(ax.containers, prob):
        segments = container.lines[2][0].get_segments()
        np.testing.assert_allclose([seg[:, 1] for seg in segments], np.column_stack([level - 0.05, level + 0.01]))


def test_score_figure_draws_the_median_correlation_over_rois():
    rng = np.random.default_rng(9)
    correlation = rng.uniform(size=(7, 4))
    correlation[2, 1] = np.nan
    widths = np.array([0.5, 0.1, 1.0, 0.2])
    fig = score_figure(np.full(7, 0.5), np.full(7, 0.6), np.full(7, 0.7), bin_widths_s=widths,
                       correlation=correlation)
    median = [line for line in fig.axes[1].get_lines() if line.get_label() == "median over ROIs"][0]
    order = np.argsort(widths)
    np.testing.assert_allclose(median.get_xdata(), widths[order])
    np.testing.assert_allclose(median.get_ydata(), np.nanmedian(correlation, axis=0)[order])  # numpy reference


def test_distribution_counts_values_outside_the_reference_range():
    values = np.array([0.1, 0.5, 0.6, 0.9, np.nan, 1.5])
    fig = distribution_figure(values, name="half-decay time", unit="s", reference_range=(0.4, 1.0))
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "published range (2 of 5 outside)" in labels
    assert "median 0.6 s" in labels  # numpy: np.median([0.1, 0.5, 0.6, 0.9, 1.5]) == 0.6
    assert "1 not available" in fig._suptitle.get_text()


def test_plan_figure_draws_the_plan_with_its_intervals_as_error_bars():
    plan_module = pytest.importorskip("calcium.plan")
    plan = plan_module.plan_detectability(frame_rates=(10.0, 30.0, 60.0), noise_sd=(0.05, 0.3), n_trials=30,
                                          intervals_s=(0.1, 0.5, 1.0), seed=1)
    fig = plan_figure(plan)
    detect_ax, interval_ax = fig.axes[:2]
    assert [c.get_label() for c in detect_ax.containers] == [f"{sd:.3g}" for sd in plan.noise_sd]
    for j, container in enumerate(detect_ax.containers):  # plan arrays are [frame rate, noise level]
        np.testing.assert_allclose(container.lines[0].get_xdata(), plan.frame_rates)
        np.testing.assert_allclose(container.lines[0].get_ydata(), plan.detection[:, j])
        ends = np.array([seg[:, 1] for seg in container.lines[2][0].get_segments()])
        np.testing.assert_allclose(ends, plan.detection_ci[:, j, :])
    for j, line in enumerate(interval_ax.get_lines()):
        np.testing.assert_allclose(line.get_ydata(), plan.shortest_resolved_interval_s[:, j])


@pytest.mark.parametrize("call,argument", [
    (lambda: stages_figure(FRAME_RATE, np.ones(10), f0=np.ones(9)), "f0"),
    (lambda: stages_figure(-1.0, np.ones(10)), "frame_rate"),
    (lambda: stages_figure(FRAME_RATE, np.ones((2, 10))), "raw"),
    (lambda: stages_figure(FRAME_RATE, np.ones(10), spike_times=[np.nan]), "spike_times"),
    (lambda: prediction_figure(FRAME_RATE, np.ones(10), np.ones(11), []), "predicted_dff"),
    (lambda: noise_figure([0.1, 0.2], labels=["a"]), "labels"),
    (lambda: distribution_figure([1.0], name="x", unit="s", reference_range=(2.0, 1.0)), "reference_range"),
    (lambda: filter_response_figure([0, 1], [1, 1], [1], frame_rate=2.0), "zero_phase_gain"),
    (lambda: kernel_figure([0.0, 0.1]), "at least one"),
    (lambda: raster_figure([[0.1]], 0.0), "duration_s"),
    (lambda: raster_figure(np.array([0.1, 0.2]), 1.0), "spike_times_per_roi"),
    (lambda: score_figure([0.5], [1.5], [0.5]), "recall"),
    (lambda: score_figure([0.5], [0.5], [0.5], correlation=[0.1]), "bin_widths_s"),
    (lambda: score_figure([0.5], [0.5], [0.5], tolerance_s=-0.1), "tolerance_s"),
    (lambda: detection_figure([10.0, 20.0], [[0.5, 0.6]], noise_sd=[0.1, 0.2]), "noise_sd"),
    (lambda: detection_figure([10.0, 20.0], [0.5, 0.6], noise_sd=0.1, probability_error=[0.1]),
     "probability_error"),
])
def test_bad_arguments_raise_value_error_naming_them(call, argument):
    with pytest.raises(ValueError, match=re.escape(argument)):
        call()


# ---------------------------------------------------------------------------
# HTML report
# ---------------------------------------------------------------------------
class _Page(HTMLParser):
    """Collects what the tests look at in a written page."""

    def __init__(self):
        super().__init__()
        self.images, self.scripts, self.links, self.rows = [], 0, [], []
        self._in_body_row = False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.images.append(attrs["src"])
        elif tag == "script":
            self.scripts += 1
        elif tag in ("a", "link"):
            self.links.append(attrs.get("href", ""))
        if tag == "tr":
            self.rows.append(attrs.get("class", ""))


def _parse(path: Path) -> _Page:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


def _example_report(tmp_path: Path, *, roi_label="ROI 1") -> HtmlReport:
    raw, f0, dff = _trace_data()
    external = save_figure(noise_figure([0.02, 0.03]), tmp_path / "outside" / "noise.png")
    report = HtmlReport("Session 4", subtitle="layer 2/3, 30 Hz")
    report.add_text("Opening remarks.")
    report.add_section("Traces", "One ROI through every stage.")
    report.add_figure(stages_figure(FRAME_RATE, raw, f0=f0, dff=dff, roi_label=roi_label),
                      caption=f"Stages of {roi_label}", name="stages")
    report.add_figure(external, caption="Noise per ROI", name="noise")
    report.add_section("Scores")
    report.add_figure(distribution_figure([0.1, 0.2, 0.3], name="F1", unit=""), caption="F1 over ROIs")
    report.add_table(["ROI", "noise SD (ΔF/F)", "label"],
                     [[0, 10, "b"], [1, 9, roi_label], [2, 100.5, "a"], [3, float("nan"), "c"],
                      [4, -2.5, "d"], [5, 1e-3, "e"], [6, float("inf"), "f"]],
                     caption="Per-ROI summary", flags=[None, "low signal", None, True, None, None, ""])
    return report


def test_report_contains_every_figure_and_the_images_exist(tmp_path):
    page = _example_report(tmp_path).write(tmp_path / "report")
    assert page == tmp_path / "report" / "index.html"
    parsed = _parse(page)
    assert parsed.images == ["figures/stages.png", "figures/noise.png", "figures/figure-3.png"]
    for src in parsed.images:
        with Image.open(page.parent / src) as image:
            assert image.format == "PNG" and image.size[0] > 100
    assert sorted(p.name for p in (page.parent / "figures").iterdir()) == ["figure-3.png", "noise.png", "stages.png"]
    assert sorted(p.name for p in page.parent.iterdir()) == ["figures", "index.html"]  # no temporary files


def test_report_uses_no_network_assets(tmp_path):
    page = _example_report(tmp_path).write(tmp_path / "report")
    text = page.read_text(encoding="utf-8")
    parsed = _parse(page)
    assert all(link.startswith("#") for link in parsed.links)  # contents links only
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:|//)""", text)
    assert "@import" not in text and "url(" not in text
    assert "default-src 'none'" in text  # Content Security Policy blocks anything else


def test_all_text_is_escaped(tmp_path):
    report = _example_report(tmp_path, roi_label=HOSTILE)
    report.title = HOSTILE
    report.add_section(HOSTILE, HOSTILE)
    page = report.write(tmp_path / "report")
    text = page.read_text(encoding="utf-8")
    assert "<script>alert" not in text
    assert html.escape(HOSTILE) in text  # the standard library's escaping as the reference
    assert _parse(page).scripts == 1  # only the report's own script


def test_footer_names_the_version_and_the_creation_time(tmp_path):
    page = _example_report(tmp_path).write(tmp_path / "report")
    footer = page.read_text(encoding="utf-8").split("<footer>")[1]
    assert f"calcium {calcium.__version__}" in footer
    stamp = re.search(r'datetime="([^"]+)"', footer).group(1)
    assert abs(datetime.fromisoformat(stamp) - datetime.now(timezone.utc)) < timedelta(minutes=5)


def test_flagged_rows_are_highlighted_with_their_note(tmp_path):
    page = _example_report(tmp_path).write(tmp_path / "report")
    parsed = _parse(page)
    assert parsed.rows[1:] == ["", "flagged", "", "flagged", "", "", ""]  # rows[0] is the header
    text = page.read_text(encoding="utf-8")
    assert '<td>low signal</td>' in text and ">note<" in text


def test_table_numbers_show_3_significant_digits_and_sort_by_their_full_value(tmp_path):
    report = HtmlReport("numbers")
    report.add_table(["value"], [[1 / 3], [12345.678], [7], [None], [float("-inf")]])
    text = report.to_html()
    # Python's repr() round-trips a float exactly (Python docs, "Floating Point Arithmetic")
    assert f'data-value="{1 / 3!r}">0.333<' in text
    assert 'data-value="12345.678">1.23e+04<' in text
    assert 'data-value="7">7<' in text
    assert 'data-value="">' in text  # None: empty, sorts last
    assert 'data-value="-Infinity">−∞<' in text


def test_write_refuses_a_path_that_is_a_file(tmp_path):
    report = _example_report(tmp_path)
    target = tmp_path / "taken"
    target.write_text("keep me")
    with pytest.raises(ValueError, match="is a file"):
        report.write(target)
    assert target.read_text() == "keep me"
    folder = tmp_path / "other"
    folder.mkdir()
    (folder / "figures").write_text("not a folder")
    with pytest.raises(ValueError, match="figures"):
        report.write(folder)


def test_writing_again_replaces_the_page(tmp_path):
    report = HtmlReport("First")
    report.add_text("one")
    page = report.write(tmp_path)
    report.add_text("two")
    assert report.write(tmp_path) == page
    assert "<p>two</p>" in page.read_text(encoding="utf-8")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["index.html"]


@pytest.mark.parametrize("call,argument", [
    (lambda r: r.add_figure(noise_figure([0.1]), caption="a", name="../up"), "name"),
    (lambda r: r.add_figure("missing.png", caption="a"), "path_or_fig"),
    (lambda r: r.add_figure(3, caption="a"), "path_or_fig"),
    (lambda r: r.add_table(["a", "b"], [[1, 2], [3]]), "rows[1]"),
    (lambda r: r.add_table(["a"], [[1]], flags=[None, None]), "flags"),
    (lambda r: r.add_section(""), "heading"),
    (lambda r: r.add_text(5), "text"),
])
def test_report_rejects_bad_arguments(call, argument):
    report = HtmlReport("x")
    with pytest.raises(ValueError, match=re.escape(argument)):
        call(report)


def test_figure_names_must_be_unique():
    report = HtmlReport("x")
    report.add_figure(noise_figure([0.1]), caption="a", name="same")
    with pytest.raises(ValueError, match="already used"):
        report.add_figure(noise_figure([0.2]), caption="b", name="same")


# ---------------------------------------------------------------------------
# the page in a real browser (headless Chromium)
# ---------------------------------------------------------------------------
# Clicks the "noise SD" heading twice after the page has loaded and writes the order of the column
# onto <body>; --dump-dom then prints the page as the browser left it.
_PROBE = """<script>
window.addEventListener("load", function () {
  var table = document.querySelector("table.sortable");
  function column(k) {
    return Array.prototype.map.call(table.tBodies[0].rows, function (row) {
      return row.cells[k].textContent; }).join("|");
  }
  function click(k) { table.tHead.rows[0].cells[k].querySelector("button").click(); }
  click(1); document.body.dataset.ascending = column(1);
  click(1); document.body.dataset.descending = column(1);
  click(2); document.body.dataset.text = column(2);
});
</script>
</body>"""


def _probe_copy(page: Path) -> Path:
    probe = page.with_name("probe.html")
    probe.write_text(page.read_text(encoding="utf-8").replace("</body>", _PROBE), encoding="utf-8")
    return probe


def test_browser_loads_every_image_and_sorts_numbers_numerically(tmp_path, browse):
    page = _example_report(tmp_path).write(tmp_path / "report")
    seen = browse(_probe_copy(page), tmp_path / "profile")
    assert seen["images-total"] == "3"
    assert seen["images-loaded"] == "3"
    # numbers by value (a text sort would put 10 before 9 and 100.5 before 9); empty (NaN) cells last
    assert seen["ascending"] == "-2.5|0.001|9|10|100|∞|"
    assert seen["descending"] == "∞|100|10|9|0.001|-2.5|"
    assert seen["text"] == "a|b|c|d|e|f|ROI 1"  # text columns sort as text


def test_browser_page_reports_images_that_cannot_be_shown(tmp_path, browse):
    page = _example_report(tmp_path).write(tmp_path / "report")
    (page.parent / "figures" / "noise.png").unlink()
    seen = browse(_probe_copy(page), tmp_path / "profile")
    assert (seen["images-loaded"], seen["images-total"]) == ("2", "3")


def test_the_former_name_of_the_detection_figure_still_works_with_a_deprecation_warning():
    from calcium.report import planner_figure

    with pytest.warns(DeprecationWarning, match="detection_figure"):
        fig = planner_figure([10.0, 20.0], [[0.5, 0.6]], noise_sd=[0.1])
    assert fig.axes


# ---------------------------------------------------------------------------
# the session report, laid out from data handed in (no results file)
# ---------------------------------------------------------------------------
def _page_text(page: Path) -> str:
    text = re.sub(r"<(script|style)[^>]*>.*?</\1>", "", page.read_text(encoding="utf-8"), flags=re.S)
    return " ".join(html.unescape(re.sub(r"<[^>]+>", " ", text)).split())


def _session_data(n_rois=3, *, flagged=()):
    from calcium.report.session import ExampleRoi, SessionData

    rng = np.random.default_rng(0)
    n_frames = 600
    flags = np.zeros(n_rois, dtype=np.int64)
    flags[list(flagged)] = 2
    per_roi = {"noise_sd": np.full(n_rois, 0.02), "snr": np.linspace(3.0, 9.0, n_rois),
               "n_spikes": np.arange(n_rois) + 1, "missing_frames": np.zeros(n_rois, dtype=int),
               "f0_min": np.full(n_rois, np.nan), "quality_flags": flags,
               "flags": np.array(["low SNR" if f else "" for f in flags]),
               "kernel_rise_s": np.full(n_rois, 0.01), "kernel_decay_s": np.full(n_rois, 0.4),
               "kernel_amplitude": np.full(n_rois, 0.2)}
    trains = [np.sort(rng.uniform(0, n_frames / FRAME_RATE, k + 1)) for k in range(n_rois)]
    dff = rng.normal(0, 0.02, n_frames)
    examples = [ExampleRoi(roi=r, raw=1.0 + dff, where="raw F (handed in)", traces={"dff": dff, "denoised": dff * 0},
                           flags=str(per_roi["flags"][r])) for r in range(n_rois)]
    return SessionData(results_path="results.h5", calcium_version="test", inputs={}, frame_rate=FRAME_RATE,
                       n_rois=n_rois, n_frames=n_frames, per_roi=per_roi, flag_names={2: "low SNR"},
                       flag_descriptions=[str(f) for f in per_roi["flags"]], failed=np.zeros(n_rois, bool),
                       spike_times=trains, examples=examples)


def test_session_report_lays_out_the_data_it_is_handed(tmp_path):
    from calcium.report.session import session_report

    session = _session_data()
    page = session_report(session).write(tmp_path / "report")
    text = _page_text(page)
    # 1 + 2 + 3 spikes handed in
    assert "6 spikes inferred in total" in text
    assert "3 ROIs, 600 frames at 30 Hz" in text
    for roi in range(3):
        assert (tmp_path / "report" / "figures" / f"roi-{roi}.png").is_file()
    assert "All 3 ROIs." in text
    assert "fitted kernels and scores" not in text and "Periodic artefacts" not in text


def test_examples_text_mentions_a_flagged_roi_only_when_one_is_shown(tmp_path):
    from calcium.report.session import session_report

    none_flagged = _page_text(session_report(_session_data()).write(tmp_path / "a"))
    assert "flagged" not in none_flagged.split("Example ROIs through the stages")[1].split("ROI 0")[0]
    last_flagged = _page_text(session_report(_session_data(flagged=(2,))).write(tmp_path / "b"))
    assert "a flagged ROI last (ROI 2: low SNR)" in last_flagged


def test_close_up_window_holds_the_densest_run_of_events():
    from calcium.report.session import event_window

    # a burst of 5 events at 40-43 s and lone events elsewhere in a 100-s recording; a 10-s window
    events = [5.0, 40.0, 41.0, 42.0, 42.5, 43.0, 90.0]
    start = event_window(events, 100.0, 10.0)
    assert start == pytest.approx(40.0 - 2.0)  # a fifth of the window before the burst's first event
    assert event_window([], 100.0, 10.0) == pytest.approx(45.0)
    assert event_window([99.5], 100.0, 10.0) == pytest.approx(90.0)  # kept inside the recording
    assert event_window([1.0], 5.0, 10.0) == 0.0


def test_close_up_draws_each_spike_count_once_with_its_number():
    from calcium.report import zoom_figure

    spikes = [1.0, 3.0, 3.0, 3.0, 12.0]  # 12 s is outside the window
    fig = zoom_figure(FRAME_RATE, np.zeros(600), denoised=np.zeros(600), spike_times=spikes,
                      true_spike_times=[1.02, 3.01], start_s=0.5, duration_s=5.0, roi_label="ROI 4")
    numbers = sorted(t.get_text() for t in fig.axes[1].texts)
    assert numbers == ["1", "3"]
    assert fig.axes[1].get_title(loc="left").startswith("inferred spikes: 4 in this window (2 times)")
    assert fig.axes[2].get_title(loc="left") == "electrically recorded spikes: 2 in this window"
    low, high = fig.axes[0].get_xlim()
    assert high - low == pytest.approx(5.0)


def test_a_few_values_are_drawn_as_points_and_many_as_a_histogram():
    few = distribution_figure([0.21, 0.25, 0.4], name="half-decay time", unit="s")
    points = [line for line in few.axes[0].get_lines() if line.get_label() == "3 value(s)"][0]
    np.testing.assert_allclose(points.get_xdata(), [0.21, 0.25, 0.4])
    assert not few.axes[0].patches  # no bars
    many = distribution_figure(np.linspace(0.1, 1.0, 40), name="half-decay time", unit="s")
    assert len(many.axes[0].patches) >= 2 and many.axes[0].get_ylabel() == "count"


def _pixels(artist, fig):
    fig.canvas.draw()
    return artist.get_window_extent(fig.canvas.get_renderer())


def test_score_legend_leaves_the_bars_uncovered_and_bin_widths_read_as_plain_numbers():
    fig = score_figure([1.0, 0.9], [1.0, 0.95], [1.0, 0.92], bin_widths_s=[0.1, 0.2, 0.5, 1.0],
                       correlation=[[0.8, 0.9, 0.95, 0.99], [0.85, 0.9, 0.96, 0.98]])
    legend = _pixels(fig.axes[0].get_legend(), fig)
    for bar in fig.axes[0].patches:
        assert not legend.overlaps(_pixels(bar, fig))
    labels = [t.get_text() for t in fig.axes[1].get_xticklabels() if t.get_text()]
    assert labels == ["0.1", "0.2", "0.5", "1"]


def test_average_around_isolated_spikes_recovers_the_response_to_one_spike():
    from calcium.kernel import Kernel
    from calcium.report.session import isolated_spike_average

    kernel = Kernel(0.05, 0.4, 0.2)
    rate = 30.0
    time = np.arange(int(60 * rate)) / rate
    # isolated spikes between frames, and a pair 0.1 s apart that must be left out
    spikes = np.array([3.013, 9.51, 16.027, 23.3, 30.0, 30.1, 40.77])
    dff = sum(kernel.evaluate(time - t) for t in spikes)
    lag, mean, low, high, n = isolated_spike_average(dff, rate, spikes, isolation_s=2.0, before_s=0.5, after_s=2.0)
    assert n == 5
    # closed form of the kernel (Kernel.evaluate), up to the linear interpolation between frames, which
    # smooths the jump at the spike over the frame interval around it
    smooth = np.abs(lag) > 1.0 / rate
    np.testing.assert_allclose(mean[smooth], kernel.evaluate(lag[smooth]), atol=0.02 * kernel.amplitude)
    assert mean.max() == pytest.approx(kernel.amplitude, rel=0.05)
    assert np.all(low <= mean + 1e-12) and np.all(mean <= high + 1e-12)


def test_kernel_evidence_draws_the_bootstrap_band_around_the_fit():
    from calcium.kernel import Kernel
    from calcium.report.session import kernel_evidence

    rate, kernel = 20.0, Kernel(0.03, 0.3, 0.15)
    time = np.arange(int(40 * rate)) / rate
    spikes = np.arange(2.0, 38.0, 3.0)
    dff = sum(kernel.evaluate(time - t) for t in spikes)
    fit = {"rise_s": 0.03, "decay_s": 0.3, "amplitude": 0.15, "half_decay_s": kernel.half_decay_s,
           "half_decay_low_s": 0.8 * kernel.half_decay_s, "half_decay_high_s": 1.25 * kernel.half_decay_s}
    fig = kernel_evidence(dff, spikes, rate, fit, "GCaMP6f", roi_label="ROI 0")
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "bootstrap interval of the fit" in labels and "GCaMP6f (published range)" in labels
    assert "average of 12 isolated" in fig._suptitle.get_text()
    assert kernel_evidence(dff, spikes, rate, {**fit, "decay_s": np.nan}) is None


def test_filter_gain_below_the_floor_ends_at_the_axis_instead_of_running_flat():
    # a Butterworth low-pass falls to -inf dB at the Nyquist frequency (scipy.signal.butter, bilinear transform)
    b, a = scipy.signal.butter(4, 3.0, fs=30.0)
    freq, response = scipy.signal.freqz(b, a, worN=512, fs=30.0)
    fig = filter_response_figure(freq, np.abs(response), np.abs(response) ** 2, frame_rate=30.0, floor_db=-80.0)
    zero = [line for line in fig.axes[0].get_lines() if line.get_label().startswith("zero phase")][0]
    drawn = np.asarray(zero.get_ydata(), dtype=float)
    assert np.count_nonzero(drawn <= -80.0) == 1  # only the crossing
    assert np.isnan(drawn[-1])
    assert "below -80 dB: not drawn" in [t.get_text() for t in fig.axes[0].get_legend().get_texts()]


def test_detection_lines_differ_beyond_colour_and_the_session_rate_is_marked():
    fig = detection_figure([10.0, 30.0, 60.0], [[1.0, 1.0, 1.0], [1.0, 1.0, 1.0]], noise_sd=[0.05, 0.1],
                           session_frame_rate=30.0)
    ax = fig.axes[0]
    drawn = [line for line in ax.get_lines() if line.get_marker() not in (None, "None", "")]
    assert len({(line.get_marker(), line.get_linestyle()) for line in drawn}) == 2  # apart even on top of each other
    assert "this session, 30 Hz" in [t.get_text() for t in ax.texts]
    assert any(np.allclose(line.get_xdata(), 30.0) for line in ax.get_lines() if line not in drawn)


@pytest.mark.parametrize("width", [1400, 375])
def test_long_paths_and_captions_stay_inside_the_page_on_wide_and_phone_screens(tmp_path, browse, width):
    report = HtmlReport("Session", subtitle="/data/" + "segment" * 40 + "/results.h5")
    report.add_section("Summary")
    report.add_text("Results: /data/" + "a" * 200 + "/results.h5")
    report.add_table(["ROI", "noise SD (ΔF/F)"], [[0, 0.02]], caption="c" * 300)
    report.add_figure(noise_figure([0.02, 0.03]), name="noise", caption="/" + "b" * 200)
    seen = browse(report.write(tmp_path / "report"), tmp_path / "profile", width=width)
    assert seen["viewport-width"] == str(width)
    assert seen["overflowing"] == "0", seen["overflowing-what"]
