r"""Positive-definite radial kernels and bandwidth rules.

Every interacting stepper of the library (SVGD, the blob / kernel-density flow,
the JKO step) and the kernel Stein discrepancy are built on a radial kernel
and a length scale chosen from the particles.

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

Kernel configurations are frozen dataclasses registered as JAX pytrees: the
bandwidth, scale and power are traced leaves, so a kernel is an ordinary
argument of a jitted function (a new bandwidth never recompiles, and a sweep
over bandwidths can be vmapped).  ``RBF(bandwidth=None)`` -- the median rule --
has no leaves (``None`` is an empty subtree); switching between a fixed and the
data-driven bandwidth changes the structure.  Every blocked function also
accepts a ``scale`` argument overriding the kernel's own length scale.

Bandwidth rules
---------------
:func:`median_distance` (the median pairwise distance, on a deterministic
subset of at most ``max_points`` points) drives the median heuristic of
:class:`RBF`; :func:`normal_reference_bandwidth` is the normal-reference rule
for a Gaussian kernel density.

All functions take ``(N, d)`` arrays, are jit/vmap friendly and keep the
caller's floating dtype.
"""

from __future__ import annotations

import math
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
from jax import lax

from .._pytree import pytree_dataclass
from .._validate import fail, instance, integer, positive, real

Array = jax.Array
ArrayLike = Any

__all__ = [
    "DEFAULT_MEDIAN_POINTS",
    "IMQ",
    "RBF",
    "RadialKernel",
    "median_distance",
    "normal_reference_bandwidth",
]

#: Default size of the deterministic subset used by :func:`median_distance`.
DEFAULT_MEDIAN_POINTS: int = 1000


# --------------------------------------------------------------------------
# input checks (shared with the blocked sums, the densities and whitening)
# --------------------------------------------------------------------------


def as_points(name: str, x: ArrayLike) -> Array:
    """Return ``x`` as a floating ``(N, d)`` array or raise a clear error."""
    if isinstance(x, (str, bytes)):
        raise TypeError(f"{name}: expected a floating-point array of shape (N, d); got {x!r}")
    x = jnp.asarray(x)
    if not jnp.issubdtype(x.dtype, jnp.inexact):
        raise TypeError(f"{name}: expected a floating-point array of shape (N, d); got dtype {x.dtype}")
    if x.ndim != 2:
        raise ValueError(f"{name}: expected an array of shape (N, d); got shape {x.shape}")
    if x.shape[0] < 1:
        raise ValueError(f"{name}: expected at least one point; got shape {x.shape}")
    return x


def same_dim(name_a: str, a: Array, name_b: str, b: Array) -> None:
    if a.shape[1] != b.shape[1]:
        raise ValueError(f"{name_b}: expected dimension d = {a.shape[1]} like {name_a}; got shape {b.shape}")


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
    # The squared distances come from the blocked-sums module, which itself builds on the
    # kernels defined here; importing it at call (trace) time keeps the layering acyclic.
    from ._pairwise import pairwise_sqdist

    x = as_points("x", x)
    n = x.shape[0]
    max_points = integer("max_points", max_points, minimum=2)
    if n < 2:
        raise fail("x", "at least 2 points for a median distance", x)
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
    x = as_points("x", x)
    n, d = x.shape
    if n < 2:
        raise fail("x", "at least 2 points for a variance", x)
    var = jnp.mean(jnp.var(x, axis=0, ddof=1))
    sigma = jnp.sqrt(jnp.where(var > 0, var, jnp.ones_like(var)))
    return sigma * (4.0 / ((d + 2.0) * n)) ** (1.0 / (d + 4.0))


# --------------------------------------------------------------------------
# kernels
# --------------------------------------------------------------------------


