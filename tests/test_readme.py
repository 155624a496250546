"""The README's modelling script runs as written and gives a sensible posterior."""

import os
import re
from pathlib import Path

import numpy as np
import pytest

README = Path(__file__).resolve().parents[1] / "README.md"


@pytest.mark.slow
def test_readme_script_runs(tmp_path):
    text = README.read_text()
    block = re.search(r"```python\n(.*?)```", text, re.S).group(1)
    here = os.getcwd()
    os.chdir(tmp_path)
    try:
        scope: dict = {}
        exec(compile(block.replace("steps=2000)", "steps=2000, progress=False)"), "README", "exec"), scope)
    finally:
        os.chdir(here)
    result, again = scope["result"], scope["again"]
    assert result.ok and again.summary() == result.summary()
    # the log was generated with k = 0.42 per hour (flowpost/demo.py): the true value lies
    # within 4 posterior standard deviations of the posterior mean (about 0.004 each)
    k = np.asarray(result.particles["k"])
    assert abs(k.mean() - 0.42) < 4 * k.std()
