r"""Splitting schemes: a step composed of parts, each a stepper acting for a share of the step.

The Wasserstein gradient flow of ``KL(mu | pi)`` (or the Langevin / kinetic Langevin
diffusion behind it) is a sum of simpler flows: the drift along the score of one term of
``log pi``, the heat flow that stands for the entropy, the friction and noise acting on a
momentum. A :class:`Split` advances each part in turn, by its own rule, for a share of the
step ``h``:

**Lie order** (``order="lie"``), parts ``P_1 .. P_k`` in the given order, each for ``c_j h``
(``c_j`` the part's ``fraction``)::

    x_{n+1} = P_k(c_k h) o ... o P_1(c_1 h) (x_n)                    error O(h)

**Strang order** (``order="strang"``), symmetric: the last part for its full time, the
others for half of theirs, before and after it::

    P_1(c_1 h/2) ... P_{k-1}(c_{k-1} h/2)  P_k(c_k h)  P_{k-1}(c_{k-1} h/2) ... P_1(c_1 h/2)

which cancels the leading commutator error (error O(h^2) for smooth pieces): "On the
construction and comparison of difference schemes" (SIAM J. Numer. Anal., 1968).

Parts are steppers of the one protocol (:mod:`flowpost.steppers.base`); the usual ones are in
:mod:`flowpost.steppers._parts` (``Explicit``, ``Proximal``, ``ExactMap``, ``HeatFlow``,
``Kick``, ``Drift``, ``Friction``), and any stepper can be a part, a ``Split`` included. The
parts must together account for each term of the target once (an ``Explicit`` on the whole
log-density plus a ``Proximal`` on one of its terms counts that term twice). A ``Proximal``
with a ``prox`` term acts on a penalty that need not be a term of the target: the scheme then
samples ``pi(x) exp(-g(x))``.

State
-----
:class:`SplitState` ``(x, v, parts)``: the positions, the momentum (``None`` unless some part
uses one; drawn from ``N(0, I)``, its equilibrium, at the start) and the tuple of the parts'
own states, each kept with its ``x`` and ``v`` slots emptied (no copy of the ensemble per
part); before a part acts, the current positions and momentum are put back. A part appearing
twice in a Strang step has one state. A part that keeps a gradient at its incoming positions
(``grad``, e.g. :class:`~flowpost.steppers._parts.Kick`) gets it back only when no other part
has moved the positions since it last acted (decided from the parts' ``moves_position``
declarations, across step boundaries too), and ``grad=None`` otherwise: BAOAB's closing
half kick and the next step's opening one share one gradient.

Stats: the union of the parts' stats. Within one step the values of a stat reported by
several parts (or by one part acting twice) add up, except ``"max"`` stats, which take the
largest; over a window each stat reduces as the parts declare.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any, NamedTuple

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass, static, unchecked
from .._validate import choice, fail, positive
from ._parts import Part
from .base import Stepper, check_stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["Recipe", "Split", "SplitState", "compose"]


class SplitState(NamedTuple):
    """State of a :class:`Split`.

    Attributes
    ----------
    x : (N, d) array
        Positions (what results and monitors read).
    v : (N, d) array or None
        Momentum (unit mass); ``None`` for position-only schemes.
    parts : tuple
        The parts' own states, with their ``x`` / ``v`` slots emptied.
    """

    x: jax.Array
    v: jax.Array | None
    parts: tuple


def _strip(state):
    out = state._replace(x=None)
    if "v" in state._fields:
        out = out._replace(v=None)
    return out


def _insert(state, x, v, keep_grad: bool):
    out = state._replace(x=x)
    if "v" in state._fields:
        out = out._replace(v=v)
    if "grad" in state._fields and not keep_grad:
        out = out._replace(grad=None)
    return out


@pytree_dataclass
class Split(Stepper):
    """A stepper composed of parts, in Lie or Strang order (module docstring).

    Parameters
    ----------
    parts : sequence of steppers
        The pieces, e.g. ``(Explicit("likelihood"), Proximal(prox=L1Penalty(2.0)), HeatFlow())``.
    step_size : float
        The step ``h``; part ``j`` acts for ``fraction_j * h`` (Lie), or half of that for the
        outer parts of a Strang step.
    order : {"lie", "strang"}
        Composition order.

    Examples
    --------
    Unadjusted Langevin written as a splitting (forward step on the potential, then the exact
    heat flow; this is what :class:`~flowpost.steppers.Langevin` is)::

        Split((Explicit(), HeatFlow()), step_size=0.01)

    BAOAB (:class:`~flowpost.steppers.KineticLangevin`)::

        Split((Kick(), Drift(), Friction(gamma=1.0)), step_size=0.1, order="strang")
    """

    parts: Sequence[Stepper] = ()
    step_size: float = 1e-2
    order: str = static(default="lie")

    def __post_init__(self):
        parts = self.parts
        if isinstance(parts, Stepper):
            parts = (parts,)
        if not isinstance(parts, (tuple, list)):
            raise fail("parts", "a non-empty sequence of steppers (Explicit(), HeatFlow(), ...)", parts, TypeError)
        if not parts:
            raise fail("parts", "a non-empty sequence of steppers (Explicit(), HeatFlow(), ...)", parts)
        for i, p in enumerate(parts):
            check_stepper(p, f"parts[{i}]")
        object.__setattr__(self, "parts", tuple(parts))
        choice("order", self.order, ("lie", "strang"))
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        _ = self.reductions  # evaluated for its check: refuses parts that disagree on a stat's reduction

    # ----- declarations (from the parts) -------------------------------------------------
    @property
    def stochastic(self) -> bool:  # type: ignore[override]
        """True when some part draws noise."""
        return any(p.stochastic for p in self.parts)

    @property
    def reductions(self) -> dict[str, str]:  # type: ignore[override]
        """The union of the parts' stat reductions."""
        out: dict[str, str] = {"grad_evals": "sum"}
        for i, p in enumerate(self.parts):
            for k, r in p.reductions.items():
                if out.setdefault(k, r) != r:
                    raise fail(f"parts[{i}].reductions", f"'{k}' reduced as '{out[k]}' like the other parts", r)
        return out

    @property
    def uses_momentum(self) -> bool:  # type: ignore[override]
        return any(p.uses_momentum for p in self.parts)

    @property
    def moves_position(self) -> bool:  # type: ignore[override]
        return any(p.moves_position for p in self.parts)

    # ----- static structure ----------------------------------------------------------------
    def schedule(self) -> tuple[tuple[int, float], ...]:
        """The parts in the order they run: ``(index into parts, multiple of fraction * h)``."""
        k = len(self.parts)
        if self.order == "lie" or k == 1:
            return tuple((i, 1.0) for i in range(k))
        head = tuple((i, 0.5) for i in range(k - 1))
        return (*head, (k - 1, 1.0), *reversed(head))

    def _keeps_gradient(self) -> tuple[bool, ...]:
        """Per slot of the schedule: True when no other part moved the positions since this
        part last acted (cyclically, across steps), so its kept gradient is still valid."""
        sched = self.schedule()
        n = len(sched)
        out = []
        for s, (i, _) in enumerate(sched):
            ok = False
            for back in range(1, n + 1):
                j, _ = sched[(s - back) % n]
                if j == i:  # its previous application: valid if that one left x unchanged
                    ok = not self.parts[i].moves_position
                    break
                if self.parts[j].moves_position:
                    break
            out.append(ok)
        return tuple(out)

    # ----- protocol -------------------------------------------------------------------------
    def start(self, target: Target, x: jax.Array, key: jax.Array) -> SplitState:
        states = tuple(p.start(target, x, jax.random.fold_in(key, i + 1)) for i, p in enumerate(self.parts))
        v = jax.random.normal(key, x.shape, x.dtype) if self.uses_momentum else None
        return SplitState(x=x, v=v, parts=tuple(_strip(s) for s in states))

    def advance(
        self, target: Target, state: SplitState, key: jax.Array, h: jax.Array
    ) -> tuple[SplitState, dict[str, jax.Array]]:
        x, v = state.x, state.v
        states = list(state.parts)
        stats: dict[str, Any] = {"grad_evals": jnp.zeros((), x.dtype)}
        red = self.reductions
        keep = self._keeps_gradient()
        for slot, (i, mult) in enumerate(self.schedule()):
            part = self.parts[i]
            t = jnp.asarray(part.fraction, x.dtype) * (mult * h) if isinstance(part, Part) else mult * h
            s = _insert(states[i], x, v, keep[slot])
            s, st = part.advance(target, s, jax.random.fold_in(key, slot), t)
            x = s.x
            if "v" in s._fields:
                v = s.v
            states[i] = _strip(s)
            for k, val in st.items():
                if k not in stats:
                    stats[k] = val
                elif red[k] == "max":
                    stats[k] = jnp.maximum(stats[k], val)
                else:
                    stats[k] = stats[k] + val
        return SplitState(x=x, v=v, parts=tuple(states)), stats

    def report(self, state: SplitState) -> dict:
        out: dict[str, Any] = {}
        for p, s in zip(self.parts, state.parts):
            for k, val in p.report(s).items():
                out[k] = out[k] + val if k in out else val
        return out


class Recipe(Stepper):
    """A named stepper defined as a :class:`Split` of parts (its ``scheme``): ``start``,
    ``advance`` and ``report`` are the scheme's. Subclasses declare ``stochastic`` and
    ``reductions`` themselves and build ``scheme`` from their (possibly traced) fields with
    :func:`flowpost._pytree.unchecked`, so that no check runs on traced values."""

    @property
    def scheme(self) -> Split:  # pragma: no cover - abstract
        raise NotImplementedError

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> SplitState:
        return self.scheme.start(target, x, key)

    def advance(
        self, target: Target, state: SplitState, key: jax.Array, h: jax.Array
    ) -> tuple[SplitState, dict[str, jax.Array]]:
        return self.scheme.advance(target, state, key, h)

    def report(self, state: SplitState) -> dict:
        return self.scheme.report(state)


def compose(parts: tuple, order: str = "lie") -> Split:
    """A :class:`Split` of already-checked parts, built without checks (for recipes)."""
    return unchecked(Split, parts=tuple(parts), order=order)
