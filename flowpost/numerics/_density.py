r"""Gaussian kernel density estimates of an ensemble, in row blocks.

For centres :math:`x_1, \dots, x_N` and bandwidth :math:`h > 0` the kernel
density estimate is the mixture

.. math::

    \hat\mu(y) = \frac1N \sum_{j=1}^N \mathcal N(y; x_j, h^2 I),

and its log and score follow in closed form:

.. math::

    \log \hat\mu(y_i) = \operatorname{logsumexp}_j\Big(-\frac{|y_i - x_j|^2}{2h^2}\Big)
        - \log N - \frac d2 \log(2\pi h^2),

    \nabla_y \log \hat\mu(y_i) = \frac{1}{h^2} \Big(\sum_j w_{ij} x_j - y_i\Big),
    \qquad w_{ij} = \operatorname{softmax}_j\Big(-\frac{|y_i - x_j|^2}{2h^2}\Big).

Both are computed over row blocks of evaluation points with
:func:`~flowpost.numerics.map_row_blocks` and the matrix-product squared
distances of :func:`~flowpost.numerics.pairwise_sqdist` (memory
``O(block N)``, gradients included: each block is rematerialised in the
backward pass).  The bandwidth is an ordinary (possibly traced) argument;
``block`` is static.  The caller's floating dtype is kept.
"""

from __future__ import annotations

import math
import numbers
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax
from jax.scipy.special import logsumexp

from .._validate import fail, positive
from ._kernels import as_points, same_dim
from ._pairwise import DEFAULT_BLOCK, check_block, map_row_blocks, pairwise_sqdist

Array = jax.Array
ArrayLike = Any

__all__ = ["grad_log_kde", "log_kde"]

_HIGHEST = lax.Precision.HIGHEST


def _check_bandwidth(bandwidth: Any) -> None:
    """Check a bandwidth given as a Python or NumPy scalar (finite, > 0; no bool, no string).

    Arrays (traced or not) pass unchecked here: their value is not read on the host.
    """
    if isinstance(bandwidth, (str, bytes, bool, np.bool_, numbers.Number, np.generic)):
        positive("bandwidth", bandwidth)


def _kde_setup(y: ArrayLike, centres: ArrayLike, bandwidth: ArrayLike):
    y = as_points("y", y)
    centres = as_points("centres", centres)
    same_dim("centres", centres, "y", y)
    h = jnp.asarray(bandwidth, dtype=jnp.result_type(y, centres))
    if h.ndim != 0:
        raise fail("bandwidth", "a scalar", h)
    shift = lax.stop_gradient(jnp.mean(centres, axis=0))
    return y - shift, centres - shift, h


def log_kde(y: ArrayLike, centres: ArrayLike, bandwidth: ArrayLike, *, block: int = DEFAULT_BLOCK) -> Array:
    r"""Log of a Gaussian kernel density estimate, in row blocks.

    .. math::

        \log \hat\mu(y_i) = \log \frac1N \sum_{j=1}^N \mathcal N(y_i; x_j, h^2 I)
        = \operatorname{logsumexp}_j\Big(-\frac{|y_i - x_j|^2}{2h^2}\Big)
          - \log N - \frac d2 \log(2\pi h^2).

    The Gaussian normaliser is written out here rather than taken from
    ``jax.scipy.stats`` because the squared distances come from the blocked
    matrix-product form (memory ``O(block N)``), not from per-pair
    differences.  Differentiable (``jax.grad``) in ``y``, ``centres`` and
    ``bandwidth``; each block is rematerialised in the backward pass so the
    gradient also needs only ``O(block N)`` memory.

    Parameters
    ----------
    y : (M, d) array of evaluation points.
    centres : (N, d) array of kernel centres ``x_j``.
    bandwidth : positive scalar ``h`` (may be traced).
    block : rows of ``y`` per block (static).

    Returns
    -------
    (M,) array.
    """
    _check_bandwidth(bandwidth)
    return _log_kde(y, centres, bandwidth, block=check_block(block))


@partial(jax.jit, static_argnames=("block",))
def _log_kde(y, centres, bandwidth, *, block):
    yc, xc, h = _kde_setup(y, centres, bandwidth)
    n, d = xc.shape
    log_norm = math.log(n) + 0.5 * d * jnp.log(2.0 * jnp.pi * h * h)
    inv = 0.5 / (h * h)

    def rows(yb: Array, shared: tuple[Array, Array]) -> Array:
        xs, inv_s = shared
        return logsumexp(-inv_s * pairwise_sqdist(yb, xs), axis=1)

    # the centres go by ``shared`` (not a closure) so that a sharded ensemble can be differentiated
    return map_row_blocks(rows, yc, block=block, shared=(xc, inv)) - log_norm


def grad_log_kde(y: ArrayLike, centres: ArrayLike, bandwidth: ArrayLike, *, block: int = DEFAULT_BLOCK) -> Array:
    r"""Gradient in ``y`` of :func:`log_kde`, in closed form.

    .. math::

        \nabla_y \log \hat\mu(y_i) = \frac{1}{h^2} \Big(\sum_j w_{ij} x_j - y_i\Big),
        \qquad w_{ij} = \operatorname{softmax}_j\Big(-\frac{|y_i - x_j|^2}{2h^2}\Big).

    Returns an ``(M, d)`` array; memory ``O(block N)``.
    """
    _check_bandwidth(bandwidth)
    return _grad_log_kde(y, centres, bandwidth, block=check_block(block))


@partial(jax.jit, static_argnames=("block",))
def _grad_log_kde(y, centres, bandwidth, *, block):
    yc, xc, h = _kde_setup(y, centres, bandwidth)
    inv = 0.5 / (h * h)

    def rows(yb: Array, shared: tuple[Array, Array, Array]) -> Array:
        xs, inv_s, h_s = shared
        w = jax.nn.softmax(-inv_s * pairwise_sqdist(yb, xs), axis=1)
        return (jnp.matmul(w, xs, precision=_HIGHEST) - yb) / (h_s * h_s)

    return map_row_blocks(rows, yc, block=block, shared=(xc, inv, h))
