r"""Step-size controllers: who chooses the step ``h`` of every step, kept apart from the steppers.

:func:`flowpost.run` owns a controller; its state rides in the compiled window's carry, so a
new step size, a halving after a blow-up or an adapted step never recompiles. A controller
is a pytree (numbers traced, structure static) with

``start(dtype) -> cstate``
    Its initial state (a pytree of arrays).
``step_size(cstate, t) -> h``
    The step for global step ``t`` (traced; ``t`` an ``int32`` scalar).
``update(cstate, t, stats) -> cstate``
    After step ``t``, given the stepper's stats for that step (traced).
``rewind(cstate) -> cstate | None``
    Host side, after a blow-up and the roll-back: a state with a smaller step, or ``None``
    when this controller has no remedy (the run then stops with the reason).
``describe(cstate) -> str`` and ``report(cstate) -> dict``
    The step in words (for events) and host-side figures kept in the result.
``requires : tuple[str, ...]``
    The stats the controller reads; :func:`flowpost.run` refuses a stepper that does not
    report them.

The flow time of a run is the sum of the steps taken.

Controllers
-----------
:class:`Constant` ``h``
    the same step every time (a bare float given to ``run`` means this);
:class:`Halving` (inner controller)
    the inner controller's step times ``2^-k`` after ``k`` blow-ups (at most ``max_halvings``);
:class:`AcceptanceTarget` ``h0, accept, adapt_steps, gain``
    stochastic approximation of the log step towards a target mean acceptance probability
    for the first ``adapt_steps`` steps, frozen afterwards (any stepper that reports
    ``accept``);
:class:`Schedule` ``fn``
    ``h = fn(t)`` for a user function of the step (written with ``jax.numpy``).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, ClassVar

import jax
import jax.numpy as jnp
import numpy as np

from .._pytree import pytree_dataclass, static
from .._validate import callable_value, fail, integer, open_unit, positive

__all__ = ["AcceptanceTarget", "Constant", "Controller", "Halving", "Schedule", "as_controller"]


class Controller:
    """Base class of step-size controllers (module docstring)."""

    requires: ClassVar[tuple[str, ...]] = ()

    def start(self, dtype: Any) -> Any:  # pragma: no cover - abstract
        raise NotImplementedError

    def step_size(self, cstate: Any, t: jax.Array) -> jax.Array:  # pragma: no cover - abstract
        raise NotImplementedError

    def update(self, cstate: Any, t: jax.Array, stats: dict[str, Any]) -> Any:
        return cstate

    def rewind(self, cstate: Any) -> Any | None:
        return None

    def describe(self, cstate: Any) -> str:
        return type(self).__name__

    def report(self, cstate: Any) -> dict[str, Any]:
        return {}


def _scalar(value: Any, dtype: Any) -> jax.Array:
    return jnp.asarray(value, dtype)


@pytree_dataclass
class Constant(Controller):
    """The same step ``h`` at every step.

    Parameters
    ----------
    h : float
        The step size, > 0 and finite.
    """

    h: float

    def __post_init__(self) -> None:
        object.__setattr__(self, "h", positive("step_size", self.h))

    def start(self, dtype: Any) -> dict[str, Any]:
        return {"h": _scalar(self.h, dtype)}

    def step_size(self, cstate: dict[str, Any], t: jax.Array) -> jax.Array:
        return cstate["h"]

    def describe(self, cstate: dict[str, Any]) -> str:
        return f"step_size {float(np.asarray(cstate['h'])):.6g}"

    def report(self, cstate: dict[str, Any]) -> dict[str, Any]:
        return {"step_size": float(np.asarray(cstate["h"]))}


@pytree_dataclass
class Halving(Controller):
    """Halve the inner controller's step after each blow-up, at most ``max_halvings`` times.

    ``h_t = 2^{-k} inner.step_size(t)`` after ``k`` roll-backs. ``run(..., on_blowup="halve")``
    wraps the run's controller in this.
    """

    inner: Controller
    max_halvings: int = 10

    def __post_init__(self) -> None:
        if not isinstance(self.inner, Controller):
            raise fail("inner", "a step-size controller", self.inner, TypeError)
        object.__setattr__(self, "max_halvings", integer("max_halvings", self.max_halvings, minimum=1))

    @property
    def requires(self) -> tuple[str, ...]:  # type: ignore[override]
        return self.inner.requires

    def start(self, dtype: Any) -> dict[str, Any]:
        return {"inner": self.inner.start(dtype), "scale": _scalar(1.0, dtype), "halvings": jnp.zeros((), jnp.int32)}

    def step_size(self, cstate: dict[str, Any], t: jax.Array) -> jax.Array:
        return cstate["scale"] * self.inner.step_size(cstate["inner"], t)

    def update(self, cstate: dict[str, Any], t: jax.Array, stats: dict[str, Any]) -> dict[str, Any]:
        return {**cstate, "inner": self.inner.update(cstate["inner"], t, stats)}

    def rewind(self, cstate: dict[str, Any]) -> dict[str, Any] | None:
        done = int(np.asarray(cstate["halvings"]))
        if done >= int(self.max_halvings):
            return None
        return {**cstate, "scale": cstate["scale"] / 2, "halvings": cstate["halvings"] + 1}

    def describe(self, cstate: dict[str, Any]) -> str:
        k = int(np.asarray(cstate["halvings"]))
        return f"{self.inner.describe(cstate['inner'])} x 2^-{k}" if k else self.inner.describe(cstate["inner"])

    def report(self, cstate: dict[str, Any]) -> dict[str, Any]:
        rep = dict(self.inner.report(cstate["inner"]))
        scale = float(np.asarray(cstate["scale"]))
        if "step_size" in rep:
            rep["step_size"] = rep["step_size"] * scale
        if "tuned_step_size" in rep:
            rep["tuned_step_size"] = rep["tuned_step_size"] * scale
        rep["halvings"] = int(np.asarray(cstate["halvings"]))
        return rep


@pytree_dataclass
class AcceptanceTarget(Controller):
    r"""Adapt ``log h`` towards a target mean acceptance probability, then freeze it.

    For ``t < adapt_steps``:

        log h_{t+1} = log h_t + gain (t + 1)^{-0.6} (abar_t - accept),

    with ``abar_t`` the stepper's ``accept`` stat (the mean over particles of
    ``min(1, a_i)``); afterwards ``h`` stays at its last value, so the chain is a
    time-homogeneous Metropolis chain with the target invariant. The gains sum to infinity
    and their squares do not (the usual stochastic-approximation conditions). The default
    0.574 is the asymptotically optimal acceptance of MALA ("Optimal scaling of discrete
    approximations to Langevin diffusions", 1998).

    Parameters
    ----------
    h : float
        Initial step.
    accept : float
        Target acceptance, in (0, 1).
    adapt_steps : int
        Steps during which the step adapts (>= 0).
    gain : float
        Gain of the recursion, > 0.
    """

    h: float
    accept: float = 0.574
    adapt_steps: int = 1000
    gain: float = 1.0

    requires: ClassVar[tuple[str, ...]] = ("accept",)

    def __post_init__(self) -> None:
        object.__setattr__(self, "h", positive("step_size", self.h))
        object.__setattr__(self, "accept", open_unit("target_accept", self.accept))
        object.__setattr__(self, "adapt_steps", integer("tune_steps", self.adapt_steps, minimum=0))
        object.__setattr__(self, "gain", positive("tune_gain", self.gain))

    def start(self, dtype: Any) -> dict[str, Any]:
        return {"log_h": jnp.log(_scalar(self.h, dtype))}

    def step_size(self, cstate: dict[str, Any], t: jax.Array) -> jax.Array:
        return jnp.exp(cstate["log_h"])

    def update(self, cstate: dict[str, Any], t: jax.Array, stats: dict[str, Any]) -> dict[str, Any]:
        log_h = cstate["log_h"]
        dtype = log_h.dtype
        rate = jnp.asarray(self.gain, dtype) * (t + 1).astype(dtype) ** -0.6
        a = jnp.asarray(stats["accept"], dtype)
        moved = log_h + rate * (jnp.where(jnp.isfinite(a), a, 0.0) - jnp.asarray(self.accept, dtype))
        return {"log_h": jnp.where(t < self.adapt_steps, moved, log_h)}

    def describe(self, cstate: dict[str, Any]) -> str:
        return f"step_size {float(np.exp(np.asarray(cstate['log_h']))):.6g} (acceptance targeting)"

    def report(self, cstate: dict[str, Any]) -> dict[str, Any]:
        return {"tuned_step_size": float(np.exp(np.asarray(cstate["log_h"])))}


@pytree_dataclass
class Schedule(Controller):
    """``h_t = fn(t)``: a user function of the global step ``t`` (an ``int32`` array),
    written with ``jax.numpy`` and returning a positive scalar, e.g.
    ``Schedule(lambda t: 0.1 / (1 + t / 100))``. The function is static (part of the
    compiled program) and is identified in checkpoints by its qualified name."""

    fn: Callable[[jax.Array], jax.Array] = static()

    def __post_init__(self) -> None:
        callable_value("fn", self.fn, "a function of the step t returning the step size", nargs=1)
        try:  # the first step, concretely (later steps are traced; start() reports a failure)
            h0 = float(np.asarray(self.fn(jnp.zeros((), jnp.int32))))
        except Exception:
            h0 = None
        if h0 is not None and not (np.isfinite(h0) and h0 > 0):
            raise ValueError(f"fn: expected a function returning a positive finite step size; got fn(0) = {h0:g}")

    def start(self, dtype: Any) -> dict[str, Any]:
        try:
            out = jax.eval_shape(self.fn, jax.ShapeDtypeStruct((), jnp.int32))
        except Exception as err:
            first = str(err).splitlines()[0] if str(err) else ""
            raise TypeError(
                "fn: expected a function of the step t (an int32 array), written with jax.numpy, "
                f"returning a scalar step size; got {type(err).__name__}: {first}"
            ) from err
        if getattr(out, "shape", None) != ():
            raise fail("fn", "a function returning a scalar step size", out, TypeError)
        if not (jnp.issubdtype(out.dtype, jnp.floating) or jnp.issubdtype(out.dtype, jnp.integer)):
            raise fail("fn", "a function returning a real step size", out.dtype, TypeError)
        return {"dtype_probe": jnp.zeros((), dtype)}

    def step_size(self, cstate: dict[str, Any], t: jax.Array) -> jax.Array:
        return jnp.asarray(self.fn(t), cstate["dtype_probe"].dtype)

    def describe(self, cstate: dict[str, Any]) -> str:
        return f"scheduled step ({getattr(self.fn, '__qualname__', type(self.fn).__name__)})"


def as_controller(value: Any, name: str = "step_size") -> Controller:
    """A controller from what a user passes: a controller, or a positive number (constant)."""
    if isinstance(value, Controller):
        return value
    if isinstance(value, type) and issubclass(value, Controller):
        raise fail(name, "a controller instance or a positive number", value, TypeError)
    if callable(value) and not isinstance(value, (int, float)):
        raise fail(
            name,
            "a positive number or a controller (wrap a function of the step in flowpost.Schedule)",
            value,
            TypeError,
        )
    return Constant(positive(name, value))
