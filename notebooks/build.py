"""Turn the notebook sources ``notebooks/src/*.py`` into executed notebooks ``notebooks/*.ipynb``.

A source is plain Python split into cells by ``# %%`` lines (``# %% [markdown]`` starts a
Markdown cell whose lines are ``# `` comments). Each notebook is executed with nbclient
(in the ``notebooks/`` folder, kernel ``python3``) and stored WITH its outputs, written to a
temporary name in the same folder and renamed. Usage::

    python notebooks/build.py            # every source
    python notebooks/build.py 01_quickstart_kiln   # some of them

``tests/test_notebooks.py`` re-executes the stored notebooks, so they never go stale.
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

import nbformat
from nbclient import NotebookClient

HERE = Path(__file__).resolve().parent
SOURCES = HERE / "src"
TIMEOUT_S = 120  # per cell


def cells_of(text: str) -> list:
    """Split a ``# %%`` source into nbformat cells."""
    cells, kind, lines = [], None, []

    def flush():
        body = "\n".join(lines).strip("\n")
        if kind == "markdown":
            body = "\n".join(ln[2:] if ln.startswith("# ") else ln.lstrip("#") for ln in body.splitlines())
            cells.append(nbformat.v4.new_markdown_cell(body))
        elif kind == "code" and body:
            cells.append(nbformat.v4.new_code_cell(body))

    for line in text.splitlines():
        if line.startswith("# %%"):
            flush()
            kind, lines = ("markdown" if "[markdown]" in line else "code"), []
        elif kind is not None:
            lines.append(line)
    flush()
    return cells


def execute(nb, cwd: Path = HERE) -> float:
    """Execute ``nb`` in place; returns the wall time in seconds (raises on any cell error)."""
    t0 = time.perf_counter()
    env_backend = os.environ.get("MPLBACKEND")
    os.environ["MPLBACKEND"] = "Agg"
    try:
        NotebookClient(
            nb, timeout=TIMEOUT_S, kernel_name="python3", resources={"metadata": {"path": str(cwd)}}
        ).execute()
    finally:
        if env_backend is None:
            os.environ.pop("MPLBACKEND", None)
        else:
            os.environ["MPLBACKEND"] = env_backend
    return time.perf_counter() - t0


def build(name: str) -> float:
    nb = nbformat.v4.new_notebook()
    nb.cells = cells_of((SOURCES / f"{name}.py").read_text())
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    seconds = execute(nb)
    fd, tmp = tempfile.mkstemp(suffix=".ipynb.tmp", dir=HERE)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            nbformat.write(nb, fh)
        os.chmod(tmp, 0o644)  # mkstemp makes it private; a notebook is an ordinary file
        os.replace(tmp, HERE / f"{name}.ipynb")
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return seconds


def main(argv: list[str]) -> int:
    names = argv or sorted(p.stem for p in SOURCES.glob("*.py"))
    for name in names:
        print(f"{name}: executed in {build(name):.1f} s", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
