"""Sphinx configuration of the flowpost documentation (``pip install -e '.[docs]'``).

Build: ``python -m sphinx -W --keep-going -b html docs docs/_build/html``. Pages are
Markdown (myst-parser); the API reference is autodoc over the numpy-style docstrings
(napoleon); maths is rendered in the browser by MathJax (no network needed to build).
"""

from __future__ import annotations

import os
import sys

sys.path.insert(0, os.path.abspath(".."))

import flowpost

project = "flowpost"
author = "the flowpost developers"
copyright = "2026, the flowpost developers"
release = flowpost.__version__
version = release

extensions = [
    "myst_parser",
    "sphinx.ext.autodoc",
    "sphinx.ext.napoleon",
    "sphinx.ext.mathjax",
]
source_suffix = {".rst": "restructuredtext", ".md": "markdown"}
exclude_patterns = ["_build", "Thumbs.db", ".DS_Store"]
root_doc = "index"

myst_enable_extensions = ["dollarmath", "amsmath"]
myst_heading_anchors = 3

napoleon_google_docstring = False
napoleon_numpy_docstring = True
napoleon_use_rtype = False
napoleon_use_ivar = True  # "Attributes" sections as fields: no second description of a documented member

autodoc_member_order = "bysource"
autodoc_typehints = "description"
autodoc_default_options = {"members": True, "show-inheritance": False}

html_theme = "alabaster"
html_title = f"flowpost {release}"
