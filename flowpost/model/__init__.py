"""The model: a user's log-density as a target on R^d (layout of one particle, supports and
their log-Jacobians, parameter labels); a likelihood summed over data items with its minibatch
score estimate (:class:`ItemSum`, ``flowpost/model/_minibatch.py``) and data read from a
``.npy`` file on disk a batch at a time (:class:`RowFile`, ``flowpost/model/_data.py``)."""

from __future__ import annotations

from ._data import RowFile as RowFile
from ._labels import ROOT_NAME as ROOT_NAME
from ._labels import element_label as element_label
from ._labels import element_labels as element_labels
from ._labels import path_label as path_label
from ._minibatch import ItemSum as ItemSum
from ._minibatch import ScoreEstimate as ScoreEstimate
from ._minibatch import figure_log_density as figure_log_density
from ._minibatch import score_estimate as score_estimate
from ._minibatch import uses_minibatches as uses_minibatches
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
    "ItemSum",
    "Layout",
    "Positive",
    "Real",
    "RowFile",
    "ScoreEstimate",
    "Simplex",
    "Target",
    "as_support",
    "as_target",
    "element_label",
    "element_labels",
    "figure_log_density",
    "path_label",
    "score_estimate",
    "uses_minibatches",
]
