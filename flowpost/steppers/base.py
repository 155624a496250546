r"""The stepper protocol: one protocol for whole steppers and for the parts of a splitting.

A **stepper** is a JAX pytree (a :func:`~flowpost._pytree.pytree_dataclass`): its numeric
hyperparameters (friction, bandwidths, tolerances, the initial step size) are traced leaves,
its structural choices (block sizes, orders, forms, the parts of a composition, user
callables) are static. Changing a number never recompiles; a sweep over numbers can be
``vmap``-ped. The step size ``h`` is **not** read from the stepper inside a step: it is an
argument of :meth:`Stepper.advance`, set by a step-size controller that :func:`flowpost.run`
owns (:mod:`flowpost.engine` (controllers)).

Methods (all traced by JAX, so pure: no Python side effects, no Python control flow on
array values):

``start(target, x, key) -> state``
    The stepper's state for the unconstrained starting ensemble ``x`` of shape ``(N, d)``.
    ``state`` is a ``NamedTuple`` whose field ``x`` holds the ensemble. Optional fields with
    fixed meanings: ``v`` (a momentum, ``(N, d)``), ``logp`` ``(N,)`` and ``score`` ``(N, d)``
    (the log-density and score at ``x``; the monitor reuses them). Every leaf that has one
    value per particle carries the particle axis first.
``advance(target, state, key, h) -> (state, stats)``
    One step of length ``h`` (a scalar array of the ensemble's dtype). ``key`` is fresh for
    the step. ``stats`` is a dict of scalar arrays with the same keys at every step.
``default_controller() -> Controller``
    The controller used when :func:`flowpost.run` is given none: for library steppers a
    constant step at the stepper's ``step_size`` (MALA with ``tune_steps`` asks for
    acceptance targeting instead).
``report(state) -> dict``
    Host-side figures kept in the result (``{}`` by default).

Declarations (class attributes or properties, **no defaults**: a stepper missing one is
refused by :func:`check_stepper` with a message that says what to add):

``stochastic : bool``
    Whether the step draws noise (the monitor tracks R-hat and ESS only then).
``reductions : Mapping[str, str]``
    For every stat the step returns, how it reduces over a window's steps: ``"sum"``
    (counts: ``grad_evals``, ``inner_capped``), ``"mean"`` (rates and sizes: ``accept``,
    ``inner_iters``) or ``"max"`` (worst cases: ``inner_residual``). Always includes
    ``"grad_evals": "sum"`` (score evaluations per particle in the step, inner ones included).

Declarations with documented base-class values, read by :class:`~flowpost.steppers.Split`:

``moves_position : bool`` (``True``)
    ``False`` for a step that leaves ``x`` unchanged (a momentum kick, a friction step), so a
    composition knows a gradient taken at ``x`` is still valid after it.
``uses_momentum : bool`` (``False``)
    ``True`` for a step that reads or writes the momentum ``state.v``.

Declaration with a documented base-class value, read by :func:`flowpost.run` before the
first step (:mod:`flowpost.engine` (health)):

``needs_spread : str`` (``"none"``)
    What the starting ensemble must have for the step to be able to leave it: ``"none"``
    (noise, or a score that differs between particles, moves them anywhere), ``"coordinates"``
    (a deterministic interacting flow such as SVGD: particles that coincide in a coordinate
    stay together there, so every coordinate needs a spread) or ``"full_rank"`` (the step
    uses the ensemble's covariance, as EnsembleLangevin's noise and JKO's whitening do: it
    needs ``N > d`` particles whose deviations span ``R^d``, else the ensemble never leaves
    the affine hull of its start). A start that violates it is refused with a clear error.

Parts of a composition are steppers of the same protocol. :class:`~flowpost.steppers.Split`
keeps the tuple of its parts' states with their ``x`` (and ``v``) slots emptied, and before
each sub-step puts the current positions (and momentum) back: positions and momentum are
the coordinates all parts share; warm starts, caches and counters stay each part's own. A
part may keep a gradient at its incoming positions in a state field ``grad``; the
composition empties it (``grad=None``) whenever another part has moved the positions since,
so the part recomputes it.

Example
-------
A user's own stepper (gradient ascent with noise, written out)::

    @fp.pytree_dataclass
    class MyFlow(fp.Stepper):
        step_size: float = 1e-2

        stochastic = True
        reductions = {"grad_evals": "sum"}

        def start(self, target, x, key):
            return fp.ParticleState(x=x)

        def advance(self, target, state, key, h):
            x = state.x + h * target.score(state.x)
            x = x + jnp.sqrt(2 * h) * jax.random.normal(key, x.shape, x.dtype)
            return fp.ParticleState(x=x), {"grad_evals": jnp.ones((), x.dtype)}
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Any, ClassVar, NamedTuple

import jax

from .._validate import fail, positive

if TYPE_CHECKING:  # pragma: no cover
    from ..engine._controllers import Controller

__all__ = [
    "REDUCTIONS",
    "ParticleState",
    "ScoredState",
    "Stepper",
    "check_stats",
    "check_stepper",
    "declared_reductions",
    "positive_number",
]

REDUCTIONS = ("sum", "mean", "max")


class ParticleState(NamedTuple):
    """State of a stepper that carries nothing but the ensemble."""

    x: jax.Array


class ScoredState(NamedTuple):
    """Ensemble with its log-density and score, for steppers that reuse them across steps."""

    x: jax.Array
    logp: jax.Array
    score: jax.Array


class Stepper:
    """Base class of steppers (see the module docstring for the protocol).

    Subclasses are :func:`~flowpost._pytree.pytree_dataclass` classes that declare
    ``stochastic`` and ``reductions`` and implement ``start`` and ``advance``.
    """

    # declared (without a value: check_stepper refuses a subclass that omits them) by every subclass
    stochastic: ClassVar[bool]
    reductions: ClassVar[Mapping[str, str]]
    moves_position: ClassVar[bool] = True
    uses_momentum: ClassVar[bool] = False
    needs_spread: ClassVar[str] = "none"

    def start(self, target: Any, x: jax.Array, key: jax.Array) -> Any:  # pragma: no cover - abstract
        raise NotImplementedError

    def advance(self, target: Any, state: Any, key: jax.Array, h: jax.Array) -> tuple[Any, dict]:  # pragma: no cover
        raise NotImplementedError

    def default_controller(self) -> Controller:
        """A constant step at ``self.step_size`` (steppers without one must be given
        ``step_size=`` by :func:`flowpost.run`)."""
        from .._pytree import unchecked
        from ..engine._controllers import Constant

        try:
            h = self.step_size  # type: ignore[attr-defined]
        except AttributeError:
            raise TypeError(
                f"step_size: expected a step size for {type(self).__name__}, which has none of its "
                "own; got none (pass step_size=... to flowpost.run)"
            ) from None
        return unchecked(Constant, h=h)

    def report(self, state: Any) -> dict:
        """Host-side figures kept in the result; none by default."""
        return {}


def positive_number(name: str, value: Any) -> float:
    """``float(value)`` when it is a positive finite number, else a clear error naming ``name``."""
    return positive(name, value)


def declared_reductions(stepper: Any) -> dict[str, str]:
    """The stepper's declared stat reductions, checked (see :func:`check_stepper`)."""
    red = stepper.reductions
    return dict(red)


