r"""A second opinion: do two ensembles come from the same distribution?

The kernel two-sample test of "A kernel two-sample test" (JMLR, 2012) compares samples
:math:`X = (x_1, \dots, x_n)` and :math:`Y = (y_1, \dots, y_m)` in :math:`\mathbb{R}^d` through
the unbiased estimate of the squared maximum mean discrepancy (its eq. 3),

.. math::

    \widehat{\mathrm{MMD}}^2_u
      = \frac{1}{n(n-1)} \sum_{i \ne j} k(x_i, x_j)
      + \frac{1}{m(m-1)} \sum_{i \ne j} k(y_i, y_j)
      - \frac{2}{n m} \sum_{i, j} k(x_i, y_j),

with the Gaussian kernel :math:`k(a, b) = \exp(-|a - b|^2 / (2 \sigma^2))` and the median
heuristic for its bandwidth: :math:`\sigma` is the median of the distances
:math:`|z_i - z_j|, i < j`, between the points of the pooled sample :math:`Z = X \cup Y`
(sec. 8 of the paper), taken over at most ``median_points`` points of :math:`Z` (a random
subset drawn with the key when :math:`Z` is larger, so the cost stays bounded).

The p-value is that of a permutation test: :math:`P` random relabellings of :math:`Z` into
groups of sizes :math:`n` and :math:`m` give statistics :math:`T_1, \dots, T_P`, and

.. math::

    p = \frac{1 + \#\{p : T_p \ge T_0\}}{1 + P},

which is exactly valid (``P(p <= a) <= a`` under the null) because the pooled points are
exchangeable when :math:`X` and :math:`Y` come from one distribution.

Computation. With :math:`a \in \{0, 1\}^{n+m}` marking one group, :math:`K` the kernel matrix of
:math:`Z` and :math:`\mathbf 1` the vector of ones, the three sums are
:math:`S_{XX} = a^\top K a`, :math:`S_{XY} = a^\top K \mathbf 1 - S_{XX}` and
:math:`S_{YY} = \mathbf 1^\top K \mathbf 1 - 2 a^\top K \mathbf 1 + S_{XX}`, and the diagonal terms
are :math:`k(z, z) = 1`. All labellings (the observed one and the :math:`P` permutations, drawn
by a ``vmap`` over keys split from the user's key, each a sort of random 64-bit keys) are stacked
as the columns of a matrix :math:`A`; :math:`K A` is computed over row blocks of ``block``
points (:func:`flowpost.numerics.map_row_blocks`), so the kernel is evaluated once and never
stored whole: memory :math:`O((n + m)(\text{block} + P))` plus the
:math:`\text{median\_points}^2` distances of the median heuristic, time :math:`O((n + m)^2 P)`.
"""

from __future__ import annotations

from functools import partial
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import fail, integer, prng_key
from ..numerics import DEFAULT_BLOCK, map_row_blocks, pairwise_sqdist

__all__ = ["Agreement", "agreement_test"]

_HIGHEST = jax.lax.Precision.HIGHEST


class Agreement(NamedTuple):
    """What :func:`agreement_test` returns (0-d arrays: ``float()`` them to print)."""

    statistic: Any
    """The unbiased squared MMD of the two samples (can be slightly negative)."""
    p_value: Any
    """The permutation p-value, in ``[1 / (1 + P), 1]``."""
    n_permutations: int
    """The number ``P`` of random relabellings."""
    bandwidth: Any
    """The Gaussian kernel's ``sigma`` (median heuristic)."""


def _as_sample(name: str, value: Any):
    from ..engine import Result  # lazily: the engine imports this sub-package

    if isinstance(value, Result):
        value = value.draws()[1]
    if not hasattr(value, "shape") and not isinstance(value, (list, tuple)):
        raise fail(name, "a flowpost Result or an (N, d) array of draws", value, TypeError)
    arr = jnp.asarray(value)
    if not jnp.issubdtype(arr.dtype, jnp.floating):
        arr = arr.astype(jnp.result_type(float))
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] < 2:
        raise fail(name, "a flowpost Result or an (N, d) array of draws with N >= 2", value)
    return arr


