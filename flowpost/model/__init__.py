"""The model: a user's log-density as a target on R^d (layout of one particle, supports and
their log-Jacobians, parameter labels)."""

from __future__ import annotations

from ._labels import ROOT_NAME as ROOT_NAME
from ._labels import element_label as element_label
from ._labels import element_labels as element_labels
from ._labels import path_label as path_label
from ._support import Interval as Interval
from ._support import Positive as Positive
from ._support import Real as Real
from ._support import Simplex as Simplex
from ._support import as_support as as_support
from ._target import Layout as Layout
from ._target import Target as Target
from ._target import as_target as as_target

__all__ = [
    "ROOT_NAME",
    "Interval",
    "Layout",
    "Positive",
    "Real",
    "Simplex",
    "Target",
    "as_support",
    "as_target",
    "element_label",
    "element_labels",
    "path_label",
]
