"""The model: a user's log-density as a target on R^d (layout of one particle, supports and
their log-Jacobians, parameter labels)."""
from __future__ import annotations

from ._support import (
    Real as Real,
    Positive as Positive,
    Interval as Interval,
    Simplex as Simplex,
    as_support as as_support,
)
from ._labels import (
    ROOT_NAME as ROOT_NAME,
    element_label as element_label,
    element_labels as element_labels,
    path_label as path_label,
)
from ._target import (
    Target as Target,
    Layout as Layout,
    as_target as as_target,
)

__all__ = ['ROOT_NAME', 'element_label', 'element_labels', 'path_label', 'Real', 'Positive', 'Interval', 'Simplex', 'as_support', 'Target', 'Layout', 'as_target']
