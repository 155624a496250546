r"""Positive-definite kernels, bandwidth rules and memory-bounded pairwise sums.

Every interacting stepper of the library (SVGD, the blob / kernel-density flow,
the JKO step) and the kernel Stein discrepancy need sums over all pairs of
particles.  With ``N`` particles the full ``N x N`` kernel matrix would cost
``O(N^2)`` memory; everything in this module instead walks over *row blocks*
of ``block`` destination points at a time (``lax.map``), so that peak memory
is ``O(block * N)``.

Kernels
-------
Both kernels are *radial*: ``k(x, y) = f(r2)`` with ``r2 = |x - y|^2``.  A
kernel is described by its profile ``f`` and the first two derivatives
``f'(r2)`` and ``f''(r2)`` (derivatives with respect to ``r2``), from which
every quantity used in the library follows in closed form:

.. math::

    \nabla_x k(x, y) = 2 f'(r_2)\,(x - y), \qquad
    \nabla_y k(x, y) = -2 f'(r_2)\,(x - y),

    \operatorname{tr} \nabla_x \nabla_y k(x, y) = -2 d f'(r_2) - 4 r_2 f''(r_2).

* :class:`RBF` -- Gaussian kernel ``k(x, y) = exp(-r2 / (2 h^2))`` with
  bandwidth ``h`` (fixed, or the median heuristic when ``bandwidth=None``).
* :class:`IMQ` -- inverse multiquadric ``k(x, y) = (c^2 + r2)^beta`` with
  ``c > 0`` and ``beta < 0``.

Kernel configurations are frozen, hashable dataclasses holding Python floats,
so they can be passed as static arguments of :func:`jax.jit`.  A data-driven
or traced length scale is passed separately through the ``scale`` argument
that every function here accepts.

Squared distances inside a block are computed as
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
``N x N``).  Built on it: :func:`kernel_sums` (the two sums SVGD needs),
:func:`log_kde` / :func:`grad_log_kde` (Gaussian kernel density in blocks),
and, in :mod:`flowpost.discrepancy`, the kernel Stein discrepancy.

Random batches
--------------
:func:`random_batch_sums` and :func:`interaction_means` implement the random
batch interaction of "Random batch methods for interacting particle systems"
(2020): particles are randomly permuted into batches of ``p`` and interact
only within their batch, costing ``O(N p)`` per call.  A stepper passes
``batch=None`` (all pairs, blocked) or ``batch=p`` plus a key.

All functions take ``(N, d)`` arrays, are jit/vmap friendly and keep the
caller's floating dtype.
"""

from __future__ import annotations

import dataclasses
import math
from functools import partial
from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np
from jax import lax
from jax.scipy.linalg import solve_triangular
from jax.scipy.special import logsumexp

Array = jax.Array
ArrayLike = Any

__all__ = [
    "DEFAULT_BLOCK",
    "DEFAULT_MEDIAN_POINTS",
    "RBF",
    "IMQ",
    "RadialKernel",
    "median_distance",
    "normal_reference_bandwidth",
    "pairwise_sqdist",
    "map_row_blocks",
    "kernel_sums",
    "random_batch_sums",
    "interaction_means",
    "log_kde",
    "grad_log_kde",
    "Whitening",
    "whiten",
]

#: Default number of destination rows processed at once by the blocked sums.
#: A block holds a few ``(block, N)`` arrays: with ``N = 10^5`` and float32
#: that is about 200 MB per array, so lower it for very large ensembles.
DEFAULT_BLOCK: int = 512

#: Default size of the deterministic subset used by :func:`median_distance`.
DEFAULT_MEDIAN_POINTS: int = 1000

_HIGHEST = lax.Precision.HIGHEST


# --------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------

