"""Affine-invariant interacting Langevin dynamics: Langevin preconditioned by the ensemble.

The particles ``x_1..x_N`` (in ``R^d``) follow, with ``s = grad log pi``,

    dx_i = C(X) s(x_i) dt + (d + 1)/N (x_i - m(X)) dt + sqrt(2) C(X)^{1/2} dW_i,

    m(X) = (1/N) sum_j x_j,      C(X) = (1/N) sum_j (x_j - m)(x_j - m)^T,

and one step is its explicit (forward Euler) discretisation with step ``h``:

    x_i <- x_i + h [C s(x_i) + (d + 1)/N (x_i - m)] + sqrt(2 h / N) * D^T z_i,

where ``D = X - 1 m^T`` is the ``(N, d)`` matrix of deviations and ``z_i ~ N(0, I_N)``
independently for every particle. The noise ``D^T z_i / sqrt(N)`` has covariance
``D^T D / N = C``, so it plays the part of ``C^{1/2} xi`` without any square root or
Cholesky factor of ``C``.

Finite-N correction. With a state-dependent diffusion matrix ``C(X)`` the drift needs the
divergence term ``div_{x_i} C(X)`` for the product measure ``pi^{(x) N}`` to be invariant.
Writing ``C_kl = (1/N) sum_j (x_j - m)_k (x_j - m)_l`` and using
``d(x_j - m)_k / d(x_i)_l = (delta_ij - 1/N) delta_kl`` and ``sum_j (x_j - m) = 0``,

    sum_l d C_kl / d(x_i)_l = (1/N) sum_l [delta_kl (x_i - m)_l + (x_i - m)_k]
                            = (d + 1)/N (x_i - m)_k,

which is the correction above, with a plus sign and the ``1/N`` normalisation of ``C``; this
agrees with the statement of the dynamics in "Affine invariant interacting Langevin dynamics
for Bayesian inference" (2020), which uses the same ``1/N`` covariance.

Affine invariance. If ``y = A x + b`` with ``A`` invertible and ``pi_A(y) = pi(A^{-1}(y - b))``,
then ``s_A(y) = A^{-T} s(x)``, the deviations become ``D A^T``, ``C_A = A C A^T`` and
``C_A s_A = A C s``: the update maps ``A X + b`` to ``A X' + b`` given the same ``z``. So the
speed of the flow does not depend on the conditioning of ``pi`` (as long as the ensemble
spans the space, ``N > d``). Explicit steps remain stable for ``h`` up to about ``1 / (largest
eigenvalue of C * Hessian of -log pi)``, which is about 1 near a Gaussian target.

Cost: the noise is ``O(N^2 d)`` flops per step (a product with an ``(N, N)`` Gaussian matrix),
generated and multiplied in row blocks of ``block`` particles so memory stays
``O(block * N)``; particle ``i`` draws its ``z_i`` from ``fold_in(key, i)`` whatever the block.

Source: "Affine invariant interacting Langevin dynamics for Bayesian inference" (SIAM J.
Appl. Dyn. Syst., 2020).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar

import jax
import jax.numpy as jnp
from jax import lax

from .._pytree import pytree_dataclass, static
from .._validate import integer, positive
from ..numerics import map_row_blocks
from .base import ParticleState, Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["EnsembleLangevin"]


@pytree_dataclass
class EnsembleLangevin(Stepper):
    """Affine-invariant (ensemble-preconditioned) interacting Langevin stepper.

    Forward Euler step of the ensemble-preconditioned Langevin dynamics, with ``m`` and
    ``C = (1/N) sum_j (x_j - m)(x_j - m)^T`` the ensemble mean and covariance, ``D = X - 1 m^T``
    the deviations, ``s = grad log pi`` and ``z_i ~ N(0, I_N)``::

        x_i <- x_i + h [C s(x_i) + (d + 1)/N (x_i - m)] + sqrt(2 h / N) D^T z_i

    (the ``(d + 1)/N`` term is the finite-``N`` divergence correction; ``D^T z_i / sqrt(N)`` has
    covariance ``C``). Affine invariant, so its speed does not depend on the conditioning of
    ``pi``; explicit steps are stable for ``h`` up to about ``1 / (largest eigenvalue of
    C * Hessian of -log pi)``, about 1 near a Gaussian target. Source: "Affine invariant
    interacting Langevin dynamics for Bayesian inference" (SIAM J. Appl. Dyn. Syst., 2020).

    Parameters
    ----------
    step_size : float
        Time step ``h`` of the explicit (forward Euler) discretisation (the initial value of
        the run's step-size controller).
    block : int
        Particles per row block when drawing the ensemble noise (memory ``O(block * N)``;
        static).

    Notes
    -----
    Needs ``N > d`` particles for ``C`` to be invertible on ``R^d``; with fewer the ensemble
    stays in the affine hull of its starting points (the flow cannot leave it). Stats per
    step: ``"grad_evals"`` (1, summed).
    """

    step_size: float = 1e-2
    block: int = static(default=512)

    stochastic = True
    needs_spread = "full_rank"  # flowpost.run refuses a start this step cannot leave (base.py)
    reductions: ClassVar[dict[str, str]] = {"grad_evals": "sum"}

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))
        object.__setattr__(self, "block", integer("block", self.block, minimum=1))

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> ParticleState:
        if x.shape[0] < 2:
            raise ValueError(
                f"init: expected at least 2 particles for EnsembleLangevin (it interacts them); got N={x.shape[0]}"
            )
        return ParticleState(x=x)

    def advance(self, target: Target, state: ParticleState, key: jax.Array, h: jax.Array) -> tuple[ParticleState, dict]:
        x = state.x
        n, d = x.shape
        dtype = x.dtype
        h = jnp.asarray(h, dtype)
        hi = lax.Precision.HIGHEST

        m = jnp.mean(x, axis=0)
        dev = x - m  # D, (N, d)
        cov = jnp.matmul(dev.T, dev, precision=hi) / n  # C with the 1/N normalisation
        score = target.score(x)
        drift = jnp.matmul(score, cov, precision=hi) + ((d + 1.0) / n) * dev  # C symmetric: (C s_i)^T = s_i^T C

        def noise_rows(idx):
            z = jax.vmap(lambda i: jax.random.normal(jax.random.fold_in(key, i), (n,), dtype))(idx)
            return jnp.matmul(z, dev, precision=hi)  # rows z_i^T D = (D^T z_i)^T

        noise = map_row_blocks(noise_rows, jnp.arange(n), block=self.block)
        x_new = x + h * drift + jnp.sqrt(2 * h / n) * noise
        return ParticleState(x=x_new), {"grad_evals": jnp.ones((), dtype)}
