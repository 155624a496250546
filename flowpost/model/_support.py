"""Supports of parameters and the bijections that map them onto the real line.

Particles always live in an unconstrained space ``R^d``; each constrained parameter is
reached through a smooth bijection ``x = T(u)``. By the change-of-variables formula the
density of ``u`` is

    log p_U(u) = log p_X(T(u)) + log |det dT/du|,

so every support below supplies ``forward`` (``u -> x``), ``inverse`` (``x -> u``) and the
log-Jacobian ``log |det dT/du|``, which :class:`flowpost.Target` adds to the user's
log-density automatically.

Supports are frozen, hashable dataclasses so that a :class:`~flowpost.Target` built from
them can be a static part of a compiled function.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp

from .._validate import fail, real

__all__ = ["Interval", "Positive", "Real", "Simplex", "as_support"]


@dataclass(frozen=True)
class Real:
    """No constraint: ``x = u``, log-Jacobian 0."""

    def free_size(self, shape: tuple[int, ...]) -> int:
        """Number of unconstrained coordinates for a parameter of ``shape``."""
        size = 1
        for s in shape:
            size *= s
        return size

    def forward(self, u: jax.Array, shape: tuple[int, ...]) -> jax.Array:
        return u.reshape(shape)

    def inverse(self, x: jax.Array) -> jax.Array:
        return x.reshape(-1)

    def log_jacobian(self, u: jax.Array) -> jax.Array:
        return jnp.zeros((), u.dtype)

    def contains(self, x: jax.Array) -> jax.Array:
        return jnp.isfinite(x)

    def describe(self) -> str:
        return "real"


@dataclass(frozen=True)
class Positive(Real):
    """Positive parameter: ``x = exp(u)``, ``log |dx/du| = u`` summed over elements."""

    def forward(self, u: jax.Array, shape: tuple[int, ...]) -> jax.Array:
        return jnp.exp(u).reshape(shape)

    def inverse(self, x: jax.Array) -> jax.Array:
        return jnp.log(x).reshape(-1)

    def log_jacobian(self, u: jax.Array) -> jax.Array:
        return jnp.sum(u)

    def contains(self, x: jax.Array) -> jax.Array:
        return jnp.isfinite(x) & (x > 0)

    def describe(self) -> str:
        return "positive"


@dataclass(frozen=True)
class Interval(Real):
    """Parameter in the open interval ``(low, high)``.

    ``x = low + (high - low) * sigmoid(u)``, so
    ``log |dx/du| = log(high - low) + log sigmoid(u) + log sigmoid(-u)``.
    """

    low: float = 0.0
    high: float = 1.0

    def __post_init__(self) -> None:
        finite = "a finite number (an unbounded side is a half-line: use fp.Positive(), or Real())"
        low = real("Interval.low", self.low, expected=finite)
        high = real("Interval.high", self.high, expected=finite)
        if not high > low:
            raise fail("Interval.high", f"a number greater than low = {low:g}", self.high)
        object.__setattr__(self, "low", low)
        object.__setattr__(self, "high", high)

    def forward(self, u: jax.Array, shape: tuple[int, ...]) -> jax.Array:
        return (self.low + (self.high - self.low) * jax.nn.sigmoid(u)).reshape(shape)

    def inverse(self, x: jax.Array) -> jax.Array:
        z = (x - self.low) / (self.high - self.low)
        return (jnp.log(z) - jnp.log1p(-z)).reshape(-1)

    def log_jacobian(self, u: jax.Array) -> jax.Array:
        width = jnp.asarray(self.high - self.low, u.dtype)
        return jnp.sum(jnp.log(width) + jax.nn.log_sigmoid(u) + jax.nn.log_sigmoid(-u))

    def contains(self, x: jax.Array) -> jax.Array:
        return jnp.isfinite(x) & (x > self.low) & (x < self.high)

    def describe(self) -> str:
        return f"interval({self.low:g}, {self.high:g})"


@dataclass(frozen=True)
class Simplex(Real):
    """Probability vector of length K on the last axis (entries > 0, summing to 1).

    Additive log-ratio map from ``K - 1`` free coordinates:
    ``x = softmax([u_1, ..., u_{K-1}, 0])``. Its Jacobian with respect to the first
    ``K - 1`` entries of ``x`` has determinant ``prod_{k=1}^{K} x_k``, so
    ``log |det| = sum_k log x_k``. Only one-dimensional simplex parameters (shape ``(K,)``)
    are supported.
    """

    def free_size(self, shape: tuple[int, ...]) -> int:
        if len(shape) != 1 or shape[0] < 2:
            raise fail("Simplex", "a simplex parameter of shape (K,) with K >= 2", tuple(shape))
        return shape[0] - 1

    def forward(self, u: jax.Array, shape: tuple[int, ...]) -> jax.Array:
        full = jnp.concatenate([u, jnp.zeros((1,), u.dtype)])
        return jax.nn.softmax(full).reshape(shape)

    def inverse(self, x: jax.Array) -> jax.Array:
        logs = jnp.log(x)
        return logs[:-1] - logs[-1]

    def log_jacobian(self, u: jax.Array) -> jax.Array:
        full = jnp.concatenate([u, jnp.zeros((1,), u.dtype)])
        return jnp.sum(jax.nn.log_softmax(full))

    def contains(self, x: jax.Array) -> jax.Array:
        ok = jnp.isfinite(x) & (x > 0)
        total_ok = jnp.abs(jnp.sum(x) - 1.0) < 1e-4
        return ok & total_ok

    def describe(self) -> str:
        return "simplex"


_BY_NAME = {"real": Real(), "positive": Positive(), "simplex": Simplex(), "unit": Interval(0.0, 1.0)}


def as_support(spec: Any) -> Real:
    """Turn a support given as an object or a name ('real', 'positive', 'simplex', 'unit')
    or a ``(low, high)`` pair into a support object."""
    if isinstance(spec, Real):
        return spec
    if isinstance(spec, str) and spec in _BY_NAME:
        return _BY_NAME[spec]
    if isinstance(spec, tuple) and len(spec) == 2:
        return Interval(spec[0], spec[1])
    raise fail(
        "support",
        f"flowpost.Positive(), Interval(low, high), Simplex(), Real(), one of {sorted(_BY_NAME)} or a (low, high) pair",
        spec,
        TypeError if not isinstance(spec, str) else ValueError,
    )
