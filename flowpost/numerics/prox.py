r"""Proximal maps of penalties and constraint sets.

The proximal map of a function :math:`g` with step :math:`h > 0` is

.. math::

    \operatorname{prox}_{h g}(v)
        = \operatorname*{arg\,min}_x \; g(x) + \frac{\lVert x - v\rVert^2}{2h}.

Splitting steppers (forward step on a smooth log-likelihood, proximal step on
a nonsmooth log-prior, exact noise) need both the map and the value
:math:`g(x)`; every term here therefore offers

* ``term(v, h)`` (alias ``term.map(v, h)``): the proximal map applied to each
  row of an ``(N, d)`` array, or to a single ``(d,)`` vector;
* ``term.value(x)``: :math:`g` of each row (shape ``(N,)``, or ``()`` for a
  vector), ``+inf`` outside the set for an indicator function.

Terms are frozen dataclasses registered as JAX pytrees: their numbers (the
penalty weights, the box bounds, the inner solver's tolerance) are traced
leaves, so a term can be an ordinary argument of a jitted function and a new
weight never recompiles; their structure (a group layout, a user's callables)
is static. Closed forms follow "Proximal algorithms" (Foundations and
Trends in Optimization, 2014), sections 6.1 and 6.5:

======================  =========================================  ==========================================
term                    :math:`g(x)`                               :math:`\operatorname{prox}_{hg}(v)`
======================  =========================================  ==========================================
``L1Penalty``           :math:`\lambda \sum_i |x_i|`               :math:`\operatorname{sign}(v)\max(|v|-h\lambda, 0)`
``WeightedL1Penalty``   :math:`\sum_i w_i |x_i|`                   :math:`\operatorname{sign}(v_i)\max(|v_i|-h w_i, 0)`
``NonNegative``         :math:`\iota\{x \ge 0\}`                   :math:`\max(v, 0)`
``Box``                 :math:`\iota\{l \le x \le u\}`             :math:`\min(\max(v, l), u)`
``GroupL1Penalty``      :math:`\lambda \sum_G \lVert x_G\rVert_2`  :math:`v_G \max(0, 1 - h\lambda/\lVert v_G\rVert_2)`
======================  =========================================  ==========================================

``UserProx`` wraps a user-supplied ``prox(v, h)`` (and optionally ``g``) into
the same interface; ``SmoothProx`` and :func:`prox_by_solver` compute the map
numerically with the inner solver when ``g`` is smooth and has no closed form.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Callable, Sequence
from typing import Any, cast

import jax
import jax.numpy as jnp
import numpy as np
from jax.core import Tracer

from .._pytree import pytree_dataclass, static
from .._validate import callable_value, fail, instance, non_negative, positive, real
from ._inner import InnerSolver, SolveReport, minimise

__all__ = [
    "Box",
    "GroupL1Penalty",
    "L1Penalty",
    "NonNegative",
    "ProxTerm",
    "SmoothProx",
    "UserProx",
    "WeightedL1Penalty",
    "prox_by_solver",
]


# ---------------------------------------------------------------------------
# input checks shared by all terms
# ---------------------------------------------------------------------------


def as_points(v: Any, name: str) -> jax.Array:
    v = jnp.asarray(v)
    if not jnp.issubdtype(v.dtype, jnp.floating):
        raise TypeError(f"{name}: expected a floating-point array; got dtype {v.dtype}")
    if v.ndim not in (1, 2):
        raise ValueError(f"{name}: expected an array of shape (d,) or (N, d); got shape {v.shape}")
    return v


def _as_step(h: Any, dtype) -> jax.Array:
    """The step ``h`` as a scalar of ``dtype``; a concrete ``h`` must be finite and > 0.

    A traced ``h`` (inside ``jit`` / ``vmap``) is only checked for shape and dtype:
    its value is not known here, and it is never converted with ``float``.
    """
    if isinstance(h, Tracer):
        if h.shape != ():
            raise fail("h", "a scalar step size", h)
        if not (jnp.issubdtype(h.dtype, jnp.floating) or jnp.issubdtype(h.dtype, jnp.integer)):
            raise TypeError(f"h: expected a real scalar step size; got dtype {h.dtype}")
    else:
        if np.ndim(h) != 0:
            raise fail("h", "a scalar step size", h)
        positive("h", h)
    return jnp.asarray(h).astype(dtype)


def _vector(name: str, values: Any, check: Callable[[str, Any], float]) -> tuple[float, ...]:
    """A non-empty 1-D sequence (tuple, list, NumPy or JAX array) checked entry by entry."""
    if isinstance(values, (np.ndarray, jax.Array)):
        if values.ndim != 1:
            raise fail(name, "a non-empty 1-D sequence of numbers", values)
        entries = list(np.asarray(values))
    elif isinstance(values, Sequence) and not isinstance(values, (str, bytes)):
        entries = list(values)
    else:
        raise fail(name, "a non-empty 1-D sequence of numbers", values, TypeError)
    if not entries:
        raise fail(name, "a non-empty 1-D sequence of numbers", values)
    return tuple(check(f"{name}[{i}]", e) for i, e in enumerate(entries))


def _bound_number(name: str, value: Any) -> float:
    """A real number or an infinite bound; ``nan`` is refused."""
    expected = "a real number (-inf or inf allowed, not nan)"
    try:
        return real(name, value, expected=expected)
    except ValueError:
        # ``real`` has already checked the kind of value; only an infinity is let through
        v = float(np.asarray(value))
        if math.isinf(v):
            return v
        raise


def _bound(name: str, value: Any) -> float | tuple[float, ...]:
    if isinstance(value, (np.ndarray, jax.Array)) and value.ndim == 0:
        return _bound_number(name, value)
    if isinstance(value, (np.ndarray, jax.Array, Sequence)) and not isinstance(value, (str, bytes)):
        return _vector(name, value, _bound_number)
    return _bound_number(name, value)


def _check_dim(name: str, length: int, d: int) -> None:
    if length != d:
        raise ValueError(f"{name}: expected {d} entries (one per coordinate of the points); got {length}")


# ---------------------------------------------------------------------------
# the interface
# ---------------------------------------------------------------------------


@pytree_dataclass
class ProxTerm:
    r"""Base class: a function :math:`g` with its proximal map.

    Subclasses implement ``_map(v, h)`` and ``_value(x)`` on a validated
    floating array of shape ``(..., d)`` and a scalar step ``h`` of the same
    dtype, and are declared with ``@pytree_dataclass`` (numbers as leaves,
    structure as :func:`~flowpost._pytree.static` fields) so that a term can be
    an ordinary argument of a jitted function. ``_map`` and ``_value`` must work
    when the leaves are tracers: no ``float(...)`` or ``if`` on them.
    """

    def __call__(self, v: jax.Array, h: float | jax.Array) -> jax.Array:
        r"""Proximal map :math:`\operatorname{prox}_{hg}` of each row of ``v``.

        Parameters
        ----------
        v : array of shape (d,) or (N, d), floating
        h : positive scalar step size

        Returns
        -------
        array of the shape and dtype of ``v``
        """
        v = as_points(v, "v")
        return self._map(v, _as_step(h, v.dtype))

    def map(self, v: jax.Array, h: float | jax.Array) -> jax.Array:
        """Same as calling the term: ``term.map(v, h) == term(v, h)``."""
        return self(v, h)

    def value(self, x: jax.Array) -> jax.Array:
        """:math:`g` of each row of ``x``: shape ``(N,)`` for ``(N, d)`` input, ``()`` for ``(d,)``."""
        x = as_points(x, "x")
        return self._value(x)

    def _map(self, v: jax.Array, h: jax.Array) -> jax.Array:  # pragma: no cover - abstract
        raise NotImplementedError

    def _value(self, x: jax.Array) -> jax.Array:  # pragma: no cover - abstract
        raise NotImplementedError


@pytree_dataclass
class L1Penalty(ProxTerm):
    r"""Scaled L1 norm :math:`g(x) = \lambda \lVert x\rVert_1`.

    Proximal map (soft thresholding):
    :math:`\operatorname{prox}_{hg}(v)_i = \operatorname{sign}(v_i)\max(|v_i| - h\lambda, 0)`.

    Parameters
    ----------
    weight : float
        :math:`\lambda \ge 0`, finite (a traced leaf).
    """

    weight: float = 1.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "weight", non_negative("weight", self.weight))

    def _map(self, v, h):
        t = h * jnp.asarray(self.weight, v.dtype)
        return jnp.sign(v) * jnp.maximum(jnp.abs(v) - t, 0.0)

    def _value(self, x):
        return jnp.asarray(self.weight, x.dtype) * jnp.sum(jnp.abs(x), axis=-1)


@pytree_dataclass
class WeightedL1Penalty(ProxTerm):
    r"""Weighted L1 norm :math:`g(x) = \sum_i w_i |x_i|` with :math:`w_i \ge 0`.

    Proximal map (coordinate-wise soft thresholding):
    :math:`\operatorname{prox}_{hg}(v)_i = \operatorname{sign}(v_i)\max(|v_i| - h w_i, 0)`.

    Parameters
    ----------
    weights : sequence of d non-negative finite floats
        Stored as a tuple of Python floats: ``d`` traced leaves (the length is
        structure, the values are not).
    """

    weights: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "weights", _vector("weights", self.weights, non_negative))

    def _w(self, x):
        _check_dim("weights", len(self.weights), x.shape[-1])
        return jnp.asarray(self.weights, x.dtype)

    def _map(self, v, h):
        return jnp.sign(v) * jnp.maximum(jnp.abs(v) - h * self._w(v), 0.0)

    def _value(self, x):
        return jnp.sum(self._w(x) * jnp.abs(x), axis=-1)


@pytree_dataclass
class NonNegative(ProxTerm):
    r"""Indicator of the non-negative orthant, :math:`g(x) = 0` if all :math:`x_i \ge 0`, else :math:`+\infty`.

    Proximal map (Euclidean projection, independent of ``h``):
    :math:`\operatorname{prox}_{hg}(v) = \max(v, 0)`.
    """

    def _map(self, v, h):
        return jnp.maximum(v, 0.0)

    def _value(self, x):
        inside = jnp.all(x >= 0, axis=-1)
        return jnp.where(inside, jnp.zeros((), x.dtype), jnp.asarray(jnp.inf, x.dtype))


@pytree_dataclass
class Box(ProxTerm):
    r"""Indicator of the box :math:`\{x : l \le x \le u\}` (coordinate-wise).

    Proximal map (Euclidean projection, independent of ``h``):
    :math:`\operatorname{prox}_{hg}(v) = \min(\max(v, l), u)`.

    Parameters
    ----------
    lower, upper : float or sequence of d floats
        Bounds with ``lower <= upper`` elementwise; ``-inf`` / ``inf`` allowed,
        ``nan`` refused. Traced leaves (a sequence is stored as a tuple of
        floats, one leaf per coordinate).
    """

    lower: float | tuple[float, ...] = 0.0
    upper: float | tuple[float, ...] = 1.0

    def __post_init__(self) -> None:
        lo = _bound("lower", self.lower)
        hi = _bound("upper", self.upper)
        if isinstance(lo, tuple) and isinstance(hi, tuple) and len(lo) != len(hi):
            raise fail("upper", f"a sequence of the same length as lower ({len(lo)})", self.upper)
        if np.any(np.asarray(lo) > np.asarray(hi)):
            raise fail("upper", f"bounds >= lower = {lo} elementwise", hi)
        object.__setattr__(self, "lower", lo)
        object.__setattr__(self, "upper", hi)

    def _bounds(self, x):
        d = x.shape[-1]
        for name, b in (("lower", self.lower), ("upper", self.upper)):
            if isinstance(b, tuple):
                _check_dim(name, len(b), d)
        return jnp.asarray(self.lower, x.dtype), jnp.asarray(self.upper, x.dtype)

    def _map(self, v, h):
        lo, hi = self._bounds(v)
        return jnp.minimum(jnp.maximum(v, lo), hi)

    def _value(self, x):
        lo, hi = self._bounds(x)
        inside = jnp.all((x >= lo) & (x <= hi), axis=-1)
        return jnp.where(inside, jnp.zeros((), x.dtype), jnp.asarray(jnp.inf, x.dtype))


@pytree_dataclass
class GroupL1Penalty(ProxTerm):
    r"""Sum of group Euclidean norms :math:`g(x) = \lambda \sum_G \lVert x_G\rVert_2`.

    The groups must be disjoint; coordinates in no group are not penalised.
    Proximal map (block soft thresholding), group by group:

    .. math::

        \operatorname{prox}_{hg}(v)_G = v_G \max\!\Big(0,\; 1 - \frac{h\lambda}{\lVert v_G\rVert_2}\Big)

    (zero when :math:`v_G = 0`), and :math:`v_i` unchanged for ungrouped
    coordinates.

    Parameters
    ----------
    groups : tuple of index tuples, or a sequence of d integer group ids
        Either ``((0, 1), (2, 3, 4))`` -- disjoint tuples of coordinate
        indices -- or ``(0, 0, 1, 1, 1)`` -- one group id per coordinate
        (equal ids form a group; a negative id leaves that coordinate
        unpenalised). Stored in the normalised tuple form; static (the layout
        fixes the shapes of the computation).
    weight : float
        :math:`\lambda \ge 0`, finite (a traced leaf).
    """

    groups: tuple = static(default=())
    weight: float = 1.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "weight", non_negative("weight", self.weight))
        layout = "a non-empty tuple of index tuples or a sequence of integer group ids"
        groups = self.groups
        if isinstance(groups, (np.ndarray, jax.Array)):
            groups = np.asarray(groups).tolist()
        if not isinstance(groups, Sequence) or isinstance(groups, (str, bytes)):
            raise fail("groups", layout, self.groups, TypeError)
        if len(groups) == 0:
            raise fail("groups", layout, self.groups)
        is_int = [isinstance(g, numbers.Integral) and not isinstance(g, bool) for g in groups]
        if all(is_int):
            ids = tuple(int(g) for g in groups)
            if all(i < 0 for i in ids):
                raise fail("groups", "group ids with at least one id >= 0", self.groups)
            object.__setattr__(self, "groups", ids)
            return
        if any(is_int):
            raise fail("groups", "either all integers (group ids) or all index tuples, not a mix", self.groups)
        norm: list[tuple[int, ...]] = []
        seen: set[int] = set()
        for k, g in enumerate(groups):
            if isinstance(g, (np.ndarray, jax.Array)):
                g = np.asarray(g).tolist()
            if not isinstance(g, Sequence) or isinstance(g, (str, bytes)):
                raise fail(f"groups[{k}]", "a non-empty tuple of coordinate indices", g, TypeError)
            if len(g) == 0:
                raise fail(f"groups[{k}]", "a non-empty tuple of coordinate indices", g)
            idx = []
            for i in g:
                if isinstance(i, bool) or not isinstance(i, numbers.Integral):
                    raise fail(f"groups[{k}]", "non-negative integer indices", g, TypeError)
                if i < 0:
                    raise fail(f"groups[{k}]", "non-negative integer indices", g)
                if int(i) in seen:
                    raise fail(
                        f"groups[{k}]",
                        f"indices in no earlier group (groups must be disjoint; {int(i)} repeats)",
                        g,
                    )
                seen.add(int(i))
                idx.append(int(i))
            norm.append(tuple(idx))
        object.__setattr__(self, "groups", tuple(norm))

    @property
    def _as_ids(self) -> bool:
        return not isinstance(self.groups[0], tuple)

    def group_ids(self, d: int) -> tuple[np.ndarray, int]:
        """Per-coordinate group index in ``0..G-1`` (``G`` for ungrouped) and ``G``.

        Parameters
        ----------
        d : int
            Dimension of the points.
        """
        if self._as_ids:
            _check_dim("groups (group ids)", len(self.groups), d)
            raw = np.asarray(self.groups)
            labels = np.unique(raw[raw >= 0])
            n_groups = len(labels)
            ids = np.full(d, n_groups, dtype=np.int32)
            ids[raw >= 0] = np.searchsorted(labels, raw[raw >= 0])
            return ids, n_groups
        n_groups = len(self.groups)
        ids = np.full(d, n_groups, dtype=np.int32)
        for k, g in enumerate(self.groups):
            if max(g) >= d:
                raise fail(f"groups[{k}]", f"indices < d = {d} (the points' dimension)", g)
            ids[list(g)] = k
        return ids, n_groups

    def _group_norms(self, x):
        ids, n_groups = self.group_ids(x.shape[-1])
        sq = jnp.zeros((*x.shape[:-1], n_groups + 1), x.dtype).at[..., ids].add(x * x)
        return jnp.sqrt(sq), ids, n_groups

    def _map(self, v, h):
        norms, ids, n_groups = self._group_norms(v)
        t = h * jnp.asarray(self.weight, v.dtype)
        norm_i = norms[..., ids]
        nonzero = norm_i > 0
        factor = jnp.where(nonzero, 1.0 - t / jnp.where(nonzero, norm_i, 1.0), 0.0)
        factor = jnp.maximum(factor, 0.0)
        factor = jnp.where(ids == n_groups, jnp.ones((), v.dtype), factor)
        return (v * factor).astype(v.dtype)

    def _value(self, x):
        norms, _, n_groups = self._group_norms(x)
        return jnp.asarray(self.weight, x.dtype) * jnp.sum(norms[..., :n_groups], axis=-1)


@pytree_dataclass
class UserProx(ProxTerm):
    r"""Wrap a user-supplied proximal map into the :class:`ProxTerm` interface.

    Parameters
    ----------
    prox : callable
        ``prox(v, h) -> x`` for a single point ``v`` of shape ``(d,)``;
        rows of an ``(N, d)`` input are handled with :func:`jax.vmap`. Must
        return an array of the shape of ``v``.
    value_fn : callable, optional
        ``value_fn(x) -> scalar`` giving :math:`g(x)` for one point (may be
        ``+inf`` outside a set). Without it ``value`` raises
        ``NotImplementedError``.

    Notes
    -----
    Both functions are static fields of the pytree, compared and hashed by
    identity: define them once (not as fresh lambdas inside a loop) to avoid
    recompilation.
    """

    prox: Callable[[jax.Array, jax.Array], jax.Array] = static()
    value_fn: Callable[[jax.Array], jax.Array] | None = static(default=None)

    def __post_init__(self) -> None:
        callable_value("prox", self.prox, "a callable prox(v, h)")
        if self.value_fn is not None:
            callable_value("value_fn", self.value_fn, "None or a callable value_fn(x) -> scalar")

    def _map(self, v, h):
        def one(u):
            out = jnp.asarray(self.prox(u, h))
            if out.shape != u.shape:
                raise ValueError(
                    f"prox: expected a function returning an array of the shape of its input "
                    f"{u.shape}; got shape {out.shape}"
                )
            return out.astype(u.dtype)

        return jax.vmap(one)(v) if v.ndim == 2 else one(v)

    def _value(self, x):
        if self.value_fn is None:
            raise NotImplementedError(
                "this UserProx was built without value_fn, so g(x) is not available; pass value_fn=... to UserProx"
            )

        value_fn = self.value_fn

        def one(u):
            out = jnp.asarray(value_fn(u))
            if out.shape != ():
                raise ValueError(f"value_fn: expected a function returning a scalar; got shape {out.shape}")
            return out.astype(u.dtype)

        return jax.vmap(one)(x) if x.ndim == 2 else one(x)


def as_prox_term(name: str, value: Any) -> ProxTerm:
    """``value`` as a proximal term: a :class:`ProxTerm` as it is, a user callable
    ``prox(v, h)`` wrapped in :class:`UserProx`; anything else is refused naming ``name``."""
    if isinstance(value, ProxTerm):
        return value
    if callable(value) and not isinstance(value, type):
        return UserProx(cast("Callable[[jax.Array, jax.Array], jax.Array]", value))
    raise fail(
        name,
        "a proximal term from flowpost.prox (e.g. flowpost.prox.L1Penalty(2.0), "
        "flowpost.prox.Box(0.0, 1.0)) or a callable prox(v, h)",
        value,
        TypeError,
    )


@pytree_dataclass
class SmoothProx(ProxTerm):
    r"""Proximal map of a smooth :math:`g` computed numerically (see :func:`prox_by_solver`).

    Parameters
    ----------
    g : callable
        ``g(x) -> scalar`` for one point ``x`` of shape ``(d,)``, differentiable.
        Static (compared and hashed by identity).
    solver : InnerSolver
        Inner solver configuration; a pytree subtree whose numbers are traced.
    """

    g: Callable[[jax.Array], jax.Array] = static()
    solver: InnerSolver = InnerSolver()

    def __post_init__(self) -> None:
        callable_value("g", self.g, "a callable g(x) -> scalar")
        instance("solver", self.solver, InnerSolver, "an InnerSolver")

    def _map(self, v, h):
        x, _ = prox_by_solver(self.g, v, h, self.solver)
        return x

    def _value(self, x):
        one = lambda u: jnp.asarray(self.g(u)).astype(u.dtype)
        return jax.vmap(one)(x) if x.ndim == 2 else one(x)


def prox_by_solver(
    g: Callable[[jax.Array], jax.Array],
    v: jax.Array,
    h: float | jax.Array,
    solver: InnerSolver = InnerSolver(),
) -> tuple[jax.Array, SolveReport]:
    r"""Proximal map of a smooth function by numerical minimisation.

    Solves, for each row :math:`v` of ``v`` (``jax.vmap`` over rows),

    .. math::

        \operatorname{prox}_{hg}(v) = \operatorname*{arg\,min}_x\;
            h\,g(x) + \tfrac12 \lVert x - v\rVert^2

    (the usual objective multiplied by :math:`h`, same minimiser) with
    :func:`flowpost.numerics.minimise`, warm-started at :math:`x = v`. The
    residual is the max-abs norm of :math:`h\nabla g(x) + x - v`; for convex
    :math:`g` the objective is 1-strongly convex, so the returned point is
    within :math:`\sqrt{d}\,\mathrm{residual}` (Euclidean) of the exact
    proximal point.

    Parameters
    ----------
    g : callable
        ``g(x) -> scalar`` for one point of shape ``(d,)``, differentiable.
    v : array of shape (d,) or (N, d), floating
    h : positive scalar step size
    solver : InnerSolver
        Inner solver configuration (tolerance in units of ``x``).

    Returns
    -------
    x : array of the shape and dtype of ``v``
    report : SolveReport
        Per row (fields of shape ``(N,)`` for ``(N, d)`` input).
    """
    callable_value("g", g, "a callable g(x) -> scalar")
    instance("solver", solver, InnerSolver, "an InnerSolver")
    v = as_points(v, "v")
    h = _as_step(h, v.dtype)

    def one(u):
        def objective(x):
            gx = jnp.asarray(g(x))
            if gx.shape != ():
                raise ValueError(f"g: expected a function returning a scalar; got shape {gx.shape}")
            return h * gx.astype(x.dtype) + 0.5 * jnp.sum((x - u) ** 2)

        return minimise(solver, objective, u)

    return jax.vmap(one)(v) if v.ndim == 2 else one(v)