def check_stepper(stepper: Any, name: str = "stepper") -> None:
    """Refuse, with a clear error, an object that does not follow the protocol or lacks a
    declaration (``stochastic``, ``reductions``)."""
    if isinstance(stepper, type):
        raise fail(name, "a stepper instance such as flowpost.Langevin(step_size=1e-3)", stepper, TypeError)
    missing = [
        m for m in ("start", "advance", "default_controller", "report") if not callable(getattr(type(stepper), m, None))
    ]
    if missing:
        raise fail(
            name,
            "an object with start(target, x, key), advance(target, state, key, h), "
            "default_controller() and report(state) (subclass flowpost.Stepper); "
            f"missing {', '.join(missing)}",
            stepper,
            TypeError,
        )
    for decl, what in (("stochastic", "True or False"), ("reductions", "a mapping stat -> 'sum' | 'mean' | 'max'")):
        try:
            getattr(stepper, decl)
        except AttributeError:
            raise TypeError(
                f"{name}: expected {type(stepper).__name__} to declare `{decl}` ({what}); got no "
                "declaration (steppers declare it as a class attribute, without defaults)"
            ) from None
    if not isinstance(stepper.stochastic, bool):
        raise fail(f"{name}.stochastic", "True or False", stepper.stochastic, TypeError)
    red = stepper.reductions
    if not isinstance(red, Mapping):
        raise fail(f"{name}.reductions", "a mapping stat -> 'sum' | 'mean' | 'max'", red, TypeError)
    bad = {k: v for k, v in red.items() if not isinstance(k, str) or v not in REDUCTIONS}
    if bad:
        raise fail(f"{name}.reductions", "each stat mapped to 'sum', 'mean' or 'max'", bad)
    if "grad_evals" not in red:
        raise fail(f"{name}.reductions", "an entry for 'grad_evals' (score evaluations per particle)", dict(red))
    try:
        jax.tree_util.tree_leaves(stepper)
    except Exception as err:  # pragma: no cover - defensive
        raise fail(
            name, "a JAX pytree (decorate the class with flowpost.pytree_dataclass)", stepper, TypeError
        ) from err


def check_stats(stepper: Any, stats: Mapping[str, Any], name: str = "stepper") -> None:
    """Every stat the step returns must have a declared reduction."""
    red = stepper.reductions
    undeclared = sorted(k for k in stats if k not in red)
    if undeclared:
        raise TypeError(
            f"{name}: expected every stat of {type(stepper).__name__}.advance to have a declared "
            f"reduction in `reductions`; got undeclared {undeclared}"
        )
