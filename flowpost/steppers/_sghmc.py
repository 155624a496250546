r"""Stochastic-gradient Hamiltonian Monte Carlo (SGHMC): kinetic Langevin on a noisy score,
with the injected noise reduced by the gradient noise.

Position ``x``, momentum ``v`` (unit mass), friction ``C``; ``g_hat`` an unbiased estimate of
``grad log pi`` whose noise, times ``h``, adds a momentum noise of covariance about
``h^2 V`` (``V`` the estimator's covariance, estimated each step from the batch, diagonal).
The step (``xi ~ N(0, I)``, ``B_hat = h V / 2`` per coordinate):

    x_{k+1} = x_k + h v_k
    v_{k+1} = v_k + h g_hat(x_{k+1}) - h C v_k + sqrt(2 (C - B_hat) h) xi_k

so that the total momentum noise is ``2 C h`` as in the exact dynamics
``dv = grad log pi dt - C v dt + sqrt(2 C) dW`` (invariant law ``pi(x) N(v; 0, I)``). Where
``B_hat > C`` the correction is capped at ``C`` (no noise injected) and the stat
``noise_capped`` counts the fraction of coordinates so capped: the friction is then too small
for the gradient noise (raise ``friction`` or the batch). Stability: the symplectic Euler
steps need ``h sqrt(L) < 2`` (``L`` the largest curvature of ``-log pi``) and ``h C < 2``.

Source: "Stochastic gradient Hamiltonian Monte Carlo" (ICML, 2014).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar, NamedTuple

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass
from .._validate import positive
from ..model import score_estimate
from .base import Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["SGHMC", "MomentumState"]


class MomentumState(NamedTuple):
    """Positions ``x`` and momentum ``v``, both ``(N, d)``."""

    x: jax.Array
    v: jax.Array


@pytree_dataclass
class SGHMC(Stepper):
    """Stochastic-gradient Hamiltonian Monte Carlo stepper (kinetic, with noise correction).

    One step (unit mass, ``xi ~ N(0, I)``, ``B_hat = h V_hat / 2`` from the batch's estimated
    score variance ``V_hat`` per coordinate)::

        x <- x + h v
        v <- v + h g_hat(x) - h C v + sqrt(2 (C - B_hat) h) xi

    Stable for ``h sqrt(L) < 2`` and ``h C < 2`` (``L`` the largest curvature of ``-log pi``).
    Source: "Stochastic gradient Hamiltonian Monte Carlo" (ICML, 2014).

    Parameters
    ----------
    step_size : float
        Time step ``h`` (the initial value of the run's step-size controller).
    friction : float
        Friction ``C > 0`` (traced).

    Notes
    -----
    Stats per step: ``grad_evals`` (1 per particle), ``item_grads`` (data-item gradients per
    particle), ``score_variance`` (the estimator's variance summed over coordinates, mean over
    particles) and ``noise_capped`` (fraction of coordinates where ``B_hat >= C``). The
    momentum starts from ``N(0, I)``.
    """

    step_size: float = 1e-2
    friction: float = 1.0

    stochastic = True
    uses_momentum = True
    reductions: ClassVar[dict[str, str]] = {
        "grad_evals": "sum",
        "item_grads": "sum",
        "score_variance": "mean",
        "noise_capped": "mean",
    }

    def __post_init__(self):
        for name in ("step_size", "friction"):
            object.__setattr__(self, name, positive(name, getattr(self, name)))

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> MomentumState:
        return MomentumState(x=x, v=jax.random.normal(key, x.shape, x.dtype))

    def advance(self, target: Target, state: MomentumState, key: jax.Array, h: jax.Array) -> tuple[MomentumState, dict]:
        x, v = state
        h = jnp.asarray(h, x.dtype)
        c = jnp.asarray(self.friction, x.dtype)
        k_batch, k_noise = jax.random.split(key)
        x = x + h * v
        est = score_estimate(target, x, k_batch)
        b_hat = 0.5 * h * est.variance
        room = jnp.maximum(c - b_hat, 0.0)
        noise = jnp.sqrt(2.0 * room * h) * jax.random.normal(k_noise, x.shape, x.dtype)
        v = v + h * est.score - h * c * v + noise
        stats = {
            "grad_evals": jnp.ones((), x.dtype),
            "item_grads": est.items,
            "score_variance": jnp.mean(jnp.sum(est.variance, axis=1)),
            "noise_capped": jnp.mean((b_hat >= c).astype(x.dtype)),
        }
        return MomentumState(x=x, v=v), stats
