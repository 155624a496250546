"""Export of a result's particles and history to pandas and xarray (the optional ``export``
extra: ``pip install 'flowpost[export]'``).

- :func:`particles_frame`: a ``pandas.DataFrame`` with one row per particle (index
  ``particle``) and one column per scalar element, named by the project's labeller
  (:mod:`flowpost.model` (labels)): ``sigma``, ``w[0]``, ``w[1,2]``, ``layer.bias[3]``.
- :func:`particles_dataset`: an ``xarray.Dataset`` with one variable per parameter, dimensions
  ``("particle", "<name>_axis0", ...)``; it is written to netCDF by xarray's own
  ``Dataset.to_netcdf``.
- :func:`history_frame`: the history records as a ``pandas.DataFrame``, one row per record
  (windows and events, in order), one column per scalar figure.

Values are copied without conversion: every column / variable has the dtype and the exact
values of the particles.
"""

from __future__ import annotations

import importlib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ..model import element_labels
from ._history import History

__all__ = ["history_frame", "particles_dataset", "particles_frame", "require_extra"]


def require_extra(module: str, what: str) -> Any:
    """Import an optional dependency of the ``export`` extra, or say how to install it."""
    try:
        return importlib.import_module(module)
    except ImportError as err:
        raise ImportError(
            f"{what}: expected the optional package {module} (install it with pip install 'flowpost[export]'); "
            f"got ImportError: {err}"
        ) from err


def particles_frame(names: Sequence[str], shapes: Sequence[Sequence[int]], arrays: Mapping[str, np.ndarray]):
    """One column per scalar element (labelled as in :meth:`Result.summary`), one row per particle."""
    pd = require_extra("pandas", "Result.to_frame")
    columns: dict[str, np.ndarray] = {}
    for name, shape in zip(names, shapes):
        arr = np.asarray(arrays[name])
        flat = arr.reshape(arr.shape[0], -1)
        for j, label in enumerate(element_labels(name, tuple(shape))):
            columns[label] = flat[:, j]
    n = next(iter(columns.values())).shape[0] if columns else 0
    index = pd.RangeIndex(n, name="particle")
    return pd.DataFrame(columns, index=index)


def particles_dataset(
    names: Sequence[str],
    shapes: Sequence[Sequence[int]],
    supports: Sequence[str],
    arrays: Mapping[str, np.ndarray],
    attrs: Mapping[str, Any],
):
    """One variable per parameter, dimensions ``("particle", "<name>_axis0", ...)``."""
    xr = require_extra("xarray", "Result.to_dataset")
    variables = {}
    for name, shape, support in zip(names, shapes, supports):
        arr = np.asarray(arrays[name])
        dims = ("particle", *(f"{name}_axis{i}" for i in range(len(shape))))
        variables[name] = xr.Variable(dims, arr, attrs={"support": str(support)})
    return xr.Dataset(variables, attrs=dict(attrs))


def history_frame(history: History):
    """The records as rows; each figure whose values are all scalars (numbers or strings) is a
    column, with NaN (numbers) or ``None`` where a record lacks it. Array-valued figures (such
    as ``centre``) are left out: :meth:`History.column` gives them stacked."""
    pd = require_extra("pandas", "History.to_frame")
    records = history.records
    columns: dict[str, list[Any]] = {}
    figures = history.keys()  # History.keys(): the figures recorded, in first-seen order
    for name in figures:
        values = [r.get(name) for r in records]
        if any(v is not None and np.ndim(v) != 0 for v in values):
            continue
        if any(isinstance(v, str) for v in values):
            columns[name] = [v if v is None or isinstance(v, str) else str(v) for v in values]
        else:
            columns[name] = [np.nan if v is None else v for v in values]
    return pd.DataFrame(columns, index=pd.RangeIndex(len(records), name="record"))
