"""The stepper protocol: how any particle flow plugs into :func:`flowpost.run`.

A **stepper** is an immutable, hashable configuration object (a frozen dataclass) with two
pure functions:

``start(target, x, key) -> state``
    Build the stepper's state from the unconstrained starting ensemble ``x`` of shape
    ``(N, d)``. ``state`` is any pytree of arrays whose field ``x`` holds the current
    ``(N, d)`` ensemble (a NamedTuple with an ``x`` field is the usual choice). A stepper
    that already evaluates the log-density and score may also keep them in fields
    ``logp`` ``(N,)`` and ``score`` ``(N, d)`` for the ensemble ``x``: the monitor then reuses
    them instead of recomputing.

``advance(target, state, key) -> (state, stats)``
    Take one step of the flow. ``key`` is a fresh PRNG key for this step. ``stats`` is a
    small dict of scalar arrays with per-step figures for the monitor, for example
    ``{"grad_evals": 1.0}`` (score evaluations per particle in this step), ``"accept"``
    (acceptance rate), ``"inner_iters"``, ``"inner_residual"``, ``"inner_capped"`` (count of
    inner solves that stopped at their cap). The monitor averages stats over the steps of a
    window, except names starting with ``n_`` or ending in ``_evals`` or ``_capped``, which
    it sums. Every step must return the same stats structure.

Both functions are traced by JAX (``advance`` inside ``lax.scan``), so they must be pure:
no Python side effects, no Python control flow on array values. The configuration object is
a static argument of the compiled window, so it must be hashable and must not hold arrays.

Two optional members:

``step_size``
    The flow time one step advances (used for drift per unit time and for halving the step
    after a blow-up via ``dataclasses.replace``). Every stepper in the library has it.
``report(state) -> dict``
    Host-side figures worth keeping in the result (e.g. a tuned step size).

Example
-------
A user's own stepper (gradient ascent with noise, written out)::

    @dataclass(frozen=True)
    class MyFlow:
        step_size: float = 1e-2

        def start(self, target, x, key):
            return ParticleState(x=x)

        def advance(self, target, state, key):
            h = self.step_size
            x = state.x + h * target.score(state.x)
            x = x + jnp.sqrt(2 * h) * jax.random.normal(key, x.shape, x.dtype)
            return ParticleState(x=x), {"grad_evals": jnp.ones((), x.dtype)}
"""
from __future__ import annotations

import math
from typing import Any, NamedTuple, Protocol, runtime_checkable

import jax

__all__ = ["Stepper", "ParticleState", "ScoredState", "check_stepper", "positive_number"]


@runtime_checkable
class Stepper(Protocol):
    """Structural type of a stepper (see the module docstring)."""

    def start(self, target, x: jax.Array, key: jax.Array) -> Any: ...

    def advance(self, target, state: Any, key: jax.Array) -> tuple[Any, dict]: ...


class ParticleState(NamedTuple):
    """State of a stepper that carries nothing but the ensemble."""

    x: jax.Array


class ScoredState(NamedTuple):
    """Ensemble with its log-density and score, for steppers that reuse them across steps."""

    x: jax.Array
    logp: jax.Array
    score: jax.Array


def check_stepper(stepper) -> None:
    """Raise a clear error if ``stepper`` does not follow the protocol."""
    if not (callable(getattr(stepper, "start", None)) and callable(getattr(stepper, "advance", None))):
        raise TypeError(
            f"stepper: expected an object with start(target, x, key) and advance(target, state, key) "
            f"methods (e.g. flowpost.Langevin(step_size=1e-3)); got {type(stepper).__name__}"
        )
    try:
        hash(stepper)
    except TypeError as err:
        raise TypeError(
            f"stepper: {type(stepper).__name__} must be hashable (use a frozen dataclass without "
            "array fields) because it is a static argument of the compiled step"
        ) from err


def positive_number(name: str, value: Any) -> float:
    """``float(value)`` when it is a positive finite number, else a clear error naming
    ``name`` (every stepper checks its ``step_size`` with this)."""
    if isinstance(value, bool):
        raise TypeError(f"{name}: must be a positive number; got {value!r}")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"{name}: must be a positive number; got {value!r}") from None
    if not (v > 0 and math.isfinite(v)):
        raise ValueError(f"{name}: must be a positive finite number; got {value!r}")
    return v