def _as_points(name: str, x: ArrayLike) -> Array:
    """Return ``x`` as a floating ``(N, d)`` array or raise a clear error."""
    x = jnp.asarray(x)
    if not jnp.issubdtype(x.dtype, jnp.inexact):
        raise TypeError(
            f"`{name}` must be a floating-point array of shape (N, d); got dtype {x.dtype}"
        )
    if x.ndim != 2:
        raise ValueError(f"`{name}` must have shape (N, d); got shape {x.shape}")
    if x.shape[0] < 1:
        raise ValueError(f"`{name}` must contain at least one point; got shape {x.shape}")
    return x


def _check_block(block: Any) -> int:
    if isinstance(block, bool) or not isinstance(block, int):
        raise TypeError(f"`block` must be a positive Python int; got {block!r}")
    if block < 1:
        raise ValueError(f"`block` must be a positive int; got {block}")
    return block


def _check_positive_float(name: str, value: Any, allow_none: bool = False) -> float | None:
    if value is None and allow_none:
        return None
    if isinstance(value, jax.core.Tracer) or (
        isinstance(value, jax.Array) and value.ndim > 0
    ):
        raise TypeError(
            f"`{name}` must be a Python float (kernel configs are static); "
            "pass a traced or data-dependent value through the `scale` argument instead"
        )
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"`{name}` must be a positive float; got {value!r}") from None
    if not math.isfinite(v) or v <= 0.0:
        raise ValueError(f"`{name}` must be a positive finite float; got {value!r}")
    return v


def _same_dim(name_a: str, a: Array, name_b: str, b: Array) -> None:
    if a.shape[1] != b.shape[1]:
        raise ValueError(
            f"`{name_b}` must have dimension d = {a.shape[1]} like `{name_a}`; got shape {b.shape}"
        )


# --------------------------------------------------------------------------
# bandwidth rules
# --------------------------------------------------------------------------

