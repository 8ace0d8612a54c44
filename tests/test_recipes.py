"""Every command of docs/recipes.md runs as printed, in a fresh folder, and does what the text says."""
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

RECIPES = Path(__file__).resolve().parent.parent / "docs" / "recipes.md"


def _blocks():
    return re.findall(r"```bash\n(.*?)```", RECIPES.read_text(encoding="utf-8"), flags=re.S)


def test_the_recipes_link_figures_that_exist():
    text = RECIPES.read_text(encoding="utf-8")
    figures = re.findall(r"\]\((recipes/[^)]+\.png)\)", text)
    assert len(figures) == 3
    assert all((RECIPES.parent / f).is_file() for f in figures)


@pytest.fixture(scope="module")
def ran(tmp_path_factory):
    """The recipes' commands, run in order as a user would (the calcium command of this environment)."""
    folder = tmp_path_factory.mktemp("recipes")
    env = dict(os.environ, PATH=os.path.dirname(sys.executable) + os.pathsep + os.environ.get("PATH", ""))
    for block in _blocks():
        done = subprocess.run(["bash", "-e", "-c", block], cwd=folder, env=env, capture_output=True, text=True)
        assert done.returncode == 0, f"{block}\n{done.stderr}"
    return folder


def test_every_recipe_writes_what_it_says(ran):
    for name in ("predicted.h5", "predicted.png", "spikes.h5", "spikes.csv", "scores/scores.csv",
                 "fit/kernel_fit.csv", "fit/kernel_fit.png", "fit/calibration.json", "spikes-from-fit.csv"):
        assert (ran / name).is_file(), name


def test_the_session_recipe_counts_near_the_truth(ran):
    # ground truth: the simulated spike times (the recipes' invented session)
    from calcium.io import read_spike_times

    truth, found = read_spike_times(ran / "session" / "spikes.csv"), read_spike_times(ran / "spikes.csv")
    ratios = np.array([found.get(r, np.zeros(0)).size / truth[r].size for r in truth])
    assert np.all((ratios > 0.8) & (ratios < 1.25)), ratios
