r"""Memory-bounded pairwise sums over a particle ensemble.

The interacting steppers (SVGD, the blob / kernel-density flow, the JKO step)
and the kernel Stein discrepancy need sums over all pairs of particles.  With
``N`` particles the full ``N x N`` kernel matrix would cost ``O(N^2)``
memory; everything in this module instead walks over *row blocks* of
``block`` destination points at a time (``lax.map``), so that peak memory is
``O(block * N)``.

Squared distances
-----------------
Inside a block, squared distances are computed as
``|y|^2 + |x|^2 - 2 y.x`` with one matrix product (after subtracting the mean
of the sources, which leaves distances unchanged and limits cancellation), so
a block costs ``O(block * N)`` memory, never ``O(block * N * d)``.  Matrix
products are requested at ``Precision.HIGHEST`` so that accelerators do not
silently drop to reduced-precision float32 products.

Blocked primitive
-----------------
:func:`map_row_blocks` pads the destination rows to a multiple of ``block``
(padding rows repeat the last real row, so they are always finite, and are
dropped from the output), applies a row-block function with ``lax.map`` and
wraps it in :func:`jax.checkpoint`, so that reverse-mode differentiation
recomputes each block instead of storing all blocks (which would again be
``N x N``).  Built on it: :func:`kernel_sums` (the two sums SVGD needs), the
Gaussian kernel densities of :mod:`flowpost.numerics._density` and, in
:mod:`flowpost.diagnostics`, the kernel Stein discrepancy.

Sharded ensembles
-----------------
Inside :func:`flowpost.run` with ``devices=`` the particle axis is sharded over a 1-D device
mesh whose axis is named :data:`PARTICLE_AXIS` (:func:`jax.set_mesh` is active while the run
is traced; :func:`particle_shards` reads it).  Then:

* :func:`map_row_blocks` maps each device's own ``N / P`` rows (``jax.shard_map``); whatever
  ``fn`` reads besides its rows (the sources of a kernel sum, a key) is gathered to every
  device (an all-gather of positions and scores: ``O(N d)`` per device, plus one block
  ``O(block * N)``).  The kernel densities, the Stein discrepancy and EnsembleLangevin's
  noise take this path.
* :func:`kernel_sums` passes the source shards round a ring (``lax.ppermute``, ``P`` visits):
  each device holds its ``N / P`` destination rows, one visiting source shard and its values
  (``O(N / P * d)``), and one block against it, ``O(block * N / P)``; no ``N x N`` matrix and
  no gathered ensemble.  The sums are the same up to float rounding (the order of the
  additions over sources changes), so SVGD and BlobFlow agree with the unsharded run to
  float rounding.

Without a mesh (or with one device) the unsharded code runs, number for number unchanged.

Random batches
--------------
:func:`random_batch_sums` and :func:`interaction_means` implement the random
batch interaction of "Random batch methods for interacting particle systems"
(2020): particles are randomly permuted into batches of ``p`` and interact
only within their batch, costing ``O(N p)`` per call.  A stepper passes
``batch=None`` (all pairs, blocked) or ``batch=p`` plus a key.

The kernel (:class:`~flowpost.numerics.RBF`, :class:`~flowpost.numerics.IMQ`)
is an ordinary pytree argument: its numbers are traced, so a new bandwidth does
not recompile.  ``block`` and ``batch`` are static (they fix the shapes).  All
functions take ``(N, d)`` arrays, are jit/vmap friendly and keep the caller's
floating dtype.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
from jax import lax

from .._validate import fail, integer
from ._kernels import RadialKernel, as_points, check_kernel, resolve_scale, same_dim

Array = jax.Array
ArrayLike = Any

__all__ = [
    "DEFAULT_BLOCK",
    "PARTICLE_AXIS",
    "interaction_means",
    "kernel_sums",
    "map_row_blocks",
    "pairwise_sqdist",
    "particle_shards",
    "random_batch_sums",
    "ring_kernel_sums",
]

#: Default number of destination rows processed at once by the blocked sums.
#: A block holds a few ``(block, N)`` arrays: with ``N = 10^5`` and float32
#: that is about 200 MB per array, so lower it for very large ensembles.
DEFAULT_BLOCK: int = 512

_HIGHEST = lax.Precision.HIGHEST

#: Name of the mesh axis over which :func:`flowpost.run` shards the particle axis.
PARTICLE_AXIS: str = "particles"


def particle_shards() -> int:
    """How many shards the particle axis has where this is traced: the size of the mesh axis
    :data:`PARTICLE_AXIS` of the active mesh (:func:`jax.set_mesh`) when it is not already
    manual (inside ``shard_map``), else 1."""
    mesh = jax.sharding.get_abstract_mesh()
    if mesh.empty or PARTICLE_AXIS not in mesh.axis_names:
        return 1
    i = mesh.axis_names.index(PARTICLE_AXIS)
    if mesh.axis_types[i] == jax.sharding.AxisType.Manual:
        return 1
    return int(mesh.axis_sizes[i])


def _sharded_rows(n: int) -> int:
    """The shard count to split ``n`` rows over (1: run unsharded)."""
    p = particle_shards()
    return p if p > 1 and n % p == 0 else 1


def check_block(block: Any) -> int:
    return integer("block", block, minimum=1)


def _check_batch(batch: Any, n: int) -> int:
    return integer("batch", batch, minimum=2, maximum=n)


# --------------------------------------------------------------------------
# blocked primitive
# --------------------------------------------------------------------------


def pairwise_sqdist(y: Array, x: Array) -> Array:
    r"""Squared distances ``|y_i - x_j|^2`` as ``|y_i|^2 + |x_j|^2 - 2 y_i . x_j``.

    One ``(b, d) x (d, N)`` matrix product; the result is clipped at zero
    (rounding can make it slightly negative).  Memory ``O(b N)``.  Callers
    should centre both sets by a common shift first to limit cancellation.
    """
    yy = jnp.sum(y * y, axis=-1)
    xx = jnp.sum(x * x, axis=-1)
    r2 = yy[:, None] + xx[None, :] - 2.0 * jnp.matmul(y, x.T, precision=_HIGHEST)
    return jnp.maximum(r2, 0.0)


def map_row_blocks(fn: Callable[..., Any], rows: Any, *, block: int = DEFAULT_BLOCK, shared: Any = None) -> Any:
    r"""Apply a row-block function over the leading axis in blocks of ``block``.

    ``rows`` is a pytree of arrays sharing the leading length ``n``.  The
    leading axis is padded to ``n_b * b`` (``b = min(block, n)``,
    ``n_b = ceil(n / b)``) by repeating the last row (so that padded rows are
    finite), split into ``n_b`` blocks of ``b`` rows and mapped with
    ``lax.map``; ``fn`` receives a pytree of ``(b, ...)`` arrays and must
    return a pytree of ``(b, ...)`` arrays, one output row per input row.  The
    padded rows are dropped from the result.  ``fn`` is wrapped in
    :func:`jax.checkpoint`, so reverse-mode differentiation recomputes each
    block rather than storing the intermediates of all blocks.

    Peak memory is that of one call of ``fn`` (e.g. ``O(b N)`` for a block
    against ``N`` sources) plus the inputs and outputs.

    ``shared`` (optional, a pytree): arrays every block reads whole (the sources of a kernel
    sum); ``fn`` is then called as ``fn(block_rows, shared)``. The result is the same as
    closing over them, but under a sharded particle axis they become explicit replicated
    inputs of the per-device map, which reverse-mode differentiation through the map needs
    (pass whatever the caller differentiates by ``shared``, not by a closure).

    With the particle axis sharded over ``P`` devices (module docstring) and ``n`` divisible
    by ``P``, each device maps its own ``n / P`` rows in blocks of ``min(block, n / P)``, and
    every array ``fn`` reads besides its rows is gathered whole to each device: per device
    ``O(b N)`` for the block plus the gathered arrays (``O(N d)`` for positions and scores).
    """
    block = check_block(block)
    leaves = jax.tree.leaves(rows)
    if not leaves:
        raise fail("rows", "a pytree with at least one array", rows)
    n = leaves[0].shape[0]
    for leaf in leaves:
        if leaf.ndim < 1 or leaf.shape[0] != n:
            raise ValueError(f"rows: expected arrays sharing the leading length {n}; got shape {leaf.shape}")
    if n < 1:
        raise fail("rows", "at least one row", rows)
    p = _sharded_rows(n)
    if p > 1:
        return _map_sharded(fn, rows, block, n // p, shared)
    if shared is not None:
        return _map_local(lambda rb: fn(rb, shared), rows, block, n)
    return _map_local(fn, rows, block, n)


def _map_sharded(fn: Callable[..., Any], rows: Any, block: int, n_local: int, shared: Any) -> Any:
    """Each device maps its own ``n_local`` rows; ``shared`` and whatever ``fn`` closes over
    are replicated, i.e. gathered whole to every device."""
    spec = jax.sharding.PartitionSpec(PARTICLE_AXIS)
    if shared is None:
        return jax.shard_map(lambda r: _map_local(fn, r, block, n_local), in_specs=spec, out_specs=spec)(rows)

    def local(r, c):
        return _map_local(lambda rb: fn(rb, c), r, block, n_local)

    return jax.shard_map(local, in_specs=(spec, jax.sharding.PartitionSpec()), out_specs=spec)(rows, shared)


def _map_local(fn: Callable[[Any], Any], rows: Any, block: int, n: int) -> Any:
    b = min(block, n)
    n_blocks = -(-n // b)
    pad = n_blocks * b - n

    def split(a: Array) -> Array:
        if pad:
            a = jnp.pad(a, [(0, pad)] + [(0, 0)] * (a.ndim - 1), mode="edge")
        return a.reshape((n_blocks, b, *a.shape[1:]))

    out = lax.map(jax.checkpoint(fn), jax.tree.map(split, rows))

    def join(a: Array) -> Array:
        return a.reshape((n_blocks * b, *a.shape[2:]))[:n]

    return jax.tree.map(join, out)


def _sums_block(kernel: RadialKernel, scale: Array, y: Array, x: Array, v: Array):
    """Sums over all ``x`` for each row of ``y`` (both already centred)."""
    r2 = pairwise_sqdist(y, x)
    f, df, _ = kernel.profile(r2, scale)
    kv = jnp.matmul(f, v, precision=_HIGHEST)
    grad = 2.0 * (jnp.matmul(df, x, precision=_HIGHEST) - jnp.sum(df, axis=1)[:, None] * y)
    return kv, grad


def _flat_values(values: ArrayLike, n: int) -> tuple[Array, tuple[int, ...]]:
    values = jnp.asarray(values)
    if values.ndim < 1 or values.shape[0] != n:
        raise ValueError(
            f"values: expected leading dimension N = {n} (one row per source point); got shape {values.shape}"
        )
    trailing = values.shape[1:]
    return values.reshape(n, -1), trailing


def kernel_sums(
    kernel: RadialKernel,
    x_src: ArrayLike,
    values: ArrayLike,
    x_dst: ArrayLike | None = None,
    *,
    block: int = DEFAULT_BLOCK,
    scale: ArrayLike | None = None,
) -> tuple[Array, Array]:
    r"""Kernel-weighted sums over all source points, for every destination point.

    .. math::

        A_i = \sum_{j=1}^{N} k(x_j, y_i)\, v_j, \qquad
        B_i = \sum_{j=1}^{N} \nabla_{x_j} k(x_j, y_i)
            = \sum_j 2 f'(|x_j - y_i|^2)\,(x_j - y_i).

    These are the two sums of SVGD ("Stein variational gradient descent"
    (2016)): with ``v_j = s(x_j)`` the update direction is
    ``phi(y_i) = (A_i + B_i) / N``.  Computed over row blocks of destination
    points, memory ``O(block * N)``.

    Parameters
    ----------
    kernel : RBF or IMQ
        Kernel configuration (a pytree: its numbers may be traced).
    x_src : (N, d) array
        Source points ``x_j``.
    values : (N, ...) array
        Values ``v_j`` carried by the sources (e.g. scores, ``(N, d)``).
    x_dst : (M, d) array, optional
        Destination points ``y_i`` (default: ``x_src``).
    block : int
        Destination rows per block (static).
    scale : scalar, optional
        Length scale overriding the kernel's own (RBF bandwidth ``h`` or IMQ
        ``c``); by default ``kernel.scale_for(x_src)``.

    Returns
    -------
    A : (M, ...) array, same trailing shape as ``values``.
    B : (M, d) array.
    """
    check_kernel(kernel)
    return _kernel_sums(kernel, x_src, values, x_dst, block=check_block(block), scale=scale)


@partial(jax.jit, static_argnames=("block",))
def _kernel_sums(kernel, x_src, values, x_dst, *, block, scale):
    x_src = as_points("x_src", x_src)
    x_dst = x_src if x_dst is None else as_points("x_dst", x_dst)
    same_dim("x_src", x_src, "x_dst", x_dst)
    n = x_src.shape[0]
    v, trailing = _flat_values(values, n)
    s = resolve_scale(kernel, x_src, scale)
    shift = lax.stop_gradient(jnp.mean(x_src, axis=0))
    xc = x_src - shift
    yc = x_dst - shift
    p = _sharded_rows(n)
    if p > 1 and x_dst.shape[0] % p == 0:
        kv, grad = ring_kernel_sums(kernel, s, yc, xc, v, block=block)
    else:
        kv, grad = map_row_blocks(lambda yb: _sums_block(kernel, s, yb, xc, v), yc, block=block)
    return kv.reshape((x_dst.shape[0], *trailing)), grad


def ring_kernel_sums(kernel: RadialKernel, scale: Array, y: Array, x: Array, v: Array, *, block: int):
    r"""The sums of :func:`kernel_sums` (centred ``y``, ``x``, flat ``v``) with the particle axis
    sharded over ``P`` devices, by ring passing.

    Device ``p`` holds its destination rows ``y^(p)`` and source shard ``(x^(p), v^(p))``. In
    ``P`` visits it adds the sums of its rows against the visiting shard (row blocks of
    ``min(block, M / P)``) and hands the shard on to its neighbour (``lax.ppermute``,
    ``p -> p + 1 mod P``), so after ``P`` visits every row has met every source:

    .. math::

        A_i = \sum_{q=0}^{P-1} \sum_{j \in q} k(x_j, y_i) v_j, \qquad
        B_i = \sum_q \sum_{j \in q} 2 f'(|x_j - y_i|^2)(x_j - y_i).

    Memory per device: the rows and accumulators ``O(M / P (d + k))``, the visiting shard
    ``O(N / P (d + k))`` (``k`` columns of ``v``) and one block
    ``O(min(block, M / P) * N / P)``: never ``N x N``, never the gathered ensemble.
    Communication per call: ``P - 1`` passes of ``N / P (d + k)`` numbers per device.
    """
    spec = jax.sharding.PartitionSpec(PARTICLE_AXIS)
    n_shards = particle_shards()
    ring = [(i, (i + 1) % n_shards) for i in range(n_shards)]
    m_local = y.shape[0] // n_shards

    def local(yl, xl, vl):
        def sums(xs, vs):
            return _map_local(lambda yb: _sums_block(kernel, scale, yb, xs, vs), yl, block, m_local)

        def visit(carry, _):
            kv, grad, xs, vs = carry
            dkv, dgrad = sums(xs, vs)
            xs, vs = lax.ppermute((xs, vs), PARTICLE_AXIS, ring)  # hand the shard on
            return (kv + dkv, grad + dgrad, xs, vs), None

        # one accumulator per device ("varying" over the particle axis)
        zeros = (lax.pcast(jnp.zeros((m_local, vl.shape[1]), vl.dtype), PARTICLE_AXIS, to="varying"), 0.0 * yl)
        (kv, grad, xs, vs), _ = lax.scan(visit, (*zeros, xl, vl), None, length=n_shards - 1)
        dkv, dgrad = sums(xs, vs)  # the last visiting shard: nothing left to pass on
        return kv + dkv, grad + dgrad

    return jax.shard_map(local, in_specs=(spec, spec, spec), out_specs=(spec, spec))(y, x, v)


def random_batch_sums(
    kernel: RadialKernel,
    x: ArrayLike,
    values: ArrayLike,
    key: Array,
    batch: int,
    *,
    scale: ArrayLike | None = None,
) -> tuple[Array, Array, Array]:
    r"""The sums of :func:`kernel_sums` restricted to random batches of particles.

    Following "Random batch methods for interacting particle systems" (2020):
    the ``N`` particles are randomly permuted with ``key`` and cut into
    consecutive batches; particle ``i`` then interacts only with the members
    ``j`` of its own batch ``C_i`` (itself included):

    .. math::

        A_i = \sum_{j \in C_i} k(x_j, x_i) v_j, \qquad
        B_i = \sum_{j \in C_i} \nabla_{x_j} k(x_j, x_i).

    Batches: with ``N = q p + r``, ``0 <= r < p``, there are ``q`` batches;
    the first ``q - 1`` hold ``p`` particles and the last holds ``p + r``
    (the remainder joins the last batch rather than forming a tiny batch).
    Cost ``O(N p)`` time and memory.  The length scale is resolved once from
    the whole ensemble (e.g. the median heuristic over all particles).

    Parameters
    ----------
    kernel : RBF or IMQ (a pytree: its numbers may be traced)
    x : (N, d) array
    values : (N, ...) array
    key : PRNG key
    batch : int, ``2 <= batch <= N`` (static)
    scale : scalar, optional (see :func:`kernel_sums`)

    Returns
    -------
    A : (N, ...) array; B : (N, d) array, in the original particle order;
    sizes : (N,) int array, the size of the batch of each particle.
    """
    check_kernel(kernel)
    return _random_batch_sums(kernel, x, values, key, integer("batch", batch, minimum=2), scale=scale)


@partial(jax.jit, static_argnames=("batch",))
def _random_batch_sums(kernel, x, values, key, batch, *, scale):
    x = as_points("x", x)
    n, d = x.shape
    p = _check_batch(batch, n)
    v, trailing = _flat_values(values, n)
    s = resolve_scale(kernel, x, scale)
    q, r = divmod(n, p)
    n_regular = (q - 1) * p if r else q * p

    perm = jax.random.permutation(key, n)
    xp, vp = x[perm], v[perm]

    def group(xg: Array, vg: Array):
        shift = lax.stop_gradient(jnp.mean(xg, axis=0))
        xg = xg - shift
        return _sums_block(kernel, s, xg, xg, vg)

    kv_parts, grad_parts, size_parts = [], [], []
    if n_regular:
        kv_g, grad_g = jax.vmap(group)(xp[:n_regular].reshape(-1, p, d), vp[:n_regular].reshape(-1, p, v.shape[1]))
        kv_parts.append(kv_g.reshape(n_regular, -1))
        grad_parts.append(grad_g.reshape(n_regular, d))
        size_parts.append(jnp.full((n_regular,), p, dtype=jnp.int32))
    if n_regular < n:
        kv_l, grad_l = group(xp[n_regular:], vp[n_regular:])
        kv_parts.append(kv_l)
        grad_parts.append(grad_l)
        size_parts.append(jnp.full((n - n_regular,), n - n_regular, dtype=jnp.int32))
    kv_p = jnp.concatenate(kv_parts, axis=0)
    grad_p = jnp.concatenate(grad_parts, axis=0)
    size_p = jnp.concatenate(size_parts, axis=0)

    inverse = jnp.zeros((n,), dtype=perm.dtype).at[perm].set(jnp.arange(n, dtype=perm.dtype))
    return kv_p[inverse].reshape((n, *trailing)), grad_p[inverse], size_p[inverse]


def interaction_means(
    kernel: RadialKernel,
    x: ArrayLike,
    values: ArrayLike,
    *,
    batch: int | None = None,
    key: Array | None = None,
    block: int = DEFAULT_BLOCK,
    scale: ArrayLike | None = None,
) -> tuple[Array, Array]:
    r"""Ensemble means of the SVGD sums, exact or by random batches.

    Targets

    .. math::

        a_i = \frac1N \sum_{j=1}^N k(x_j, x_i) v_j, \qquad
        b_i = \frac1N \sum_{j=1}^N \nabla_{x_j} k(x_j, x_i),

    so that the SVGD direction is ``phi(x_i) = a_i + b_i``.

    * ``batch=None``: exact, by :func:`kernel_sums` (memory ``O(block N)``).
    * ``batch=p`` (needs ``key``): unbiased random-batch estimate from
      :func:`random_batch_sums`.  The self term is kept with its exact weight
      ``1/N`` and the other members of the batch ``C_i`` (size ``p_i``) are
      reweighted, as in "Random batch methods for interacting particle
      systems" (2020):

      .. math::

          \hat a_i = \frac{k(x_i, x_i) v_i}{N}
              + \frac{N - 1}{N (p_i - 1)} \sum_{j \in C_i, j \ne i} k(x_j, x_i) v_j,

      and likewise for ``b_i`` (whose self term is zero).  Given ``p_i``, the
      other members of ``C_i`` are a uniform random subset of the other
      ``N - 1`` particles, hence ``E[hat a_i] = a_i``.  With ``p = N`` the
      estimate is exact.

    ``kernel`` is a pytree argument (its numbers may be traced); ``batch`` and
    ``block`` are static.
    """
    check_kernel(kernel)
    if batch is not None:
        batch = integer("batch", batch, minimum=2)
    return _interaction_means(kernel, x, values, batch=batch, key=key, block=check_block(block), scale=scale)


@partial(jax.jit, static_argnames=("batch", "block"))
def _interaction_means(kernel, x, values, *, batch, key, block, scale):
    x = as_points("x", x)
    n = x.shape[0]
    if batch is None:
        kv, grad = kernel_sums(kernel, x, values, block=block, scale=scale)
        return kv / n, grad / n
    if key is None:
        raise fail("key", "a PRNG key when batch is an int (random-batch interaction)", None)
    _check_batch(batch, n)
    s = resolve_scale(kernel, x, scale)
    kv, grad, sizes = random_batch_sums(kernel, x, values, key, batch, scale=s)
    v = jnp.asarray(values)
    f0 = kernel.profile(jnp.zeros((), dtype=x.dtype), s)[0]
    w = (n - 1.0) / (n * (sizes - 1.0))
    w = w.astype(x.dtype)
    w_v = w.reshape((n,) + (1,) * (v.ndim - 1))
    self_term = f0 * v
    kv_mean = self_term / n + w_v * (kv - self_term)
    grad_mean = w[:, None] * grad
    return kv_mean, grad_mean