@partial(jax.jit, static_argnames=("max_points",))
def median_distance(x: ArrayLike, *, max_points: int = DEFAULT_MEDIAN_POINTS) -> Array:
    r"""Median of the pairwise Euclidean distances ``|x_i - x_j|``, ``i < j``.

    When ``N > max_points`` the median is taken over the deterministic subset
    of ``m = max_points`` rows with indices ``floor(k * N / m)``,
    ``k = 0, ..., m - 1`` (evenly spaced through the array), so the cost is
    ``O(m^2)`` time and memory whatever ``N`` is.

    The median over the unordered pairs equals the median over all
    off-diagonal entries of the symmetric distance matrix (each pair appears
    twice, which leaves the median unchanged).  With an even number of pairs
    the two middle distances are averaged.  Differentiable (coincident points
    contribute distance 0 with zero gradient).

    Parameters
    ----------
    x : (N, d) array, N >= 2
    max_points : int
        Largest number of points used (default :data:`DEFAULT_MEDIAN_POINTS`).

    Returns
    -------
    Scalar array of the dtype of ``x``.
    """
    x = _as_points("x", x)
    n = x.shape[0]
    if isinstance(max_points, bool) or not isinstance(max_points, int) or max_points < 2:
        raise ValueError(f"`max_points` must be an int >= 2; got {max_points!r}")
    if n < 2:
        raise ValueError(f"`x` needs at least 2 points for a median distance; got shape {x.shape}")
    m = min(n, max_points)
    if m < n:
        idx = (jnp.arange(m) * n) // m
        x = x[idx]
    r2 = pairwise_sqdist(x, x)
    off_diag = r2.reshape(-1)[1:].reshape(m - 1, m + 1)[:, :-1]
    positive = off_diag > 0
    dist = jnp.where(positive, jnp.sqrt(jnp.where(positive, off_diag, 1.0)), 0.0)
    # The two middle order statistics by bisection on counts instead of a sort (a sort of
    # m(m-1) values dominates an SVGD step on a CPU): the k-th smallest value is the least t
    # with #{dist <= t} >= k. 60 halvings of [0, max] reach the dtype's resolution; the
    # value returned is the largest distance not above the converged bracket, so it is an
    # exact element of ``dist``.
    total = m * (m - 1)
    ks = jnp.array([(total + 1) // 2, total // 2 + 1])
    flat = lax.stop_gradient(dist.reshape(-1))

    def halve(_, bracket):
        lo, hi = bracket
        mid = 0.5 * (lo + hi)
        enough = jnp.sum(flat[None, :] <= mid[:, None], axis=1) >= ks
        return jnp.where(enough, lo, mid), jnp.where(enough, mid, hi)

    top = jnp.max(flat)
    _, hi = lax.fori_loop(0, 60, halve, (jnp.zeros(2, flat.dtype), jnp.full((2,), top, flat.dtype)))
    picked = jnp.max(jnp.where(flat[None, :] <= hi[:, None], flat[None, :], 0.0), axis=1)
    # re-attach the gradient: the order statistics are elements of ``dist``
    which = jnp.argmin(jnp.abs(flat[None, :] - picked[:, None]), axis=1)
    return 0.5 * (dist.reshape(-1)[which[0]] + dist.reshape(-1)[which[1]])


@jax.jit
def normal_reference_bandwidth(x: ArrayLike) -> Array:
    r"""Rule-of-thumb bandwidth for an isotropic Gaussian kernel density.

    The normal-reference rule: for Gaussian data with covariance
    ``sigma^2 I`` and an isotropic Gaussian kernel, the bandwidth minimising
    the asymptotic mean integrated squared error is

    .. math:: h = \sigma \left( \frac{4}{(d + 2) N} \right)^{1/(d + 4)}

    ("Density estimation for statistics and data analysis" (1986), sec. 4.3;
    quoted from memory).  Here ``sigma^2 = tr(Sigma) / d`` is the mean
    per-coordinate sample variance (``N - 1`` denominator).  For strongly
    anisotropic ensembles apply it in whitened coordinates (see
    :func:`whiten`), where ``sigma = 1``.  Returns ``1.0`` times the rate
    factor when all points coincide (zero variance).
    """
    x = _as_points("x", x)
    n, d = x.shape
    if n < 2:
        raise ValueError(f"`x` needs at least 2 points for a variance; got shape {x.shape}")
    var = jnp.mean(jnp.var(x, axis=0, ddof=1))
    sigma = jnp.sqrt(jnp.where(var > 0, var, jnp.ones_like(var)))
    return sigma * (4.0 / ((d + 2.0) * n)) ** (1.0 / (d + 4.0))


# --------------------------------------------------------------------------
# kernels
# --------------------------------------------------------------------------

class RadialKernel:
    r"""Base class of radial kernels ``k(x, y) = f(|x - y|^2)``.

    Subclasses define :meth:`profile` (``f``, ``f'``, ``f''`` as functions of
    the squared distance and the resolved length scale) and
    :meth:`scale_for` (the length scale to use with a given set of points).
    """

    def scale_for(self, x: Array) -> Array:  # pragma: no cover - abstract
        raise NotImplementedError

    def fixed_scale(self) -> float | None:  # pragma: no cover - abstract
        raise NotImplementedError

    def profile(self, r2: Array, scale: Array) -> tuple[Array, Array, Array]:  # pragma: no cover
        raise NotImplementedError

    # -- helpers shared by the subclasses ---------------------------------
    def _resolve(self, scale: ArrayLike | None, dtype) -> Array:
        if scale is None:
            fixed = self.fixed_scale()
            if fixed is None:
                raise ValueError(
                    f"{self!r} has a data-driven scale: pass `scale=` explicitly "
                    "(e.g. kernel.scale_for(points))"
                )
            scale = fixed
        return jnp.asarray(scale, dtype=dtype)

    def value(self, x: ArrayLike, y: ArrayLike, scale: ArrayLike | None = None) -> Array:
        """Kernel value ``k(x, y)``; ``x`` and ``y`` broadcast over leading axes, last axis ``d``."""
        x, y = jnp.asarray(x), jnp.asarray(y)
        dtype = jnp.result_type(x, y)
        s = self._resolve(scale, dtype)
        r2 = jnp.sum((x - y) ** 2, axis=-1)
        return self.profile(r2, s)[0]

    def grad_x(self, x: ArrayLike, y: ArrayLike, scale: ArrayLike | None = None) -> Array:
        r"""Gradient in the first argument, ``\nabla_x k(x, y) = 2 f'(r_2) (x - y)``."""
        x, y = jnp.asarray(x), jnp.asarray(y)
        dtype = jnp.result_type(x, y)
        s = self._resolve(scale, dtype)
        diff = x - y
        r2 = jnp.sum(diff**2, axis=-1)
        return 2.0 * self.profile(r2, s)[1][..., None] * diff


@dataclasses.dataclass(frozen=True)
class RBF(RadialKernel):
    r"""Gaussian (squared-exponential) kernel ``k(x, y) = exp(-|x - y|^2 / (2 h^2))``.

    Profile, with ``a = 1 / (2 h^2)``: ``f = exp(-a r2)``, ``f' = -a f``,
    ``f'' = a^2 f``.

    Parameters
    ----------
    bandwidth : float or None
        ``h > 0``.  ``None`` selects the median heuristic of "Stein variational
        gradient descent" (2016): that paper writes ``exp(-r2 / b)`` with
        ``b = med^2 / log N``; in the present parametrisation
        ``h^2 = med^2 / (2 log(N + 1))`` (``N + 1`` so that ``N = 1`` is
        harmless), where ``med`` is :func:`median_distance` of the source
        points.  The data-driven bandwidth is treated as a constant under
        differentiation (``lax.stop_gradient``), as is usual for SVGD; if the
        median is zero (more than half the pairs coincide) ``med = 1`` is used.
    """

    bandwidth: float | None = None

    def __post_init__(self) -> None:
        object.__setattr__(
            self, "bandwidth", _check_positive_float("bandwidth", self.bandwidth, allow_none=True)
        )

    def fixed_scale(self) -> float | None:
        return self.bandwidth

    def scale_for(self, x: Array) -> Array:
        x = _as_points("x", x)
        if self.bandwidth is not None:
            return jnp.asarray(self.bandwidth, dtype=x.dtype)
        n = x.shape[0]
        if n < 2:
            return jnp.ones((), dtype=x.dtype)
        med = lax.stop_gradient(median_distance(x))
        med = jnp.where(med > 0, med, jnp.ones_like(med))
        return med / math.sqrt(2.0 * math.log(n + 1.0))

    def profile(self, r2: Array, scale: Array) -> tuple[Array, Array, Array]:
        a = 0.5 / (scale * scale)
        f = jnp.exp(-a * r2)
        return f, -a * f, a * a * f


@dataclasses.dataclass(frozen=True)
class IMQ(RadialKernel):
    r"""Inverse multiquadric kernel ``k(x, y) = (c^2 + |x - y|^2)^beta``.

    With ``u = c^2 + r2``: ``f = u^beta``, ``f' = beta u^(beta - 1)``,
    ``f'' = beta (beta - 1) u^(beta - 2)``.  Positive definite for every
    ``beta < 0``; "Measuring sample quality with kernels" (2017) shows that
    its Stein discrepancy detects non-convergence for ``-1 < beta < 0``
    (default ``beta = -1/2``, ``c = 1``).

    Parameters
    ----------
    scale : float
        ``c > 0``.
    power : float
        ``beta < 0``.
    """

    scale: float = 1.0
    power: float = -0.5

    def __post_init__(self) -> None:
        object.__setattr__(self, "scale", _check_positive_float("scale", self.scale))
        try:
            p = float(self.power)
        except (TypeError, ValueError):
            raise TypeError(f"`power` must be a negative float; got {self.power!r}") from None
        if not math.isfinite(p) or p >= 0.0:
            raise ValueError(f"`power` must be a negative finite float; got {self.power!r}")
        object.__setattr__(self, "power", p)

    def fixed_scale(self) -> float:
        return self.scale

    def scale_for(self, x: Array) -> Array:
        x = _as_points("x", x)
        return jnp.asarray(self.scale, dtype=x.dtype)

    def profile(self, r2: Array, scale: Array) -> tuple[Array, Array, Array]:
        beta = self.power
        u = scale * scale + r2
        f = jnp.power(u, beta)
        df = beta * f / u
        d2f = (beta - 1.0) * df / u
        return f, df, d2f


def _resolve_scale(kernel: RadialKernel, x_src: Array, scale: ArrayLike | None) -> Array:
    if not isinstance(kernel, RadialKernel):
        raise TypeError(f"`kernel` must be a kernel config such as RBF() or IMQ(); got {kernel!r}")
    if scale is None:
        return kernel.scale_for(x_src)
    return jnp.asarray(scale, dtype=x_src.dtype)


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


def map_row_blocks(fn: Callable[[Any], Any], rows: Any, *, block: int = DEFAULT_BLOCK) -> Any:
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
    """
    block = _check_block(block)
    leaves = jax.tree.leaves(rows)
    if not leaves:
        raise ValueError("`rows` must contain at least one array")
    n = leaves[0].shape[0]
    for leaf in leaves:
        if leaf.ndim < 1 or leaf.shape[0] != n:
            raise ValueError(
                f"all arrays in `rows` must share the leading length {n}; got shape {leaf.shape}"
            )
    if n < 1:
        raise ValueError("`rows` must have at least one row")
    b = min(block, n)
    n_blocks = -(-n // b)
    pad = n_blocks * b - n

    def split(a: Array) -> Array:
        if pad:
            a = jnp.pad(a, [(0, pad)] + [(0, 0)] * (a.ndim - 1), mode="edge")
        return a.reshape((n_blocks, b) + a.shape[1:])

    out = lax.map(jax.checkpoint(fn), jax.tree.map(split, rows))

    def join(a: Array) -> Array:
        return a.reshape((n_blocks * b,) + a.shape[2:])[:n]

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
            f"`values` must have leading dimension N = {n} (one row per source point); "
            f"got shape {values.shape}"
        )
    trailing = values.shape[1:]
    return values.reshape(n, -1), trailing


@partial(jax.jit, static_argnames=("kernel", "block"))
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
        Static kernel configuration.
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
    x_src = _as_points("x_src", x_src)
    x_dst = x_src if x_dst is None else _as_points("x_dst", x_dst)
    _same_dim("x_src", x_src, "x_dst", x_dst)
    _check_block(block)
    n = x_src.shape[0]
    v, trailing = _flat_values(values, n)
    s = _resolve_scale(kernel, x_src, scale)
    shift = lax.stop_gradient(jnp.mean(x_src, axis=0))
    xc = x_src - shift
    yc = x_dst - shift
    kv, grad = map_row_blocks(lambda yb: _sums_block(kernel, s, yb, xc, v), yc, block=block)
    return kv.reshape((x_dst.shape[0],) + trailing), grad


def _check_batch(batch: Any, n: int) -> int:
    if isinstance(batch, bool) or not isinstance(batch, int):
        raise TypeError(f"`batch` must be None or a Python int; got {batch!r}")
    if batch < 2 or batch > n:
        raise ValueError(f"`batch` must satisfy 2 <= batch <= N = {n}; got {batch}")
    return batch


@partial(jax.jit, static_argnames=("kernel", "batch"))
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
    kernel : RBF or IMQ (static)
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
    x = _as_points("x", x)
    n, d = x.shape
    p = _check_batch(batch, n)
    v, trailing = _flat_values(values, n)
    s = _resolve_scale(kernel, x, scale)
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
        kv_g, grad_g = jax.vmap(group)(
            xp[:n_regular].reshape(-1, p, d), vp[:n_regular].reshape(-1, p, v.shape[1])
        )
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
    return kv_p[inverse].reshape((n,) + trailing), grad_p[inverse], size_p[inverse]


@partial(jax.jit, static_argnames=("kernel", "batch", "block"))
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
    """
    x = _as_points("x", x)
    n = x.shape[0]
    if batch is None:
        kv, grad = kernel_sums(kernel, x, values, block=block, scale=scale)
        return kv / n, grad / n
    if key is None:
        raise ValueError("`key` is required when `batch` is an int (random-batch interaction)")
    _check_batch(batch, n)
    s = _resolve_scale(kernel, x, scale)
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


# --------------------------------------------------------------------------
# Gaussian kernel density in blocks
# --------------------------------------------------------------------------

def _check_bandwidth(bandwidth: Any) -> None:
    """Check a concrete bandwidth (Python or numpy number); traced values pass."""
    if isinstance(bandwidth, bool):
        raise TypeError("`bandwidth` must be a positive scalar; got a bool")
    if isinstance(bandwidth, (int, float, np.floating, np.integer)):
        _check_positive_float("bandwidth", bandwidth)


def _kde_setup(y: ArrayLike, centres: ArrayLike, bandwidth: ArrayLike):
    y = _as_points("y", y)
    centres = _as_points("centres", centres)
    _same_dim("centres", centres, "y", y)
    h = jnp.asarray(bandwidth, dtype=jnp.result_type(y, centres))
    if h.ndim != 0:
        raise ValueError(f"`bandwidth` must be a scalar; got shape {h.shape}")
    shift = lax.stop_gradient(jnp.mean(centres, axis=0))
    return y - shift, centres - shift, h


def log_kde(
    y: ArrayLike, centres: ArrayLike, bandwidth: ArrayLike, *, block: int = DEFAULT_BLOCK
) -> Array:
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
    return _log_kde(y, centres, bandwidth, block=_check_block(block))


@partial(jax.jit, static_argnames=("block",))
def _log_kde(y, centres, bandwidth, *, block):
    yc, xc, h = _kde_setup(y, centres, bandwidth)
    n, d = xc.shape
    log_norm = math.log(n) + 0.5 * d * jnp.log(2.0 * jnp.pi * h * h)
    inv = 0.5 / (h * h)

    def rows(yb: Array) -> Array:
        return logsumexp(-inv * pairwise_sqdist(yb, xc), axis=1)

    return map_row_blocks(rows, yc, block=block) - log_norm


def grad_log_kde(
    y: ArrayLike, centres: ArrayLike, bandwidth: ArrayLike, *, block: int = DEFAULT_BLOCK
) -> Array:
    r"""Gradient in ``y`` of :func:`log_kde`, in closed form.

    .. math::

        \nabla_y \log \hat\mu(y_i) = \frac{1}{h^2} \Big(\sum_j w_{ij} x_j - y_i\Big),
        \qquad w_{ij} = \operatorname{softmax}_j\Big(-\frac{|y_i - x_j|^2}{2h^2}\Big).

    Returns an ``(M, d)`` array; memory ``O(block N)``.
    """
    _check_bandwidth(bandwidth)
    return _grad_log_kde(y, centres, bandwidth, block=_check_block(block))


@partial(jax.jit, static_argnames=("block",))
def _grad_log_kde(y, centres, bandwidth, *, block):
    yc, xc, h = _kde_setup(y, centres, bandwidth)
    inv = 0.5 / (h * h)

    def rows(yb: Array) -> Array:
        w = jax.nn.softmax(-inv * pairwise_sqdist(yb, xc), axis=1)
        return (jnp.matmul(w, xc, precision=_HIGHEST) - yb) / (h * h)

    return map_row_blocks(rows, yc, block=block)


# --------------------------------------------------------------------------
# whitening
# --------------------------------------------------------------------------

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
    x = _as_points("x", x)
    n, d = x.shape
    if ridge is None:
        ridge = math.sqrt(float(jnp.finfo(x.dtype).eps))
    else:
        ridge = _check_positive_float("ridge", ridge)
    m = jnp.mean(x, axis=0)
    xc = x - m
    cov = jnp.matmul(xc.T, xc, precision=_HIGHEST) / max(n - 1, 1)
    tr = jnp.trace(cov)
    lam = jnp.where(tr > 0, ridge * tr / d, jnp.ones_like(tr))
    chol = jnp.linalg.cholesky(cov + lam * jnp.eye(d, dtype=x.dtype))
    return Whitening(mean=m, chol=chol)
