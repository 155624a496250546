r"""Stochastic-gradient Langevin dynamics (SGLD): unadjusted Langevin on a noisy score.

Update, for every particle, with ``xi ~ N(0, I)`` and ``g_hat`` an unbiased estimate of
``grad log pi`` (the minibatch score of an :class:`~flowpost.ItemSum`, with control variates
once it is anchored; the exact score for any other target):

    x_{k+1} = x_k + h * g_hat(x_k) + sqrt(2 h) * xi_k.

Each step costs ``b`` data-item gradients per particle (``2 b`` with control variates) instead
of ``n``. The gradient noise inflates the stationary variance: on ``N(m, s2)`` with an
estimator noise of variance ``V`` independent of ``x`` the chain is the AR(1) process
``x' - m = (1 - h/s2)(x - m) + h e + sqrt(2h) xi`` with stationary variance

    s2 * (1 + h V / 2) / (1 - h / (2 s2)),

the step's own bias ``1 / (1 - h/(2 s2))`` times the noise's ``1 + h V / 2``. Stability: as for
unadjusted Langevin, ``h < 2 / L`` with ``L`` the largest curvature of ``-log pi``.

Source: "Bayesian learning via stochastic gradient Langevin dynamics" (ICML, 2011).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, ClassVar

import jax
import jax.numpy as jnp

from .._pytree import pytree_dataclass
from .._validate import positive
from ..model import score_estimate
from .base import ParticleState, Stepper

if TYPE_CHECKING:  # pragma: no cover
    from ..model._target import Target

__all__ = ["SGLD"]


@pytree_dataclass
class SGLD(Stepper):
    """Stochastic-gradient Langevin stepper.

    Update, per particle, with ``xi ~ N(0, I)`` and ``g_hat`` the target's unbiased score
    estimate from a batch drawn with the step's key::

        x <- x + h g_hat(x) + sqrt(2 h) xi

    Stable for ``h < 2 / L`` (``L`` the largest curvature of ``-log pi``); on ``N(m, s2)``
    with estimator variance ``V`` the stationary variance is ``s2 (1 + h V/2) / (1 - h/(2 s2))``.
    Source: "Bayesian learning via stochastic gradient Langevin dynamics" (ICML, 2011).

    Parameters
    ----------
    step_size : float
        Time step ``h`` (the initial value of the run's step-size controller).

    Notes
    -----
    Stats per step: ``grad_evals`` (1 score estimate per particle, summed), ``item_grads``
    (data-item gradients per particle, summed) and ``score_variance`` (the estimator's
    variance summed over coordinates, mean over the particles; averaged over a window).
    The state keeps no score (the estimate is noisy: the monitor computes full-data scores).
    """

    step_size: float = 1e-3

    stochastic = True
    reductions: ClassVar[dict[str, str]] = {"grad_evals": "sum", "item_grads": "sum", "score_variance": "mean"}

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))

    def start(self, target: Target, x: jax.Array, key: jax.Array) -> ParticleState:
        return ParticleState(x=x)

    def advance(self, target: Target, state: ParticleState, key: jax.Array, h: jax.Array) -> tuple[ParticleState, dict]:
        x = state.x
        h = jnp.asarray(h, x.dtype)
        k_batch, k_noise = jax.random.split(key)
        est = score_estimate(target, x, k_batch)
        x_new = x + h * est.score + jnp.sqrt(2 * h) * jax.random.normal(k_noise, x.shape, x.dtype)
        stats = {
            "grad_evals": jnp.ones((), x.dtype),
            "item_grads": est.items,
            "score_variance": jnp.mean(jnp.sum(est.variance, axis=1)),
        }
        return ParticleState(x=x_new), stats