class RadialKernel:
    r"""Base class of radial kernels ``k(x, y) = f(|x - y|^2)``.

    Subclasses define :meth:`profile` (``f``, ``f'``, ``f''`` as functions of
    the squared distance and the resolved length scale),
    :meth:`scale_for` (the length scale to use with a given set of points) and
    :meth:`fixed_scale`.  A kernel is passed to jitted functions as an ordinary
    argument, so a subclass must be a pytree (declare it with
    ``@pytree_dataclass``: its numbers become traced leaves) and its methods must
    not branch in Python on those numbers.
    """

    def scale_for(self, x: Array) -> Array:  # pragma: no cover - abstract
        raise NotImplementedError

    def fixed_scale(self) -> float | Array | None:  # pragma: no cover - abstract
        raise NotImplementedError

    def profile(self, r2: Array, scale: Array) -> tuple[Array, Array, Array]:  # pragma: no cover
        raise NotImplementedError

    # -- helpers shared by the subclasses ---------------------------------
    def resolve(self, scale: ArrayLike | None, dtype) -> Array:
        if scale is None:
            fixed = self.fixed_scale()
            if fixed is None:
                raise fail(
                    "scale",
                    f"an explicit length scale for {type(self).__name__} with a data-driven "
                    "scale (e.g. scale=kernel.scale_for(points))",
                    None,
                )
            scale = fixed
        return jnp.asarray(scale, dtype=dtype)

    def value(self, x: ArrayLike, y: ArrayLike, scale: ArrayLike | None = None) -> Array:
        """Kernel value ``k(x, y)``; ``x`` and ``y`` broadcast over leading axes, last axis ``d``."""
        x, y = jnp.asarray(x), jnp.asarray(y)
        dtype = jnp.result_type(x, y)
        s = self.resolve(scale, dtype)
        r2 = jnp.sum((x - y) ** 2, axis=-1)
        return self.profile(r2, s)[0]

    def grad_x(self, x: ArrayLike, y: ArrayLike, scale: ArrayLike | None = None) -> Array:
        r"""Gradient in the first argument, ``\nabla_x k(x, y) = 2 f'(r_2) (x - y)``."""
        x, y = jnp.asarray(x), jnp.asarray(y)
        dtype = jnp.result_type(x, y)
        s = self.resolve(scale, dtype)
        diff = x - y
        r2 = jnp.sum(diff**2, axis=-1)
        return 2.0 * self.profile(r2, s)[1][..., None] * diff


@pytree_dataclass
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
        A number is a traced leaf (finite, > 0); ``None`` is an empty subtree.
    """

    bandwidth: float | None = None

    def __post_init__(self) -> None:
        if self.bandwidth is not None:
            object.__setattr__(self, "bandwidth", positive("bandwidth", self.bandwidth))

    def fixed_scale(self) -> float | Array | None:
        return self.bandwidth

    def scale_for(self, x: Array) -> Array:
        x = as_points("x", x)
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


@pytree_dataclass
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
        ``c > 0``, finite (a traced leaf).
    power : float
        ``beta < 0``, finite (a traced leaf).
    """

    scale: float = 1.0
    power: float = -0.5

    def __post_init__(self) -> None:
        object.__setattr__(self, "scale", positive("scale", self.scale))
        object.__setattr__(
            self,
            "power",
            real("power", self.power, high=0.0, high_open=True, expected="a negative finite number"),
        )

    def fixed_scale(self) -> float | Array:
        return self.scale

    def scale_for(self, x: Array) -> Array:
        x = as_points("x", x)
        return jnp.asarray(self.scale, dtype=x.dtype)

    def profile(self, r2: Array, scale: Array) -> tuple[Array, Array, Array]:
        # the power may be traced: cast it so that it never promotes the caller's dtype
        beta = jnp.asarray(self.power, dtype=jnp.result_type(r2, scale))
        u = scale * scale + r2
        f = jnp.power(u, beta)
        df = beta * f / u
        d2f = (beta - 1.0) * df / u
        return f, df, d2f


def check_kernel(kernel: Any) -> RadialKernel:
    return instance("kernel", kernel, RadialKernel, "a kernel such as RBF() or IMQ()")


def resolve_scale(kernel: RadialKernel, x_src: Array, scale: ArrayLike | None) -> Array:
    check_kernel(kernel)
    if scale is None:
        return kernel.scale_for(x_src)
    return jnp.asarray(scale, dtype=x_src.dtype)
