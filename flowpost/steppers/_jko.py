r"""Particle JKO step: the backward (implicit) Euler step of the Wasserstein gradient flow of KL.

The JKO scheme moves a measure by ``mu_{k+1} = argmin_mu KL(mu | pi) + W2(mu, mu_k)^2 / (2 h)``.
With the ensemble ``X = (x_1..x_N)`` standing for ``mu_k`` and the particle ``i`` of the new
ensemble ``Y`` transported from ``x_i`` (so ``W2^2`` is bounded by ``mean_i |y_i - x_i|^2``),
one step is

    Y = argmin_Y  mean_i [ -log pi(y_i) + log mu_hat_Y(y_i) ]  +  mean_i |y_i - x_i|^2 / (2 h),

warm started at ``Y = X``. The step is deterministic (no noise); the entropy part of KL is
carried by the kernel density ``mu_hat_Y`` of the new ensemble itself, so particles repel.

Kernel density (whitened). At the start of each step the ensemble ``X`` gives a mean ``m`` and
a Cholesky factor ``L`` of its covariance (``flowpost.numerics.whiten``); both are held fixed
during the inner solve. The density is a Gaussian kernel density in whitened coordinates
``z = L^{-1}(y - m)``:

    mu_hat_Y(y) = (1/N) sum_j N(y; y_j, b^2 L L^T),     i.e.  a kernel of covariance b^2 Cov(X),

computed by ``flowpost.numerics.log_kde`` in row blocks (memory ``O(N * block)``). The kernel
follows the ensemble's shape, so a narrow direction is not blurred by the width of a wide one.
Bandwidth rule (default): the normal-reference rule applied in whitened coordinates
(``flowpost.numerics.normal_reference_bandwidth`` of ``L^{-1}(X - m)``),

    b = (4 / ((d + 2) N))^(1 / (d + 4))      (per whitened coordinate, whose variance is ~1),

or a fixed whitened bandwidth given as ``bandwidth=``.

Kernel-density bias. The target is a fixed point of the exact JKO step, but not of the particle
step: the kernel widens the density estimate. In the mean-field limit (``N -> inf``) on a
Gaussian ``pi`` with variance ``s2`` along an eigen-direction, restricting the scheme to
Gaussians of variance ``c`` with kernel variance ``k = b^2 c_X`` (fixed during the step), the
objective per direction is ``c / (2 s2) - log(c + k)/2 - c / (2 (c + k)) + transport``; its
stationary point with ``c_X = c`` solves ``1/s2 = (c + 2k)/(c + k)^2``, i.e.

    c / s2 = (1 + 2 b^2) / (1 + b^2)^2 = 1 - b^4 / (1 + b^2)^2,

a variance deficit of about ``b^4`` (0.8 % for ``d = 2``, ``N = 1000``). At finite ``N`` the
self term ``j = i`` of the density exerts no force, so a particle's own kernel removes its share
of the repulsion; for a Gaussian ensemble that share averages ``w_self = ((1 + b^2)/b^2)^(d/2)
/ N`` (the mean of ``N(0; 0, k) / (N (mu * N(0, k))(y))`` over ``y ~ mu``), a further deficit of
at most about ``w_self`` (1.8 % for ``d = 2``, ``N = 500``; the ordered arrangement the particles
settle into makes the measured deficit smaller). Kernel densities degrade with dimension: once
the typical distance between whitened particles (about ``sqrt(2 d)``) is many bandwidths, every
particle sees only its own kernel, the entropy force vanishes and the ensemble contracts toward
the mode. Use this stepper in low dimension, or with ``N`` large for its dimension.

Scaling of the inner problem. The objective is an average over particles, so its gradient in
``y_i`` is ``O(1/N)``; the inner solver minimises the equivalent objective multiplied by ``N h``,

    J(Y) = sum_i [ h ( -log pi(y_i) + log mu_hat_Y(y_i) ) + |y_i - x_i|^2 / 2 ],

whose gradient in ``y_i`` is ``(y_i - x_i) - h v_i(Y)`` with ``v_i`` the particle velocity of the
flow, a length in the units of ``x``. (The constant ``-log|det L|`` of the whitened density does
not change the minimiser and is dropped.)

Preconditioning (default on). Along an eigen-direction of ``Cov(X)`` with variance ``sigma^2``
the curvature of ``J`` per particle is about ``1 + h / s2`` from the potential and, from the
kernel term, of size ``h / (b^2 sigma^2)`` **and of either sign**: the kernel entropy is a
repulsion whose energy is largest when particles coincide, so ``J`` is not convex in ``Y`` once
``h > b^2 sigma^2`` in some direction (always the case for a stiff direction at a step that is
"large" for it). To even out the scales, the solver works in ``U`` with ``Y = X + U A``,

    A = (I + h (1 + 1/b^2) Cov(X)^{-1})^{-1/2}       (symmetric, eigenvalues in (0, 1]),

warm started at ``U = 0``; near equilibrium the Hessian of ``J`` in ``U`` then has eigenvalues
of order one in every direction, whatever the stiffness. The solver's tolerance applies to the
max-abs gradient in ``U``; as ``|A| <= 1`` it bounds the position error ``|Y - Y*|`` by about
``tol`` divided by the smallest curvature in ``U`` (of order one). The non-convexity remains
and L-BFGS copes with it at the price of more iterations (on a 2-D target with curvatures
``10^4`` and ``1`` at ``h = 0.1``, ``N = 300``, float32 defaults: about 25 per step while the
ensemble is far from equilibrium, 3 near it; without preconditioning the same steps took
100-200 iterations); the minimiser found is a local one near ``X``. ``N`` must exceed ``d``:
with ``N <= d`` the covariance is singular and the ensemble could not leave its affine hull.

Mean of the ensemble. ``sum_j log mu_hat_Y(y_j)`` is invariant under a common translation of
all ``y_i``, so the kernel term has zero total gradient and, on ``N(m, s2 I)``, the stationarity
of ``J`` summed over particles gives the exact JKO mean update
``mean(Y) - m = (mean(X) - m) / (1 + h / s2)``, up to the inner tolerance (exactly: the mean
error is ``|mean_i g_i| / (1 + h / s2)`` with ``g_i`` the final gradient of ``J`` in ``y_i``).

Source: "The variational formulation of the Fokker-Planck equation" (SIAM J. Math. Anal., 1998).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar, NamedTuple

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass, static
from .._validate import boolean, integer, positive
from ..numerics import DEFAULT_BLOCK, InnerSolver, log_kde, minimise, normal_reference_bandwidth
from ..numerics._whitening import ridged_whitening
from ._solver_defaults import check_solver, default_solver
from .base import Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["JKO", "JKOState"]

_HIGHEST = jax.lax.Precision.HIGHEST  # no reduced-precision float32 products on accelerators

#: Iteration cap of the default inner solver (the ensemble problem has ``N d`` unknowns,
#: couples the particles and can be non-convex).
JKO_MAX_ITERS = 200


class JKOState(NamedTuple):
    """Ensemble plus the running count of ensemble solves that ended above tolerance."""

    x: jax.Array
    capped_total: jax.Array


def _preconditioner(chol: jax.Array, h: jax.Array, b: jax.Array) -> jax.Array:
    """``A = (I + h (1 + 1/b^2) Sigma^{-1})^{-1/2}`` with ``Sigma = chol chol^T`` (symmetric)."""
    cov = jnp.matmul(chol, chol.T, precision=_HIGHEST)
    lam, vec = jnp.linalg.eigh(cov)
    scale = (1.0 + h * (1.0 + 1.0 / b**2) / lam) ** -0.5
    return jax.lax.stop_gradient(jnp.matmul(vec * scale, vec.T, precision=_HIGHEST))


@pytree_dataclass
class JKO(Stepper):
    """Particle JKO stepper (deterministic, interacting through a whitened kernel density).

    One backward (implicit) Euler step of the Wasserstein gradient flow of KL, particle ``i``
    of the new ensemble ``Y`` transported from ``x_i``, ``mu_hat_Y`` the Gaussian kernel density
    of ``Y`` with kernel covariance ``b^2 Cov(X)``::

        Y = argmin_Y  mean_i [ -log pi(y_i) + log mu_hat_Y(y_i) ]  +  mean_i |y_i - x_i|^2 / (2 h)

    solved by the inner solver from ``Y = X``. Implicit: any ``h > 0`` is stable for a
    log-concave target; the kernel density biases the variance down by about ``b^4`` per
    direction (module docstring). Source: "The variational formulation of the Fokker-Planck
    equation" (SIAM J. Math. Anal., 1998).

    Parameters
    ----------
    step_size : float
        Time step ``h`` of the JKO scheme (the initial value of the run's step-size
        controller); any positive value is stable for a log-concave target.
    solver : InnerSolver, optional
        Inner solver of the ensemble problem (``N d`` unknowns; a pytree, its numbers traced);
        its ``tol`` is about a length (see the module docstring). ``None`` (default): L-BFGS
        with line search, ``tol = 1e-3`` for float32 ensembles and ``1e-7`` for float64
        (:func:`flowpost.steppers.default_solver`), at most 200 iterations.
        The line search compares values of ``J``, a sum over ``N`` particles whose float32
        rounding error stops progress near a max-abs gradient of ``1e-4``; a smaller float32
        ``tol`` makes solves run to the cap.
    bandwidth : float, optional
        Fixed kernel bandwidth in whitened coordinates (traced). ``None`` (default): the
        normal-reference rule ``(4 / ((d + 2) N))^(1/(d + 4))`` in whitened coordinates,
        recomputed each step.
    ridge : float, optional
        Ridge added to the ensemble covariance before whitening, relative to its mean variance
        (as in ``flowpost.numerics.whiten``; traced). ``None``: ``16`` machine epsilons of the
        ensemble's dtype, small enough not to blur a direction whose variance is ``1e-4`` of
        the mean one in float32.
    block : int
        Rows per block of the kernel density (memory ``O(N * block)``; static).
    precondition : bool
        Solve in the preconditioned variables ``U`` (``Y = X + U A``, see the module docstring;
        default). ``False`` solves for ``Y`` directly (tolerance on the gradient in ``Y``).
        Static.

    Stats per step
    --------------
    ``grad_evals``
        Score evaluations per particle: one per evaluation of ``J`` by the inner solver
        (summed over a window).
    ``inner_iters``
        Iterations of the (single) ensemble solve (averaged over a window).
    ``inner_residual``
        Its final max-abs gradient of ``J`` in the solver's variables (``U`` when preconditioned,
        else ``Y``; the largest over a window).
    ``inner_capped``
        1 if the ensemble solve stopped above tolerance (at ``max_iters`` or on a non-finite
        gradient), else 0; summed over a window. The state keeps the running total,
        returned by :meth:`report` as ``"inner_capped_total"``.
    ``kde_bandwidth``
        The whitened bandwidth ``b`` used in the step (averaged over a window).
    """

    step_size: float = 1e-1
    solver: InnerSolver | None = None
    bandwidth: float | None = None
    ridge: float | None = None
    block: int = static(default=DEFAULT_BLOCK)
    precondition: bool = static(default=True)

    stochastic = False  # deterministic: the monitor skips R-hat and ESS
    needs_spread = "full_rank"  # flowpost.run refuses a start this step cannot leave (base.py)
    reductions: ClassVar[dict[str, str]] = {
        "grad_evals": "sum",
        "inner_iters": "mean",
        "inner_residual": "max",
        "inner_capped": "sum",
        "kde_bandwidth": "mean",
    }

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        check_solver("solver", self.solver)
        for name in ("bandwidth", "ridge"):
            v = getattr(self, name)
            if v is not None:
                object.__setattr__(self, name, positive(name, v))
        object.__setattr__(self, "block", integer("block", self.block, minimum=1))
        boolean("precondition", self.precondition)

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> JKOState:
        n, d = x.shape
        if n < 2 or n <= d:
            raise ValueError(
                f"init: expected at least 2 particles and more particles than dimensions (N > d) "
                f"for JKO's whitened kernel density; got N={n}, d={d}"
            )
        return JKOState(x=x, capped_total=jnp.zeros((), jnp.int32))

    def _ridge(self, dtype) -> jax.Array:
        if self.ridge is not None:
            return jnp.asarray(self.ridge, dtype)
        return 16 * jnp.finfo(dtype).eps * jnp.ones((), dtype)

    def advance(self, target: Target, state: JKOState, key: jax.Array, h: jax.Array) -> tuple[JKOState, dict]:
        x = state.x
        h = jnp.asarray(h, x.dtype)
        solver = self.solver if self.solver is not None else default_solver(x.dtype, JKO_MAX_ITERS)
        white = jax.tree.map(jax.lax.stop_gradient, ridged_whitening(x, self._ridge(x.dtype)))
        if self.bandwidth is None:
            b = jax.lax.stop_gradient(normal_reference_bandwidth(white.apply(x)))
        else:
            b = jnp.asarray(self.bandwidth, x.dtype)

        def objective(step):
            # step = Y - X, kept apart from X to avoid cancellation in |y_i - x_i|^2
            y = x + step
            z = white.apply(y)
            log_mu = log_kde(z, z, b, block=self.block)
            logp = target.log_density(y)
            return h * jnp.sum(log_mu - logp) + 0.5 * jnp.sum(step**2)

        if self.precondition:
            a = _preconditioner(white.chol, h, b)
            u, rep = minimise(solver, lambda u: objective(jnp.matmul(u, a, precision=_HIGHEST)), jnp.zeros_like(x))
            y = x + jnp.matmul(u, a, precision=_HIGHEST)
        else:
            step, rep = minimise(solver, objective, jnp.zeros_like(x))
            y = x + step
        capped = (~rep.converged).astype(jnp.int32)
        stats = {
            "grad_evals": rep.grad_evals.astype(x.dtype),
            "inner_iters": rep.iters.astype(x.dtype),
            "inner_residual": rep.residual.astype(x.dtype),
            "inner_capped": capped,
            "kde_bandwidth": b.astype(x.dtype),
        }
        return JKOState(x=y, capped_total=state.capped_total + capped), stats

    def report(self, state: JKOState) -> dict:
        """Host-side figures: ``inner_capped_total``, the ensemble solves that stopped above
        tolerance over the run."""
        return {"inner_capped_total": int(state.capped_total)}