def agreement_test(
    first: Any,
    second: Any,
    *,
    key: Any,
    n_permutations: int = 500,
    block: int = DEFAULT_BLOCK,
    median_points: int = 1000,
) -> Agreement:
    r"""Kernel two-sample test that ``first`` and ``second`` come from one distribution.

    See the module docstring for the statistic, the bandwidth and the p-value. A small
    p-value says the two ensembles disagree (two steppers, two starts, or a run and reference
    draws); a large one says the test found no difference at this sample size.

    Parameters
    ----------
    first, second : Result or array
        A :class:`flowpost.Result` (its constrained draws, one column per scalar element as in
        ``Result.draws()``) or an ``(N, d)`` (or ``(N,)``) array of draws; both with the same
        ``d`` and at least two draws.
    key : JAX PRNG key
        Draws the permutations (and the median subset of a large pooled sample).
    n_permutations : int
        ``P >= 1``; the smallest attainable p-value is ``1 / (1 + P)``.
    block : int
        Rows of the kernel matrix computed at once.
    median_points : int
        At most this many pooled points (>= 2) enter the median heuristic.

    Returns
    -------
    Agreement
        ``(statistic, p_value, n_permutations, bandwidth)``.

    Works under ``jit`` and ``vmap`` (arrays as inputs; ``key`` traced).
    """
    x = _as_sample("first", first)
    y = _as_sample("second", second)
    if x.shape[1] != y.shape[1]:
        raise ValueError(
            f"second: expected draws of the same dimension as first ({x.shape[1]}); got {y.shape[1]} columns"
        )
    key = prng_key("key", key)
    n_perm = integer("n_permutations", n_permutations, minimum=1)
    block = integer("block", block, minimum=1)
    median_points = integer("median_points", median_points, minimum=2)
    dtype = jnp.result_type(x.dtype, y.dtype)
    stat, p, sigma = _mmd_test(x.astype(dtype), y.astype(dtype), key, n_perm, block, median_points)
    return Agreement(stat, p, n_perm, sigma)


def _median_distance(z):
    """The median of the ``k (k - 1) / 2`` distances ``|z_i - z_j|, i < j`` (the upper
    triangle at static indices, one sort)."""
    k = z.shape[0]
    iu, ju = np.triu_indices(k, 1)
    s = jnp.sort(pairwise_sqdist(z, z)[iu, ju])
    pairs = iu.size
    if pairs % 2:
        return jnp.sqrt(s[pairs // 2])
    return 0.5 * (jnp.sqrt(s[pairs // 2 - 1]) + jnp.sqrt(s[pairs // 2]))


def _random_permutation(key, total):
    """A uniformly random permutation of ``0 .. total - 1``: the order of ``total`` random
    64-bit sort keys (two 32-bit words, compared lexicographically; a tie, which would
    favour the lower index, has probability below ``total^2 / 2^65``)."""
    bits = jax.random.bits(key, (2, total), dtype=jnp.uint32)
    return jax.lax.sort((bits[0], bits[1], jnp.arange(total)), num_keys=2)[2]


@partial(jax.jit, static_argnums=(3, 4, 5))
def _mmd_test(x, y, key, n_perm, block, median_points):
    n, m = x.shape[0], y.shape[0]
    total = n + m
    z = jnp.concatenate([x, y], axis=0)
    z = z - jnp.mean(z, axis=0)  # distances are unchanged; limits cancellation in |a|^2 + |b|^2 - 2ab
    key_median, key_perm = jax.random.split(key)

    sub = z if total <= median_points else z[_random_permutation(key_median, total)[:median_points]]
    sigma = _median_distance(sub)
    # all points equal: any bandwidth gives the statistic 0; keep the kernel finite
    sigma = jnp.where(sigma > 0, sigma, jnp.ones_like(sigma))
    inv = 1.0 / (2.0 * sigma * sigma)

    observed = (jnp.arange(total) < n).astype(z.dtype)
    keys = jax.random.split(key_perm, n_perm)
    permuted = jax.vmap(lambda kk: (_random_permutation(kk, total) < n).astype(z.dtype))(keys)
    labels = jnp.concatenate([observed[None, :], permuted, jnp.ones((1, total), z.dtype)], axis=0).T

    def rows(zb):
        kb = jnp.exp(-pairwise_sqdist(zb, z) * inv)
        return jnp.matmul(kb, labels, precision=_HIGHEST)

    kl = map_row_blocks(rows, z, block=block)  # K @ labels, (total, P + 2)
    k_one = kl[:, -1]
    s11 = jnp.sum(k_one)
    a = labels[:, :-1]
    s_aa = jnp.sum(a * kl[:, :-1], axis=0)
    s_a1 = a.T @ k_one
    s_xy = s_a1 - s_aa
    s_yy = s11 - 2.0 * s_a1 + s_aa
    stats = (s_aa - n) / (n * (n - 1.0)) + (s_yy - m) / (m * (m - 1.0)) - 2.0 * s_xy / (n * m)
    t0 = stats[0]
    p = (1.0 + jnp.sum(stats[1:] >= t0)) / (1.0 + n_perm)
    return t0, p.astype(z.dtype), sigma
