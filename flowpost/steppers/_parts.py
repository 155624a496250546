r"""The parts of splitting schemes: small steppers, each the exact or simple flow of one piece.

Every part is a stepper of the one protocol (:mod:`flowpost.steppers.base`): it can run on its
own under :func:`flowpost.run` (given ``step_size=``) or inside a
:class:`~flowpost.steppers.Split`, which gives it the time ``c h`` it acts for (``c`` its
``fraction``). With ``T`` a term of ``log pi`` (``None``: the whole log-density; a name or a
tuple of names of the target's terms), ``xi ~ N(0, I)`` and ``t`` the time the part acts for:

=======================  ===========================================================  ==========
part                     update                                                      stochastic
=======================  ===========================================================  ==========
:class:`Explicit`        ``x <- x + t grad T(x)`` (forward Euler on the potential)    no
:class:`Proximal`        ``x <- argmin_y G(y) + |y - x|^2 / (2t)`` (backward step)     no
:class:`ExactMap`        ``x <- fn(x, t)`` (a user's exact flow map)                  no
:class:`HeatFlow`        ``x <- x + sqrt(2t) xi`` (exact heat flow: the entropy)      yes
:class:`Kick`            ``v <- v + t grad T(x)`` (momentum kick, unit mass)          no
:class:`Drift`           ``x <- x + t v``                                             no
:class:`Friction`        ``v <- e^{-gamma t} v + sqrt(1 - e^{-2 gamma t}) xi``        yes
=======================  ===========================================================  ==========

``Proximal`` acts on ``G = -T`` (solved numerically, warm-started at ``x``) or on the penalty
``G = g`` of a proximal term from :mod:`flowpost.numerics.prox` (closed form). ``Friction`` is
the exact Ornstein-Uhlenbeck flow of the momentum, which keeps ``N(0, I)`` invariant.

Sources: the splitting itself, "On the construction and comparison of difference schemes"
(SIAM J. Numer. Anal., 1968); the backward step, "Proximal Markov chain Monte Carlo
algorithms" (Statistics and Computing, 2016); the momentum pieces, "Rational construction of
stochastic numerical methods for molecular sampling" (AMRX, 2013).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any, ClassVar, NamedTuple

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass, static
from .._validate import callable_value, fail, positive
from ..numerics import InnerSolver, minimise
from ..numerics.prox import as_prox_term
from ._solver_defaults import check_solver, default_solver
from .base import Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = [
    "Drift",
    "ExactMap",
    "Explicit",
    "Friction",
    "HeatFlow",
    "Kick",
    "KickState",
    "MomentumState",
    "Part",
    "PositionState",
    "Proximal",
    "ProximalState",
    "term_gradient",
]

_HIGHEST = jax.lax.Precision.HIGHEST

TermSpec = Any  # None | str | tuple[str, ...]

_ZERO_STATS = {"grad_evals": "sum"}


class PositionState(NamedTuple):
    """State of a position-only part."""

    x: jax.Array | None


class MomentumState(NamedTuple):
    """Positions and momentum (unit mass)."""

    x: jax.Array | None
    v: jax.Array | None


class KickState(NamedTuple):
    """Positions, momentum and the gradient of the kick's term at ``x`` (``None`` when it
    must be recomputed)."""

    x: jax.Array | None
    v: jax.Array | None
    grad: jax.Array | None


class ProximalState(NamedTuple):
    """Positions and the running count of inner solves that stopped above tolerance."""

    x: jax.Array | None
    capped_total: jax.Array


def _term_key(term: TermSpec, owner: str) -> tuple[str, ...] | None:
    if term is None:
        return None
    if isinstance(term, str):
        return (term,)
    if isinstance(term, (tuple, list)) and term and all(isinstance(t, str) for t in term):
        return tuple(term)
    raise fail(
        f"{owner}.term", "None (the whole log-density), a term name or a non-empty tuple of term names", term, TypeError
    )


def _check_terms(target, key: tuple[str, ...] | None, owner: str) -> None:
    if key is None:
        return
    names = target.term_names
    missing = [k for k in key if k not in names]
    if missing:
        raise ValueError(
            f"{owner}.term: expected terms of this target ({', '.join(names)}); got {missing} "
            "(name terms with fp.Target({'likelihood': f, 'prior': g}, ...))"
        )


def _term_one(target, key: tuple[str, ...] | None) -> Callable[[jax.Array], jax.Array]:
    if key is None:
        return target.log_density_one

    def one(u):
        total = target.term_one(key[0], u)
        for name in key[1:]:
            total = total + target.term_one(name, u)
        return total

    return one


def term_gradient(target: Target, key: tuple[str, ...] | None, x: jax.Array) -> jax.Array:
    """Gradient of the term(s) ``key`` (``None``: the whole log-density) at every particle."""
    if key is None:
        return target.score(x)
    return jax.vmap(jax.grad(_term_one(target, key)))(x)


def _normal(key, x):
    return jax.random.normal(key, x.shape, x.dtype)


def _one(x):
    return jnp.ones((), x.dtype)


def _zero(x):
    return jnp.zeros((), x.dtype)


class Part(Stepper):
    """Base class of the sub-steps of a splitting: each has a ``fraction``, the share of the
    step it acts for inside a :class:`~flowpost.steppers.Split` (a positive finite number)."""

    fraction: float

    def _check_fraction(self) -> None:
        object.__setattr__(self, "fraction", positive(f"{type(self).__name__}.fraction", self.fraction))


def _normalised_term(self, owner: str) -> None:
    key = _term_key(self.term, owner)
    object.__setattr__(self, "term", key if key is None or len(key) != 1 else key[0])  # key is never empty


class _PositionPart(Part):
    """A part whose state is the positions alone, as they come."""

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> PositionState:
        return PositionState(x=x)


@pytree_dataclass
class Explicit(Part):
    """Forward Euler step on the positions, ``x <- x + t grad T(x)``.

    Parameters
    ----------
    term : None, str or tuple of str
        ``None``: the whole log-density; otherwise the named term(s) of the target.
    fraction : float
        Share of the step (the part acts for ``fraction * h``).
    """

    term: TermSpec = static(default=None)
    fraction: float = 1.0

    stochastic = False
    reductions = _ZERO_STATS

    def __post_init__(self):
        _normalised_term(self, "Explicit")
        self._check_fraction()

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> PositionState:
        _check_terms(target, _term_key(self.term, "Explicit"), "Explicit")
        return PositionState(x=x)

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[PositionState, dict[str, jax.Array]]:
        x = state.x
        g = term_gradient(target, _term_key(self.term, "Explicit"), x)
        return PositionState(x=x + h * g), {"grad_evals": _one(x)}


@pytree_dataclass
class HeatFlow(_PositionPart):
    """Exact heat flow for time ``t``: ``x <- x + sqrt(2t) xi``, ``xi ~ N(0, I)`` (the entropy
    piece of the flow, represented by noise)."""

    fraction: float = 1.0

    stochastic = True
    reductions = _ZERO_STATS

    def __post_init__(self):
        self._check_fraction()

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[PositionState, dict[str, jax.Array]]:
        x = state.x
        return PositionState(x=x + jnp.sqrt(2 * h) * _normal(key, x)), {"grad_evals": _zero(x)}


@pytree_dataclass
class ExactMap(_PositionPart):
    """A user-supplied exact flow map ``x <- fn(x, t)`` of one piece of the flow.

    Parameters
    ----------
    fn : callable
        ``fn(x, t) -> x`` on the ``(N, d)`` ensemble, ``t`` a scalar array (the time the part
        acts for), written with ``jax.numpy`` (it runs inside the compiled step). It is static
        (part of the compiled program); checkpoints identify it by its qualified name.
    fraction : float
        Share of the step.

    Examples
    --------
    The flow of ``dx/dt = -(x - m)/s2`` (the potential of ``N(m, s2)``) is
    ``ExactMap(lambda x, t: m + jnp.exp(-t / s2) * (x - m))``.
    """

    fn: Callable[[jax.Array, jax.Array], jax.Array] | None = static(default=None)
    fraction: float = 1.0

    stochastic = False
    reductions = _ZERO_STATS

    def __post_init__(self):
        callable_value("ExactMap.fn", self.fn, "a callable fn(x, t) -> x", nargs=2)
        self._check_fraction()

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[PositionState, dict[str, jax.Array]]:
        x = state.x
        assert self.fn is not None
        out = jnp.asarray(self.fn(x, h))
        if out.shape != x.shape:
            raise fail("ExactMap.fn", f"fn(x, t) to return an array of shape {x.shape}", out)
        return PositionState(x=out.astype(x.dtype)), {"grad_evals": _zero(x)}


class _MomentumPart(Part):
    moves_position: ClassVar[bool] = False
    uses_momentum: ClassVar[bool] = True

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> MomentumState:
        return MomentumState(x=x, v=_normal(key, x))


@pytree_dataclass
class Kick(_MomentumPart):
    """Momentum kick ``v <- v + t grad T(x)`` (unit mass); positions unchanged.

    The gradient at the incoming positions is kept in the state (``grad``); a composition
    empties it when another part has moved the positions since, so a Strang scheme whose
    closing kick sees the same positions as the next step's opening kick (BAOAB) costs one
    gradient per step.

    Parameters
    ----------
    term : None, str or tuple of str
        ``None``: the whole log-density; otherwise the named term(s).
    fraction : float
        Share of the step.
    """

    term: TermSpec = static(default=None)
    fraction: float = 1.0

    stochastic = False
    reductions = _ZERO_STATS

    def __post_init__(self):
        _normalised_term(self, "Kick")
        self._check_fraction()

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> KickState:
        key_t = _term_key(self.term, "Kick")
        _check_terms(target, key_t, "Kick")
        return KickState(x=x, v=_normal(key, x), grad=term_gradient(target, key_t, x))

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[KickState, dict[str, jax.Array]]:
        x = state.x
        if state.grad is None:
            g, n = term_gradient(target, _term_key(self.term, "Kick"), x), _one(x)
        else:
            g, n = state.grad, _zero(x)
        return KickState(x=x, v=state.v + h * g, grad=g), {"grad_evals": n}


@pytree_dataclass
class Drift(_MomentumPart):
    """Position drift with the momentum: ``x <- x + t v`` (unit mass)."""

    fraction: float = 1.0

    moves_position: ClassVar[bool] = True
    stochastic = False
    reductions = _ZERO_STATS

    def __post_init__(self):
        self._check_fraction()

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[MomentumState, dict[str, jax.Array]]:
        return MomentumState(x=state.x + h * state.v, v=state.v), {"grad_evals": _zero(state.x)}


@pytree_dataclass
class Friction(_MomentumPart):
    r"""Exact friction-and-noise flow of the momentum (unit mass, friction ``gamma``):
    ``dv = -gamma v dt + sqrt(2 gamma) dW`` solved over time ``t``,
    ``v <- e^{-gamma t} v + sqrt(1 - e^{-2 gamma t}) xi``; positions unchanged.

    Parameters
    ----------
    gamma : float
        Friction coefficient, > 0 (traced: changing it never recompiles).
    fraction : float
        Share of the step.
    """

    gamma: float = 1.0
    fraction: float = 1.0

    stochastic = True
    reductions = _ZERO_STATS

    def __post_init__(self):
        object.__setattr__(self, "gamma", positive("Friction.gamma", self.gamma))
        self._check_fraction()

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[MomentumState, dict[str, jax.Array]]:
        v = state.v
        gt = jnp.asarray(self.gamma, v.dtype) * h
        v = jnp.exp(-gt) * v + jnp.sqrt(-jnp.expm1(-2 * gt)) * _normal(key, v)
        return MomentumState(x=state.x, v=v), {"grad_evals": _zero(state.x)}


def _hessian_preconditioner(fun, centre: jax.Array, h: jax.Array) -> jax.Array:
    """``(I + h H)^{-1/2}`` with ``H`` the Hessian of ``fun`` (the potential ``G``) at
    ``centre``, negative eigenvalues clipped to 0; the identity if ``H`` is not finite."""
    hess = jax.hessian(fun)(centre)
    hess = 0.5 * (hess + hess.T)
    ok = jnp.all(jnp.isfinite(hess))
    hess = jnp.where(ok, hess, jnp.zeros_like(hess))
    lam, vec = jnp.linalg.eigh(hess)
    scale = (1.0 + h * jnp.maximum(lam, 0.0)) ** -0.5
    a = jnp.matmul(vec * scale, vec.T, precision=_HIGHEST)
    return jax.lax.stop_gradient(a.astype(centre.dtype))


@pytree_dataclass
class Proximal(Part):
    r"""Backward (proximal) step ``x <- argmin_y G(y) + |y - x|^2 / (2t)``, per particle.

    With ``prox`` (a term of :mod:`flowpost.numerics.prox`, closed form) ``G = g``, its penalty;
    the map is ``prox(x, t)``. Without it ``G = -T`` for the term(s) ``term`` and every
    particle's problem is solved by the optax inner solver (``jax.vmap`` over particles),
    scaled by ``t`` and warm-started at ``y = x``::

        f(u) = t G(x + A u) + |A u|^2 / 2,     y = x + A u,  from u = 0,

    with ``A = I``, or with ``precondition=True`` ``A = (I + t H)^{-1/2}`` for ``H`` the Hessian
    of ``G`` at the ensemble mean (``d`` Hessian-vector products shared by the particles;
    negative eigenvalues clipped), which makes the problem's curvature of order one in every
    direction however stiff ``G`` is. The solver's ``tol`` bounds the max-abs gradient in
    ``u``, a length in the units of ``x``.

    Parameters
    ----------
    term : None, str or tuple of str
        The target term(s) ``T`` (without ``prox``), or with ``prox`` an optional label of the
        target term the penalty stands for (checked to exist).
    prox : ProxTerm or callable, optional
        A proximal term, or a user map ``prox(v, h) -> y`` for one point (wrapped in
        :class:`~flowpost.numerics.prox.UserProx`).
    solver : InnerSolver, optional
        Inner solver; ``None``: L-BFGS with ``tol`` 1e-3 (float32) or 1e-7 (float64), at most
        50 iterations.
    precondition : bool
        Use the Hessian preconditioner above (numerical path only).
    fraction : float
        Share of the step.

    Stats: ``grad_evals`` (mean over particles of the inner evaluations, plus ``2 d / N`` for
    the preconditioner), ``inner_iters`` (mean) and ``inner_iters_max``, ``inner_residual``
    (largest), ``inner_capped`` (particle solves that stopped above tolerance). The state keeps
    the running total, reported as ``inner_capped_total``.
    """

    term: TermSpec = static(default=None)
    prox: Any = None
    solver: InnerSolver | None = None
    precondition: bool = static(default=False)
    fraction: float = 1.0

    stochastic = False
    reductions = {
        "grad_evals": "sum",
        "inner_iters": "mean",
        "inner_iters_max": "max",
        "inner_residual": "max",
        "inner_capped": "sum",
    }

    def __post_init__(self):
        _normalised_term(self, "Proximal")
        if self.prox is not None:
            object.__setattr__(self, "prox", as_prox_term("Proximal.prox", self.prox))
        check_solver("Proximal.solver", self.solver)
        if not isinstance(self.precondition, bool):
            raise fail("Proximal.precondition", "True or False", self.precondition, TypeError)
        self._check_fraction()

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> ProximalState:
        _check_terms(target, _term_key(self.term, "Proximal"), "Proximal")
        return ProximalState(x=x, capped_total=jnp.zeros((), jnp.int32))

    def backward(self, target: Target, x: jax.Array, h: jax.Array) -> tuple[jax.Array, dict]:
        """The backward step for every particle and its stats."""
        if self.prox is not None:
            y = jnp.asarray(self.prox(x, h)).astype(x.dtype)
            zero = _zero(x)
            return y, {
                "grad_evals": zero,
                "inner_iters": zero,
                "inner_iters_max": zero,
                "inner_residual": zero,
                "inner_capped": jnp.zeros((), jnp.int32),
            }
        log_t = _term_one(target, _term_key(self.term, "Proximal"))
        solver = self.solver if self.solver is not None else default_solver(x.dtype)
        n, d = x.shape
        if self.precondition:
            a = _hessian_preconditioner(lambda u: -log_t(u), jnp.mean(x, axis=0), h)
            extra = 2.0 * d / n
        else:
            a = jnp.eye(d, dtype=x.dtype)
            extra = 0.0

        def solve_one(xi):
            def f(u):
                step = jnp.matmul(a, u, precision=_HIGHEST)  # y - x, kept apart from x (cancellation)
                return -h * log_t(xi + step) + 0.5 * jnp.sum(step**2)

            u, rep = minimise(solver, f, jnp.zeros_like(xi))
            return xi + jnp.matmul(a, u, precision=_HIGHEST), rep

        y, rep = jax.vmap(solve_one)(x)
        iters = rep.iters.astype(x.dtype)
        return y, {
            "grad_evals": jnp.mean(rep.grad_evals.astype(x.dtype)) + extra,
            "inner_iters": jnp.mean(iters),
            "inner_iters_max": jnp.max(iters),
            "inner_residual": jnp.max(rep.residual).astype(x.dtype),
            "inner_capped": jnp.sum(~rep.converged).astype(jnp.int32),
        }

    def advance(
        self, target: Target, state: Any, key: jax.Array, h: jax.Array
    ) -> tuple[ProximalState, dict[str, jax.Array]]:
        y, stats = self.backward(target, state.x, h)
        return ProximalState(x=y, capped_total=state.capped_total + stats["inner_capped"]), stats

    def report(self, state: ProximalState) -> dict[str, Any]:
        return {"inner_capped_total": int(state.capped_total)}
