"""Unadjusted Langevin: the forward (explicit) Euler discretisation of the Langevin diffusion.

Update, for every particle independently, with ``xi ~ N(0, I)``:

    x_{k+1} = x_k + h * grad log pi(x_k) + sqrt(2 h) * xi_k.

The entropy term of KL(mu | pi) is represented by the Brownian noise; particles do not
interact. The chain is biased at finite ``h``: on ``N(0, s2)`` it is a Gaussian AR(1)
process ``x' = (1 - h/s2) x + sqrt(2h) xi`` with stationary variance
``s2 / (1 - h / (2 s2))``, and it diverges once ``h > 2 s2`` (more generally ``h > 2 / L``
with ``L`` the largest curvature of ``-log pi``).

Source: "Exponential convergence of Langevin distributions and their discrete
approximations" (Bernoulli, 1996).
"""
from __future__ import annotations

from dataclasses import dataclass

import jax
import jax.numpy as jnp

from .base import ParticleState, positive_number

__all__ = ["Langevin"]


@dataclass(frozen=True)
class Langevin:
    """Unadjusted Langevin stepper.

    Parameters
    ----------
    step_size : float
        Time step ``h`` of the discretised diffusion.
    """

    step_size: float = 1e-3

    def __post_init__(self):
        positive_number("step_size", self.step_size)

    def start(self, target, x, key) -> ParticleState:
        return ParticleState(x=x)

    def advance(self, target, state: ParticleState, key):
        x = state.x
        h = jnp.asarray(self.step_size, x.dtype)
        noise = jax.random.normal(key, x.shape, x.dtype)
        x_new = x + h * target.score(x) + jnp.sqrt(2 * h) * noise
        return ParticleState(x=x_new), {"grad_evals": jnp.ones((), x.dtype)}
