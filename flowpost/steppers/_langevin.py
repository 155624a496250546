"""Unadjusted Langevin: the forward (explicit) Euler discretisation of the Langevin diffusion.

Update, for every particle independently, with ``xi ~ N(0, I)``:

    x_{k+1} = x_k + h * grad log pi(x_k) + sqrt(2 h) * xi_k.

The entropy term of KL(mu | pi) is represented by the Brownian noise; particles do not
interact. The chain is biased at finite ``h``: on ``N(0, s2)`` it is a Gaussian AR(1)
process ``x' = (1 - h/s2) x + sqrt(2h) xi`` with stationary variance
``s2 / (1 - h / (2 s2))``, and it diverges once ``h > 2 s2`` (more generally ``h > 2 / L``
with ``L`` the largest curvature of ``-log pi``).

Built as the Lie splitting ``Split((Explicit(), HeatFlow()))``: a forward step on the
potential, then the exact heat flow for the same time.

Source: "Exponential convergence of Langevin distributions and their discrete
approximations" (Bernoulli, 1996).
"""

from __future__ import annotations

from .._pytree import pytree_dataclass, unchecked
from .._validate import positive
from ._parts import Explicit, HeatFlow
from ._split import Recipe, Split, compose

__all__ = ["Langevin"]


@pytree_dataclass
class Langevin(Recipe):
    """Unadjusted Langevin stepper.

    Update, per particle, with ``xi ~ N(0, I)``::

        x <- x + h grad log pi(x) + sqrt(2 h) xi

    Biased by ``O(h)`` (on ``N(0, s2)`` the stationary variance is ``s2 / (1 - h/(2 s2))``) and
    unstable once ``h > 2 / L``, ``L`` the largest curvature of ``-log pi``. Source:
    "Exponential convergence of Langevin distributions and their discrete approximations"
    (Bernoulli, 1996).

    Parameters
    ----------
    step_size : float
        Time step ``h`` of the discretised diffusion (the initial value of the run's
        step-size controller).
    """

    step_size: float = 1e-3

    stochastic = True
    reductions = {"grad_evals": "sum"}

    def __post_init__(self):
        object.__setattr__(self, "step_size", positive("step_size", self.step_size))

    @property
    def scheme(self) -> Split:
        """The equivalent splitting: ``Split((Explicit(), HeatFlow()))``."""
        return compose((unchecked(Explicit), unchecked(HeatFlow)))
