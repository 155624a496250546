"""Default inner solvers of the implicit steppers, chosen by the ensemble's dtype.

The line search of the inner solver compares objective values, which carry a rounding error
of about ``eps * |objective|``; below a gradient of roughly ``sqrt(2 eps h |log pi|)`` (about
``1e-4`` in float32 for an order-one ``log pi``) it cannot certify a decrease and the solve
runs to its cap. The default tolerance is therefore ``1e-3`` in float32 (and narrower) and
``1e-7`` in float64.
"""

from __future__ import annotations

from typing import Any

import jax.numpy as jnp

from .._validate import fail
from ..numerics import InnerSolver

__all__ = ["check_solver", "default_solver"]


def default_solver(dtype: Any, max_iters: int = 50) -> InnerSolver:
    """L-BFGS with line search, ``tol = 1e-3`` for float32 (and narrower) ensembles, ``1e-7``
    for float64, at most ``max_iters`` iterations."""
    tol = 1e-7 if jnp.finfo(dtype).bits >= 64 else 1e-3
    return InnerSolver(tol=tol, max_iters=max_iters)


def check_solver(name: str, value: Any) -> None:
    """``None`` or an :class:`~flowpost.numerics.InnerSolver` instance."""
    if value is not None and not isinstance(value, InnerSolver):
        raise fail(name, "None or a flowpost.InnerSolver (e.g. InnerSolver(tol=1e-5, max_iters=100))", value, TypeError)
