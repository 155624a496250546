r"""Splitting schemes: a step composed of sub-steps, each an exact or simple flow of one piece.

The Wasserstein gradient flow of ``KL(mu | pi)`` (or the Langevin / kinetic Langevin
diffusion behind it) is a sum of simpler flows: the drift along the score of one term of
``log pi``, the heat flow that stands for the entropy, the friction and noise acting on a
momentum. A :class:`Split` stepper advances each piece in turn, by its own rule, for a
fraction of the step ``h``:

**Lie order** (``order="lie"``), parts ``P_1 .. P_k`` applied in the given order, each for
``c_j h`` (``c_j`` = the part's ``fraction``, default 1)::

    x_{n+1} = P_k(c_k h) o ... o P_1(c_1 h) (x_n)                    error O(h)

**Strang order** (``order="strang"``), symmetric: the last part for its full time, the
others for half of theirs, before and after it::

    P_1(c_1 h/2) ... P_{k-1}(c_{k-1} h/2)  P_k(c_k h)  P_{k-1}(c_{k-1} h/2) ... P_1(c_1 h/2)

which cancels the leading commutator error (error O(h^2) for smooth pieces): "On the
construction and comparison of difference schemes" (SIAM J. Numer. Anal., 1968).

Sub-steps (frozen dataclasses; every one has a ``fraction``)
------------------------------------------------------------
:class:`Explicit` (term)
    forward Euler on positions: ``x <- x + t grad T(x)`` with ``T`` a named term of
    ``log pi``, a tuple of terms, or the whole log-density.
:class:`Proximal` (term or prox)
    backward step ``x <- argmin_y G(y) + |y - x|^2 / (2t)``. With a ``prox`` object from
    :mod:`flowpost.prox` (``L1Penalty``, ``Box``, ...) the closed-form map ``prox(x, t)`` of its
    penalty ``G = g``; without one, ``G = -T`` for the named term(s) and the map is found
    by the inner optax solve :func:`flowpost.prox.prox_by_solver`, warm-started at ``x``.
:class:`ExactMap` (fn)
    a user-supplied exact flow map ``x <- fn(x, t)`` of some piece, on the ``(N, d)`` array.
:class:`HeatFlow`
    the exact heat flow ``x <- x + sqrt(2t) xi``, ``xi ~ N(0, I)`` (the entropy piece of the
    flow, represented by noise).
:class:`Kick` (term)
    momentum kick ``v <- v + t grad T(x)`` (unit mass).
:class:`Drift`
    position drift with the momentum ``x <- x + t v``.
:class:`Friction` (gamma)
    the exact friction-and-noise (Ornstein-Uhlenbeck) flow of the momentum,
    ``v <- e^{-gamma t} v + sqrt(1 - e^{-2 gamma t}) xi``, which keeps ``N(0, I)`` invariant.

Which pieces a user composes, and in what order, is up to the user; the parts must
together account for each term of the target once (an :class:`Explicit` on the whole
log-density plus a :class:`Proximal` on one of its terms counts that term twice). A
``Proximal`` with a ``prox`` object acts on a penalty that need not be a term of the target
at all: the scheme then samples ``pi(x) exp(-g(x))``.

State
-----
:class:`SplitState` ``(x, v, grad)``. Position-only schemes (no ``Kick``, ``Drift`` or
``Friction``) carry ``v = None``, an empty pytree leaf, so they cost nothing extra; schemes
with a momentum carry ``v`` of shape ``(N, d)`` (unit mass), drawn from ``N(0, I)`` (its
equilibrium) at the start. ``state.x`` is always the position, so results and monitors see
positions only.

``grad`` reuses a gradient across steps: when the first part that reads a gradient (a
``Kick`` or ``Explicit``) comes before anything that moves ``x``, and the last gradient read
in a step is of the same term(s) at the final ``x`` (as in BAOAB's closing half kick), that
gradient is carried in ``state.grad`` and the next step starts from it, so BAOAB costs one
score evaluation per step. Otherwise ``grad = None``.

Statistics: ``grad_evals`` (gradient evaluations per particle, inner solves included; a
gradient of a subset of the terms counts as one), and, when some part solves an inner
problem, ``inner_iters`` (summed over parts, averaged over particles), ``inner_residual``
(largest over parts and particles), ``inner_capped`` (count of particle solves that stopped
at their cap).

Writing a sub-step
------------------
Subclass :class:`SubStep` as a frozen dataclass whose last field is ``fraction: float = 1.0``
and implement ``apply(ctx, x, v, t, key) -> (x, v, stats)``: ``t`` is the time the part acts
for, ``key`` a fresh PRNG key, ``stats`` a dict with at least ``"grad_evals"`` (the same keys
at every step); ``ctx.target`` is the bound target and ``ctx.gradient(x, term)`` returns the
gradient of term(s) at ``x`` and its cost (reusing one already computed at the same ``x``).
Set the class attributes ``moves_position`` (False for parts that leave ``x`` unchanged) and
``uses_momentum``; optionally override ``check(target, x)`` (called by ``Split.start``) to
reject a target or ensemble shape with a clear error, and ``gradient_term()`` (the term key
whose gradient the part reads at the incoming positions) to take part in gradient reuse.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, ClassVar, NamedTuple, Sequence

import jax
import jax.numpy as jnp

from ..inner import InnerSolver
from ..prox import ProxTerm, UserProx, prox_by_solver
from .base import positive_number

__all__ = [
    "Split", "SplitState", "SubStep", "StepContext",
    "Explicit", "Proximal", "ExactMap", "HeatFlow", "Kick", "Drift", "Friction",
]

TermSpec = Any  # None | str | tuple[str, ...]


class SplitState(NamedTuple):
    """State of a :class:`Split` stepper.

    Attributes
    ----------
    x : (N, d) array
        Positions (what results and monitors read).
    v : (N, d) array or None
        Momentum (unit mass); ``None`` for position-only schemes.
    grad : (N, d) array or None
        A gradient carried over to the next step (see the module docstring); ``None`` when
        the scheme cannot reuse one.
    """

    x: jax.Array
    v: jax.Array | None = None
    grad: jax.Array | None = None


# --------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------

def _term_key(term: TermSpec, owner: str) -> tuple[str, ...] | None:
    """Normalise a term specification: None (whole log-density) or a tuple of names."""
    if term is None:
        return None
    if isinstance(term, str):
        return (term,)
    if isinstance(term, (tuple, list)) and term and all(isinstance(t, str) for t in term):
        return tuple(term)
    raise TypeError(
        f"{owner}: term must be None (the whole log-density), a term name or a non-empty tuple "
        f"of term names; got {term!r}"
    )


def _check_fraction(owner: str, fraction: Any) -> float:
    try:
        f = float(fraction)
    except (TypeError, ValueError):
        raise TypeError(f"{owner}: fraction must be a positive number; got {fraction!r}") from None
    if not f > 0 or f != f or f == float("inf"):
        raise ValueError(f"{owner}: fraction must be a positive finite number; got {fraction!r}")
    return f


def _check_terms(target, key: tuple[str, ...] | None, owner: str) -> None:
    if key is None:
        return
    names = target.term_names
    missing = [k for k in key if k not in names]
    if missing:
        raise ValueError(
            f"{owner}: term(s) {missing} are not terms of this target; its terms are {names} "
            "(name terms with fp.Target({'likelihood': f, 'prior': g}, ...))"
        )


def _term_gradient(target, key: tuple[str, ...] | None, x: jax.Array) -> jax.Array:
    if key is None:
        return target.score(x)

    def one(u):
        total = target.term_one(key[0], u)
        for name in key[1:]:
            total = total + target.term_one(name, u)
        return total

    return jax.vmap(jax.grad(one))(x)


class StepContext:
    """What a sub-step sees besides the ensemble: the bound target and a gradient cache.

    The cache is a trace-time dictionary (term key -> gradient at the current positions);
    :class:`Split` empties it whenever a part moves the positions.
    """

    def __init__(self, target, cache: dict | None = None):
        self.target = target
        self.cache: dict = {} if cache is None else cache

    def gradient(self, x: jax.Array, term: TermSpec = None) -> tuple[jax.Array, jax.Array]:
        """Gradient of term(s) at ``x`` and the number of evaluations it cost (0 or 1)."""
        key = _term_key(term, "gradient")
        if key in self.cache:
            return self.cache[key], jnp.zeros((), x.dtype)
        g = _term_gradient(self.target, key, x)
        self.cache[key] = g
        return g, jnp.ones((), x.dtype)


def _normal(key, x):
    return jax.random.normal(key, x.shape, x.dtype)


def _need_v(v, owner):
    if v is None:  # pragma: no cover - Split always provides a momentum when a part needs one
        raise ValueError(f"{owner}: needs a momentum, but the state carries none")
    return v


# --------------------------------------------------------------------------------------
# sub-steps
# --------------------------------------------------------------------------------------

class SubStep:
    """Base class of the parts of a :class:`Split` scheme (see the module docstring).

    Subclasses are frozen dataclasses whose last field is ``fraction: float = 1.0``, the
    share ``c`` of the step: the part acts for time ``c h`` (``c h / 2`` for the outer parts
    of a Strang step).
    """

    fraction: float = 1.0

    moves_position: ClassVar[bool] = True
    uses_momentum: ClassVar[bool] = False
    stochastic: ClassVar[bool] = False  # True for parts that draw noise

    def __post_init__(self):
        object.__setattr__(self, "fraction", _check_fraction(type(self).__name__, self.fraction))

    def gradient_term(self):
        """Term key of the gradient this part reads at the incoming positions (or ``False``)."""
        return False

    def check(self, target, x) -> None:
        """Raise a clear error if the part cannot act on ``target`` and ensembles shaped like ``x``."""

    def apply(self, ctx: StepContext, x, v, t, key):  # pragma: no cover - abstract
        raise NotImplementedError


@dataclass(frozen=True)
class Explicit(SubStep):
    """Forward Euler step on positions: ``x <- x + t grad T(x)``.

    Parameters
    ----------
    term : None, str or tuple of str
        ``None``: the whole log-density; otherwise the named term(s) of the target.
    fraction : float
        Share of the step (see :class:`SubStep`).
    """

    term: TermSpec = None
    fraction: float = 1.0

    def __post_init__(self):
        super().__post_init__()
        key = _term_key(self.term, "Explicit")
        object.__setattr__(self, "term", key if key is None or len(key) > 1 else key[0])

    def gradient_term(self):
        return _term_key(self.term, "Explicit")

    def check(self, target, x):
        _check_terms(target, _term_key(self.term, "Explicit"), "Explicit")

    def apply(self, ctx, x, v, t, key):
        g, n = ctx.gradient(x, self.term)
        return x + t * g, v, {"grad_evals": n}


@dataclass(frozen=True)
class Proximal(SubStep):
    r"""Backward (proximal) step ``x <- argmin_y G(y) + |y - x|^2 / (2t)``, per particle.

    Parameters
    ----------
    term : None, str or tuple of str
        Without ``prox``: ``G = -T`` for these term(s) of the target (``None`` = the whole
        log-density), solved numerically with ``solver`` (warm start at ``x``). With
        ``prox``: an optional label saying which target term the penalty stands for (checked
        to exist; the explicit parts must then leave that term out).
    prox : ProxTerm or callable, optional
        A proximal term from :mod:`flowpost.prox` (closed form: ``L1Penalty``, ``Box``, ...),
        or a user map ``prox(v, h) -> x`` for one point (wrapped in ``UserProx``).
        ``G = g``, the term's penalty.
    solver : InnerSolver
        Inner solver for the numerical map (ignored with ``prox``).
    fraction : float
        Share of the step.
    """

    term: TermSpec = None
    prox: Any = None
    solver: InnerSolver = InnerSolver(tol=1e-5, max_iters=100)
    fraction: float = 1.0

    def __post_init__(self):
        super().__post_init__()
        key = _term_key(self.term, "Proximal")
        object.__setattr__(self, "term", key if key is None or len(key) > 1 else key[0])
        if self.prox is not None and not isinstance(self.prox, ProxTerm):
            if callable(self.prox):
                object.__setattr__(self, "prox", UserProx(self.prox))
            else:
                raise TypeError(
                    "Proximal: prox must be a proximal term from flowpost.prox (e.g. L1Penalty(1.0), "
                    f"Box(0, 1)) or a callable prox(v, h); got {type(self.prox).__name__}"
                )
        if not isinstance(self.solver, InnerSolver):
            raise TypeError(f"Proximal: solver must be a flowpost.inner.InnerSolver; got {type(self.solver).__name__}")

    def check(self, target, x):
        _check_terms(target, _term_key(self.term, "Proximal"), "Proximal")

    def apply(self, ctx, x, v, t, key):
        if self.prox is not None:
            return self.prox(x, t), v, {"grad_evals": jnp.zeros((), x.dtype)}
        tkey = _term_key(self.term, "Proximal")
        target = ctx.target
        if tkey is None:
            def g(u):
                return -target.log_density_one(u)
        else:
            def g(u):
                total = target.term_one(tkey[0], u)
                for name in tkey[1:]:
                    total = total + target.term_one(name, u)
                return -total
        y, rep = prox_by_solver(g, x, t, self.solver)
        stats = {
            "grad_evals": jnp.mean(rep.grad_evals.astype(x.dtype)),
            "inner_iters": jnp.mean(rep.iters.astype(x.dtype)),
            "inner_residual": jnp.max(rep.residual).astype(x.dtype),
            "inner_capped": jnp.sum(rep.capped).astype(x.dtype),
        }
        return y, v, stats


@dataclass(frozen=True)
class ExactMap(SubStep):
    """A user-supplied exact flow map ``x <- fn(x, t)`` of one piece of the flow.

    Parameters
    ----------
    fn : callable
        ``fn(x, t) -> x`` on the ``(N, d)`` ensemble, ``t`` a scalar array (the time the
        part acts for). Must be a JAX function (it runs inside the compiled step) and return
        an array of the shape of ``x``. Hashable by identity: define it once.
    fraction : float
        Share of the step.

    Example: the flow of ``dx/dt = -(x - m)/s2`` (the potential of ``N(m, s2)``) is
    ``ExactMap(lambda x, t: m + jnp.exp(-t / s2) * (x - m))``.
    """

    fn: Callable[[jax.Array, jax.Array], jax.Array] = None
    fraction: float = 1.0

    def __post_init__(self):
        super().__post_init__()
        if not callable(self.fn):
            raise TypeError(f"ExactMap: fn must be a callable fn(x, t) -> x; got {type(self.fn).__name__}")

    def apply(self, ctx, x, v, t, key):
        out = jnp.asarray(self.fn(x, t))
        if out.shape != x.shape:
            raise ValueError(f"ExactMap: fn(x, t) must return an array of shape {x.shape}; got {out.shape}")
        return out.astype(x.dtype), v, {"grad_evals": jnp.zeros((), x.dtype)}


@dataclass(frozen=True)
class HeatFlow(SubStep):
    """Exact heat flow for time ``t``: ``x <- x + sqrt(2t) xi``, ``xi ~ N(0, I)``."""

    stochastic: ClassVar[bool] = True

    fraction: float = 1.0

    def apply(self, ctx, x, v, t, key):
        return x + jnp.sqrt(2 * t) * _normal(key, x), v, {"grad_evals": jnp.zeros((), x.dtype)}


@dataclass(frozen=True)
class Kick(SubStep):
    """Momentum kick ``v <- v + t grad T(x)`` (unit mass); positions unchanged.

    Parameters
    ----------
    term : None, str or tuple of str
        ``None``: the whole log-density; otherwise the named term(s).
    fraction : float
        Share of the step.
    """

    term: TermSpec = None
    fraction: float = 1.0

    moves_position: ClassVar[bool] = False
    uses_momentum: ClassVar[bool] = True

    def __post_init__(self):
        super().__post_init__()
        key = _term_key(self.term, "Kick")
        object.__setattr__(self, "term", key if key is None or len(key) > 1 else key[0])

    def gradient_term(self):
        return _term_key(self.term, "Kick")

    def check(self, target, x):
        _check_terms(target, _term_key(self.term, "Kick"), "Kick")

    def apply(self, ctx, x, v, t, key):
        g, n = ctx.gradient(x, self.term)
        return x, _need_v(v, "Kick") + t * g, {"grad_evals": n}


@dataclass(frozen=True)
class Drift(SubStep):
    """Position drift with the momentum: ``x <- x + t v`` (unit mass)."""

    fraction: float = 1.0

    uses_momentum: ClassVar[bool] = True

    def apply(self, ctx, x, v, t, key):
        return x + t * _need_v(v, "Drift"), v, {"grad_evals": jnp.zeros((), x.dtype)}


@dataclass(frozen=True)
class Friction(SubStep):
    r"""Exact friction-and-noise flow of the momentum (unit mass, friction ``gamma``):

    ``dv = -gamma v dt + sqrt(2 gamma) dW`` solved exactly over time ``t``:
    ``v <- e^{-gamma t} v + sqrt(1 - e^{-2 gamma t}) xi``; positions unchanged.

    Parameters
    ----------
    gamma : float
        Friction coefficient, > 0.
    fraction : float
        Share of the step.
    """

    gamma: float = 1.0
    fraction: float = 1.0

    moves_position: ClassVar[bool] = False
    uses_momentum: ClassVar[bool] = True
    stochastic: ClassVar[bool] = True

    def __post_init__(self):
        super().__post_init__()
        try:
            g = float(self.gamma)
        except (TypeError, ValueError):
            raise TypeError(f"Friction: gamma must be a positive number; got {self.gamma!r}") from None
        if not g > 0 or g == float("inf"):
            raise ValueError(f"Friction: gamma must be a positive finite number; got {self.gamma!r}")
        object.__setattr__(self, "gamma", g)

    def apply(self, ctx, x, v, t, key):
        v = _need_v(v, "Friction")
        gt = jnp.asarray(self.gamma, x.dtype) * t
        v = jnp.exp(-gt) * v + jnp.sqrt(-jnp.expm1(-2 * gt)) * _normal(key, v)
        return x, v, {"grad_evals": jnp.zeros((), x.dtype)}


# --------------------------------------------------------------------------------------
# the composed stepper
# --------------------------------------------------------------------------------------

def _merge(total: dict, part: dict) -> None:
    for k, val in part.items():
        if k not in total:
            total[k] = val
        elif "residual" in k:
            total[k] = jnp.maximum(total[k], val)
        else:
            total[k] = total[k] + val


@dataclass(frozen=True)
class Split:
    """A stepper composed of sub-steps, in Lie or Strang order (see the module docstring).

    Parameters
    ----------
    parts : sequence of SubStep
        The pieces, e.g. ``(Explicit("likelihood"), Proximal(prox=L1Penalty(2.0)), HeatFlow())``.
    step_size : float
        The step ``h``; part ``j`` acts for ``fraction_j * h`` (Lie) or half of it for the
        outer parts of a Strang step.
    order : {"lie", "strang"}
        Composition order.

    Examples
    --------
    Unadjusted Langevin written as a splitting (forward step on the potential, then the exact
    heat flow)::

        Split((Explicit(), HeatFlow()), step_size=0.01)

    BAOAB (see :class:`flowpost.steppers.kinetic_langevin.KineticLangevin`)::

        Split((Kick(), Drift(), Friction(gamma=1.0)), step_size=0.1, order="strang")
    """

    parts: Sequence[SubStep] = field(default_factory=tuple)
    step_size: float = 1e-2
    order: str = "lie"

    def __post_init__(self):
        parts = self.parts
        if isinstance(parts, SubStep):
            parts = (parts,)
        if not isinstance(parts, (tuple, list)) or not parts:
            raise ValueError(f"parts: expected a non-empty sequence of sub-steps (Explicit, HeatFlow, ...); got {parts!r}")
        for i, p in enumerate(parts):
            if not isinstance(p, SubStep):
                raise TypeError(
                    f"parts[{i}]: expected a sub-step (Explicit, Proximal, ExactMap, HeatFlow, Kick, "
                    f"Drift, Friction or a SubStep subclass); got {type(p).__name__}"
                )
        object.__setattr__(self, "parts", tuple(parts))
        if self.order not in ("lie", "strang"):
            raise ValueError(f"order: expected 'lie' or 'strang'; got {self.order!r}")
        positive_number("step_size", self.step_size)

    # ----- static structure ----------------------------------------------------------
    @property
    def schedule(self) -> tuple[tuple[SubStep, float], ...]:
        """The parts in the order they run, each with its share of the step (of ``h``)."""
        if self.order == "lie" or len(self.parts) == 1:
            return tuple((p, p.fraction) for p in self.parts)
        head = tuple((p, p.fraction / 2) for p in self.parts[:-1])
        return head + ((self.parts[-1], self.parts[-1].fraction),) + tuple(reversed(head))

    @property
    def stochastic(self) -> bool:
        """True when some part draws noise (the monitor then tracks R-hat and ESS)."""
        return any(p.stochastic for p in self.parts)

    @property
    def has_momentum(self) -> bool:
        """True when some part acts on a momentum (the state then carries ``v``)."""
        return any(p.uses_momentum for p in self.parts)

    def _carried_term(self):
        """Term key whose gradient can be carried from one step to the next, or ``False``."""
        sched = self.schedule
        first = False
        for p, _ in sched:
            k = p.gradient_term()
            if k is not False:
                first = k
                break
            if p.moves_position:
                return False
        if first is False:
            return False
        valid = set()
        for p, _ in sched:
            k = p.gradient_term()
            if k is not False:
                valid.add(k)
            if p.moves_position:
                valid = set()
        return first if first in valid else False

    # ----- protocol ------------------------------------------------------------------
    def start(self, target, x, key) -> SplitState:
        for p in self.parts:
            p.check(target, x)
        v = _normal(key, x) if self.has_momentum else None
        carried = self._carried_term()
        grad = None if carried is False else _term_gradient(target, carried, x)
        return SplitState(x=x, v=v, grad=grad)

    def advance(self, target, state: SplitState, key):
        x, v = state.x, state.v
        h = float(self.step_size)
        carried = self._carried_term()
        cache = {} if carried is False else {carried: state.grad}
        ctx = StepContext(target, cache)
        stats = {"grad_evals": jnp.zeros((), x.dtype)}
        for i, (part, share) in enumerate(self.schedule):
            t = jnp.asarray(share * h, x.dtype)
            x, v, s = part.apply(ctx, x, v, t, jax.random.fold_in(key, i))
            _merge(stats, s)
            if part.moves_position:
                ctx.cache.clear()
        grad = None if carried is False else ctx.cache[carried]
        return SplitState(x=x, v=v, grad=grad), stats
