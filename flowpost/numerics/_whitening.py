r"""Affine whitening of an ensemble by its regularised covariance.

For particles :math:`x_1, \dots, x_N` with mean :math:`m`,

.. math::

    \Sigma = \frac{1}{N - 1} \sum_i (x_i - m)(x_i - m)^T, \qquad
    L L^T = \Sigma + \lambda I, \quad \lambda = \text{ridge} \cdot \operatorname{tr}\Sigma / d,

and the whitening map is :math:`z = L^{-1}(x - m)`.  An isotropic kernel
applied to :math:`z` is a kernel on :math:`x` whose shape follows the
ensemble covariance; densities transform as
:math:`\log p_x(x) = \log p_z(z) - \log|\det L|`.  The ridge keeps :math:`L`
invertible when :math:`N \le d` or the ensemble is degenerate.
"""

from __future__ import annotations

import math
from functools import partial
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
from jax import lax
from jax.scipy.linalg import solve_triangular

from .._validate import positive
from ._kernels import as_points

Array = jax.Array
ArrayLike = Any

__all__ = ["Whitening", "whiten"]

_HIGHEST = lax.Precision.HIGHEST


class Whitening(NamedTuple):
    r"""Affine whitening map ``z = L^{-1} (x - m)`` (a pytree).

    ``mean`` is ``m`` (``(d,)``) and ``chol`` is the lower-triangular ``L``
    (``(d, d)``) with ``L L^T`` the regularised ensemble covariance.  An
    isotropic kernel applied to ``z`` is a kernel on ``x`` whose shape follows
    the ensemble covariance; densities transform as
    ``log p_x(x) = log p_z(z) - log|det L|``.
    """

    mean: Array
    chol: Array

    def apply(self, x: ArrayLike) -> Array:
        """Map ``(N, d)`` points to whitened coordinates ``L^{-1}(x - m)``."""
        x = jnp.asarray(x)
        return solve_triangular(self.chol, (x - self.mean).T, lower=True).T

    def invert(self, z: ArrayLike) -> Array:
        """Map whitened coordinates back: ``m + L z``."""
        z = jnp.asarray(z)
        return self.mean + jnp.matmul(z, self.chol.T, precision=_HIGHEST)

    def log_abs_det(self) -> Array:
        """``log |det L|`` (half the log-determinant of the covariance)."""
        return jnp.sum(jnp.log(jnp.diagonal(self.chol)))


@partial(jax.jit, static_argnames=("ridge",))
def whiten(x: ArrayLike, *, ridge: float | None = None) -> Whitening:
    r"""Whitening map of an ensemble.

    .. math::

        \Sigma = \frac{1}{N - 1} \sum_i (x_i - m)(x_i - m)^T, \qquad
        L L^T = \Sigma + \lambda I, \quad \lambda = \text{ridge} \cdot \operatorname{tr}\Sigma / d,

    with ``L`` the Cholesky factor.  The ridge keeps ``L`` invertible when
    ``N <= d`` or the ensemble is degenerate; by default
    ``ridge = sqrt(eps)`` of the dtype (about ``3.5e-4`` in float32,
    ``1.5e-8`` in float64).  If ``tr Sigma = 0`` (all points equal, or
    ``N = 1``) then ``lambda = 1``.  Differentiable in ``x``.
    """
    x = as_points("x", x)
    if ridge is None:
        ridge = math.sqrt(float(jnp.finfo(x.dtype).eps))
    else:
        ridge = positive("ridge", ridge)
    return ridged_whitening(x, ridge)


def ridged_whitening(x: Array, ridge: ArrayLike) -> Whitening:
    """The whitening of :func:`whiten` for checked ``(N, d)`` points and a ridge that may be
    traced: ``L L^T = Sigma + lambda I``, ``lambda = ridge tr(Sigma) / d`` (1 if
    ``tr Sigma = 0``), ``Sigma`` the ensemble covariance with the ``N - 1`` denominator."""
    n, d = x.shape
    m = jnp.mean(x, axis=0)
    xc = x - m
    cov = jnp.matmul(xc.T, xc, precision=_HIGHEST) / max(n - 1, 1)
    tr = jnp.trace(cov)
    lam = jnp.where(tr > 0, ridge * tr / d, jnp.ones_like(tr))
    chol = jnp.linalg.cholesky(cov + lam * jnp.eye(d, dtype=x.dtype))
    return Whitening(mean=m, chol=chol)
