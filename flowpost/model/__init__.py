"""The model: a user's log-density as a target on R^d (layout of one particle, supports and
their log-Jacobians, parameter labels)."""
from __future__ import annotations

from ._labels import (
    ROOT_NAME as ROOT_NAME,
    element_label as element_label,
    element_labels as element_labels,
    path_label as path_label,
)
from ._support import (
    Interval as Interval,
    Positive as Positive,
    Real as Real,
    Simplex as Simplex,
    as_support as as_support,
)
from ._target import (
    Layout as Layout,
    Target as Target,
    as_target as as_target,
)

__all__ = [
    "ROOT_NAME", "Interval", "Layout", "Positive", "Real", "Simplex", "Target", "as_support",
    "as_target", "element_label", "element_labels", "path_label",
]
