"""The README's Python example runs as printed and says what its comments promise."""
import contextlib
import io
import re
from pathlib import Path

import numpy as np
import pytest

README = Path(__file__).resolve().parent.parent / "README.md"


def _python_blocks():
    return re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), flags=re.S)


def test_readme_has_a_quick_start_with_the_two_commands():
    text = README.read_text(encoding="utf-8")
    assert 'python -m pip install -e ".[dev]" && calcium demo' in text
    assert 'python -m pip install -e ".[dev]" && python -m pytest' in text


def test_readme_python_example_recovers_the_spikes_it_made():
    blocks = _python_blocks()
    if not blocks:
        pytest.fail("README.md has no ```python block")
    out = io.StringIO()
    namespace = {}
    with contextlib.redirect_stdout(out):
        exec(compile(blocks[0], "README.md", "exec"), namespace)
    lines = out.getvalue().strip().splitlines()
    assert float(lines[0]) == pytest.approx(1.0, abs=0.15)       # the noise it added
    inferred = namespace["result"].spike_times
    true = namespace["true_spikes"]
    assert inferred.size == true.size
    assert np.max(np.abs(np.sort(inferred) - true)) < 1 / namespace["frame_rate"]   # within one frame
