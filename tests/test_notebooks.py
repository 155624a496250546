"""Every notebook in ``notebooks/`` re-executes without an error (nbclient), so none goes stale.

The stored notebooks carry their outputs; this test runs a fresh copy of each in a Jupyter
kernel (``python3``, matplotlib's Agg backend) and fails on the first cell that raises. It
does not compare outputs (they hold timings and float noise). Each notebook is sized to run
in well under a minute on 2 cores.
"""

from __future__ import annotations

import os
from pathlib import Path

import nbformat
import pytest
from nbclient import NotebookClient

pytestmark = pytest.mark.slow  # each notebook runs in its own kernel (scheduled first)

NOTEBOOKS = Path(__file__).resolve().parent.parent / "notebooks"
NAMES = sorted(p.name for p in NOTEBOOKS.glob("*.ipynb"))


def test_there_are_four_notebooks():
    # the issue asks for at least four; a missing one would otherwise pass unnoticed
    assert len(NAMES) >= 4, NAMES


@pytest.mark.parametrize("name", NAMES)
def test_notebook_executes(name, monkeypatch):
    monkeypatch.setenv("MPLBACKEND", "Agg")
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    assert any(c.cell_type == "code" for c in nb.cells)
    client = NotebookClient(nb, timeout=300, kernel_name="python3", resources={"metadata": {"path": str(NOTEBOOKS)}})
    client.execute()  # raises CellExecutionError, naming the cell, on any error
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs if o.output_type == "error"]
    assert not errors
    assert os.environ["MPLBACKEND"] == "Agg"
