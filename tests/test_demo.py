"""The demo session and `calcium demo`: reproducible data, a complete report, the scenario's facts recovered."""
import json

import numpy as np
import pytest

from calcium.demo import DEMO_SCENARIO, demo_data_folder, make_demo_data, run_demo
from calcium.io import read_spike_times


def test_demo_data_is_reproducible_from_its_seed(tmp_path):
    a = make_demo_data(tmp_path / "a")
    b = make_demo_data(tmp_path / "b")
    for name in ("movie.tif", "rois.tif", "electrical_spikes.csv", "truth_spikes.csv"):
        assert (a / name).read_bytes() == (b / name).read_bytes(), name


def test_bundled_demo_data_matches_its_generator(tmp_path):
    bundled = demo_data_folder()
    if bundled is None:
        pytest.skip("no demo_data/ beside the package (installed without the source tree)")
    fresh = make_demo_data(tmp_path / "fresh")
    assert (bundled / "movie.tif").read_bytes() == (fresh / "movie.tif").read_bytes()


def test_demo_movie_stays_small(tmp_path):
    folder = make_demo_data(tmp_path / "d")
    assert (folder / "movie.tif").stat().st_size <= 5_000_000


def test_electrical_spikes_are_the_truth_on_the_later_clock(tmp_path):
    folder = make_demo_data(tmp_path / "d")
    sc = json.loads((folder / "scenario.json").read_text())
    ephys, truth = read_spike_times(folder / "electrical_spikes.csv"), read_spike_times(folder / "truth_spikes.csv")
    assert sorted(ephys) == sorted(DEMO_SCENARIO["patched_rois"])
    for roi, times in ephys.items():
        np.testing.assert_allclose(times + sc["ephys_clock_offset_s"], truth[roi][-times.size:], atol=1e-9)


def test_demo_report_has_every_stage_and_its_images(tmp_path):
    index = run_demo(tmp_path / "report", progress=False)
    page = index.read_text(encoding="utf-8")
    for heading in ("Stages for example ROIs", "Filter and noise", "Indicator kinetics", "Forward model",
                    "Inferred spikes", "Scores", "Planning", "Per-ROI table"):
        assert heading in page
    images = [part.split('"')[0] for part in page.split('src="')[1:]]
    assert len(images) >= 10
    assert all((index.parent / src).stat().st_size > 1000 for src in images)
    # the fitted clock lag is printed; the scenario's offset is +150 ms (within one 67 ms frame)
    lag_ms = float(page.split("clock lag ")[-1].split(" ms")[0])
    assert abs(lag_ms - 150) < 1000 / DEMO_SCENARIO["frame_rate"]


def test_demo_refuses_to_replace_a_folder_that_is_not_a_report(tmp_path):
    precious = tmp_path / "thesis"
    precious.mkdir()
    (precious / "chapter1.txt").write_text("keep")
    with pytest.raises(ValueError, match="not a calcium report"):
        run_demo(precious, progress=False, overwrite=True)
    with pytest.raises(ValueError, match="--overwrite"):
        run_demo(precious, progress=False)
    assert (precious / "chapter1.txt").read_text() == "keep"
