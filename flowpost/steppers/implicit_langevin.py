"""Implicit (proximal) Langevin: a backward step on the potential, an exact step on the entropy.

For every particle independently, with ``xi ~ N(0, I)`` and ``U = -log pi``:

    y_k     = prox_{h U}(x_k) = argmin_y  U(y) + |y - x_k|^2 / (2 h),
    x_{k+1} = y_k + sqrt(2 h) * xi_k.

The first line is the backward (implicit) Euler step of the gradient flow of ``U``: ``y``
solves ``y = x + h grad log pi(y)``. The second is the exact heat flow over time ``h`` (the
entropy part of KL(mu | pi)). Particles do not interact.

Stability and bias. For a convex ``U`` the proximal map is a contraction, so the chain is stable
for every ``h``: unlike the explicit chain (:class:`flowpost.steppers.langevin.Langevin`, which
diverges once ``h > 2 / L``) a stiff direction does not blow up. The chain is still biased at
finite ``h``. On ``N(0, s2)`` the proximal map is ``y = x / (1 + h / s2)`` and the chain is the
Gaussian AR(1) process ``x' = x / (1 + h/s2) + sqrt(2h) xi`` with stationary variance

    v(h) = 2 h / (1 - (1 + h / s2)^(-2))  =  s2 (1 + 3 h / (2 s2) + O(h^2)),

which tends to ``2 h`` (the injected noise) when ``h >> s2``: a stiff direction stays finite but
its spread is that of one step of noise, not ``sqrt(s2)``. Per direction the relative bias at
small ``h`` is ``3 h / (2 s2)``, three times that of the explicit chain; the gain is stability,
not accuracy. The proximal map is only well defined when ``U(y) + |y - x|^2/(2h)`` is strictly
convex (``U`` convex, or ``h`` below one over the largest negative curvature of ``U``).

Inner solve. Unless a closed-form proximal map is supplied, ``y`` is found for every particle by
:func:`flowpost.inner.minimise` (``jax.vmap`` over particles, warm started at ``y = x``) applied
to the objective scaled by ``h``,

    f(y) = h U(y) + |y - x|^2 / 2,      grad f(y) = (y - x) - h grad log pi(y),

a length in the units of ``x``. Preconditioning (default on): once per step the Hessian
``H = -hess log pi`` at the ensemble mean (``d`` Hessian-vector products, shared by all
particles; negative eigenvalues clipped to zero, the identity used if it is not finite) gives

    A = (I + h H)^{-1/2}        (symmetric, eigenvalues in (0, 1]),

and the solver works in ``u`` with ``y = x + A u`` from ``u = 0``. On a Gaussian target the
problem in ``u`` is ``|u - u*|^2 / 2`` and L-BFGS solves it in one or two iterations; in general its
curvature is of order one in every direction, however stiff ``U`` is. The solver's tolerance
bounds the max-abs gradient in ``u``; with curvature near one that is the error in ``u``, and
the error in ``y = x + A u`` is no larger (``|A| <= 1``), and smaller by ``(1 + h H)^{-1/2}`` in
stiff directions.

Default tolerance. The line search of the inner solver compares objective values, which carry a
rounding error of about ``eps * h |log pi|``; below a gradient of roughly
``sqrt(2 eps h |log pi|)`` (about ``1e-4`` in float32 for an order-one ``log pi``) it cannot
certify a decrease and the solve runs to its cap. The default solver is therefore chosen by the
ensemble's dtype: ``tol = 1e-3`` in float32 and ``1e-7`` in float64 (at most 50 iterations);
pass ``solver=`` to override.

Source: "Proximal Markov chain Monte Carlo algorithms" (Statistics and Computing, 2016).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable, NamedTuple

import jax
import jax.numpy as jnp

from ..inner import InnerSolver, minimise
from .base import positive_number

__all__ = ["ImplicitLangevin", "ImplicitState", "default_solver"]

_HIGHEST = jax.lax.Precision.HIGHEST  # no reduced-precision float32 products on accelerators


def default_solver(dtype, max_iters: int = 50) -> InnerSolver:
    """Inner solver used when ``solver=None``: L-BFGS with line search, ``tol = 1e-3`` for
    float32 (and narrower) ensembles, ``1e-7`` for float64 (see the module docstring)."""
    tol = 1e-7 if jnp.finfo(dtype).bits >= 64 else 1e-3
    return InnerSolver(tol=tol, max_iters=max_iters)


class ImplicitState(NamedTuple):
    """Ensemble plus the running count of inner solves that ended above tolerance."""

    x: jax.Array
    capped_total: jax.Array


def _check_common(stepper: Any) -> None:
    """Validate ``step_size`` and ``solver`` of an implicit stepper (shared with JKO)."""
    positive_number("step_size", stepper.step_size)
    if stepper.solver is not None and not isinstance(stepper.solver, InnerSolver):
        raise TypeError(
            "solver: expected None or a flowpost.inner.InnerSolver (e.g. InnerSolver(tol=1e-5, "
            f"max_iters=100)); got {type(stepper.solver).__name__}"
        )
    if not isinstance(stepper.precondition, bool):
        raise TypeError(f"precondition: expected True or False; got {stepper.precondition!r}")


def _hessian_preconditioner(target, centre: jax.Array, h: jax.Array) -> jax.Array:
    """``(I + h H)^{-1/2}`` with ``H = -hess log pi(centre)``, negative eigenvalues clipped to 0;
    the identity if ``H`` is not finite. Symmetric ``(d, d)``."""
    hess = -jax.hessian(target.log_density_one)(centre)
    hess = 0.5 * (hess + hess.T)
    ok = jnp.all(jnp.isfinite(hess))
    hess = jnp.where(ok, hess, jnp.zeros_like(hess))
    lam, vec = jnp.linalg.eigh(hess)
    scale = (1.0 + h * jnp.maximum(lam, 0.0)) ** -0.5
    a = jnp.matmul(vec * scale, vec.T, precision=_HIGHEST)
    return jax.lax.stop_gradient(a.astype(centre.dtype))


@dataclass(frozen=True)
class ImplicitLangevin:
    """Proximal (implicit) Langevin stepper.

    Parameters
    ----------
    step_size : float
        Time step ``h``. Any positive value is stable for a convex ``-log pi``.
    solver : InnerSolver, optional
        Inner solver of the per-particle proximal problem (see the module docstring for the
        scaling and preconditioning that make ``solver.tol`` a length). ``None`` (default):
        :func:`default_solver` for the ensemble's dtype.
    precondition : bool
        Solve in ``u`` with ``y = x + (I + h H)^{-1/2} u``, ``H`` the Hessian of ``-log pi`` at
        the ensemble mean (default). ``False``: solve for ``y`` directly.
    prox : callable, optional
        A closed-form proximal map of ``-log pi`` used instead of the inner solve:
        ``prox(u, h) -> y`` for **one particle** ``u`` of shape ``(d,)`` (unconstrained
        coordinates) and a scalar step ``h`` (an array of the ensemble's dtype), returning
        ``argmin_y -log pi(y) + |y - u|^2 / (2 h)`` of shape ``(d,)``. The stepper applies it
        with ``jax.vmap`` over the ``(N, d)`` ensemble, so it must be written in ``jax.numpy``.
        It must be hashable (a module-level function or a ``functools.partial`` is; it is part
        of the compiled step's static configuration). With ``prox`` no score is evaluated.

    Stats per step
    --------------
    ``grad_evals``
        Score evaluations per particle: the mean over particles of the inner solver's
        evaluations, plus ``2 d / N`` for the preconditioner's ``d`` Hessian-vector products
        (each costs about two score evaluations; shared by the ``N`` particles); 0 with ``prox``.
    ``inner_iters``, ``inner_iters_max``
        Mean and maximum over particles of the inner solver's iterations.
    ``inner_residual``
        Largest final residual over particles: the max-abs gradient of the scaled objective in
        the solver's variables (``u`` when preconditioned, else ``y``).
    ``inner_capped``
        Number of particle solves that stopped above tolerance (at ``max_iters``, or on a
        non-finite gradient); summed per window by the monitor. The state keeps the running
        total, returned by :meth:`report` as ``"inner_capped_total"``.
    """

    step_size: float = 1e-2
    solver: InnerSolver | None = None
    prox: Callable[[jax.Array, jax.Array], jax.Array] | None = None
    precondition: bool = True

    def __post_init__(self):
        _check_common(self)
        if self.prox is not None:
            if not callable(self.prox):
                raise TypeError(f"prox: expected a callable prox(u, h) -> y or None; got {type(self.prox).__name__}")
            try:
                hash(self.prox)
            except TypeError as err:
                raise TypeError("prox: must be hashable (a plain function or functools.partial)") from err

    def start(self, target, x, key) -> ImplicitState:
        return ImplicitState(x=x, capped_total=jnp.zeros((), jnp.int32))

    def proximal_point(self, target, x: jax.Array):
        """The backward step ``y = prox_{hU}(x)`` for every particle and the inner stats."""
        h = jnp.asarray(self.step_size, x.dtype)
        if self.prox is not None:
            y = jax.vmap(lambda u: self.prox(u, h))(x)
            if y.shape != x.shape:
                raise ValueError(f"prox: must map one particle of shape {x.shape[1:]} to the same shape; got {y.shape[1:]}")
            zero = jnp.zeros((), x.dtype)
            stats = {"grad_evals": zero, "inner_iters": zero, "inner_iters_max": zero,
                     "inner_residual": zero, "inner_capped": jnp.zeros((), jnp.int32)}
            return y.astype(x.dtype), stats

        solver = self.solver if self.solver is not None else default_solver(x.dtype)
        n, d = x.shape
        if self.precondition:
            a = _hessian_preconditioner(target, jnp.mean(x, axis=0), h)
            extra = 2.0 * d / n
        else:
            a = jnp.eye(d, dtype=x.dtype)
            extra = 0.0

        def solve_one(xi):
            def f(u):
                step = jnp.matmul(a, u, precision=_HIGHEST)  # y - x, kept apart from x (cancellation)
                return -h * target.log_density_one(xi + step) + 0.5 * jnp.sum(step**2)

            u, rep = minimise(solver, f, jnp.zeros_like(xi))
            return xi + jnp.matmul(a, u, precision=_HIGHEST), rep

        y, rep = jax.vmap(solve_one)(x)
        iters = rep.iters.astype(x.dtype)
        stats = {
            "grad_evals": jnp.mean(rep.grad_evals.astype(x.dtype)) + extra,
            "inner_iters": jnp.mean(iters),
            "inner_iters_max": jnp.max(iters),
            "inner_residual": jnp.max(rep.residual).astype(x.dtype),
            "inner_capped": jnp.sum(~rep.converged).astype(jnp.int32),
        }
        return y, stats

    def advance(self, target, state: ImplicitState, key):
        x = state.x
        h = jnp.asarray(self.step_size, x.dtype)
        y, stats = self.proximal_point(target, x)
        x_new = y + jnp.sqrt(2 * h) * jax.random.normal(key, x.shape, x.dtype)
        new = ImplicitState(x=x_new, capped_total=state.capped_total + stats["inner_capped"])
        return new, stats

    def report(self, state: ImplicitState) -> dict:
        return {"inner_capped_total": int(state.capped_total)}
