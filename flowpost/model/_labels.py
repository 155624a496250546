"""One labeller for parameter names, used by the target, the result, the driver's messages
and the test kit.

A parameter (a leaf of the user's pytree) is named by its path: dictionary keys and
attribute names joined by dots (``layer.bias``), sequence positions in brackets
(``weights[1]``); a parameter given as one plain array is ``theta``. One scalar element of a
parameter adds its index in brackets, C order: ``w[1,2]`` (a scalar parameter is its name
alone). Unconstrained coordinates, which a simplex has one fewer of, are numbered flat:
``p[0]``, ``p[1]``.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import jax
import numpy as np

__all__ = ["ROOT_NAME", "coordinate_labels", "element_label", "element_labels", "path_label"]

#: The name given to the parameter when ``init`` is one plain array, not a pytree (its
#: elements are then labelled ``theta[0]``, ``theta[1]``, ...).
ROOT_NAME = "theta"


def path_label(path: Iterable[Any]) -> str:
    """Name of a pytree path: ``w``, ``layer.bias``, ``weights[1]``; the root is ``theta``."""
    out = ""
    for k in path:
        if isinstance(k, jax.tree_util.DictKey):
            out += ("." if out else "") + str(k.key)
        elif isinstance(k, jax.tree_util.GetAttrKey):
            out += ("." if out else "") + str(k.name)
        elif isinstance(k, jax.tree_util.SequenceKey):
            out += f"[{k.idx}]" if out else f"{ROOT_NAME}[{k.idx}]"
        elif isinstance(k, jax.tree_util.FlattenedIndexKey):
            out += f"[{k.key}]" if out else f"{ROOT_NAME}[{k.key}]"
        else:  # pragma: no cover - other key kinds
            out += str(k)
    return out or ROOT_NAME


def element_label(name: str, index: tuple[int, ...]) -> str:
    """``name`` for a scalar, ``name[i,j]`` for an element of an array parameter."""
    return name if index == () else f"{name}[{','.join(map(str, index))}]"


def element_labels(name: str, shape: tuple[int, ...]) -> list[str]:
    """The labels of every element of a parameter of ``shape``, in C order."""
    return [element_label(name, tuple(int(i) for i in idx)) for idx in np.ndindex(*shape)]


def coordinate_labels(name: str, shape: tuple[int, ...], size: int) -> list[str]:
    """Labels of a parameter's ``size`` unconstrained coordinates (flat numbering)."""
    if size == 1 and shape == ():
        return [name]
    return [f"{name}[{i}]" for i in range(size)]
