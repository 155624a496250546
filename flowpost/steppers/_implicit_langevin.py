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

Built as the Lie splitting ``Split((Proximal(precondition=True), HeatFlow()))``.

Source: "Proximal Markov chain Monte Carlo algorithms" (Statistics and Computing, 2016).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import jax

from .._pytree import pytree_dataclass, static, unchecked
from .._validate import boolean, callable_value, positive
from ..numerics import InnerSolver
from ..numerics.prox import UserProx
from ._parts import HeatFlow, Proximal
from ._solver_defaults import check_solver, default_solver
from ._split import Recipe, Split, compose

__all__ = ["ImplicitLangevin", "default_solver"]


@pytree_dataclass
class ImplicitLangevin(Recipe):
    """Proximal (implicit) Langevin stepper.

    Per particle, with ``U = -log pi`` and ``xi ~ N(0, I)``::

        y = argmin_y U(y) + |y - x|^2 / (2h),     x' = y + sqrt(2h) xi

    Stable for every ``h`` when ``U`` is convex, biased by ``3h / (2 s2)`` per direction of
    variance ``s2`` at small ``h`` (module docstring). Source: "Proximal Markov chain Monte
    Carlo algorithms" (Statistics and Computing, 2016).

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
        coordinates) and a scalar step ``h``, returning ``argmin_y -log pi(y) + |y - u|^2 / (2 h)``
        of shape ``(d,)``, written in ``jax.numpy`` (it is ``vmap``-ped over particles). It is
        static; checkpoints identify it by its qualified name. With ``prox`` no score is
        evaluated.

    Stats per step
    --------------
    ``grad_evals``
        Score evaluations per particle: the mean over particles of the inner solver's
        evaluations, plus ``2 d / N`` for the preconditioner's ``d`` Hessian-vector products;
        0 with ``prox``.
    ``inner_iters``, ``inner_iters_max``
        Mean and maximum over particles of the inner solver's iterations.
    ``inner_residual``
        Largest final residual over particles.
    ``inner_capped``
        Number of particle solves that stopped above tolerance; the running total is
        reported as ``"inner_capped_total"``.
    """

    step_size: float = 1e-2
    solver: InnerSolver | None = None
    prox: Callable[[jax.Array, jax.Array], jax.Array] | None = static(default=None)
    precondition: bool = static(default=True)

    stochastic = True
    reductions = Proximal.reductions

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        check_solver("solver", self.solver)
        boolean("precondition", self.precondition)
        if self.prox is not None:
            callable_value("prox", self.prox, "a callable prox(u, h) -> y for one particle, or None", nargs=2)

    @property
    def scheme(self) -> Split:
        """The equivalent splitting ``Split((Proximal(...), HeatFlow()))``."""
        prox: Any = None if self.prox is None else unchecked(UserProx, prox=self.prox)
        back = unchecked(Proximal, prox=prox, solver=self.solver, precondition=self.precondition)
        return compose((back, unchecked(HeatFlow)))
