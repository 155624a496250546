r"""Kinetic (underdamped) Langevin with the BAOAB splitting.

Position ``x``, momentum ``v`` (unit mass), friction ``gamma``:

    dx = v dt,     dv = grad log pi(x) dt - gamma v dt + sqrt(2 gamma) dW,

whose invariant law is ``pi(x) N(v; 0, I)``. One BAOAB step of length ``h``
(``xi ~ N(0, I)``, ``c = e^{-gamma h}``):

    B  v <- v + (h/2) grad log pi(x)          half kick
    A  x <- x + (h/2) v                       half drift
    O  v <- c v + sqrt(1 - c^2) xi            exact friction and noise
    A  x <- x + (h/2) v                       half drift
    B  v <- v + (h/2) grad log pi(x)          half kick

The score computed for the closing kick is reused for the opening kick of the next step, so
a step costs one score evaluation. For a harmonic target ``N(0, s2)`` the positions have
exactly the target's variance at every stable step ``h < 2 sqrt(s2)`` and every friction,
while the momentum variance is ``1 - h^2 / (4 s2)``: "Rational construction of stochastic
numerical methods for molecular sampling" (AMRX, 2013).

Built as the Strang :class:`~flowpost.steppers.Split` scheme
``(Kick(), Drift(), Friction(gamma))``. The state is a :class:`~flowpost.steppers.SplitState`:
``state.x`` the positions (all a result reports), ``state.v`` the momentum (drawn from
``N(0, I)`` at the start); the kick's state keeps the score for the next step.
"""

from __future__ import annotations

from .._pytree import pytree_dataclass, unchecked
from .._validate import positive
from ._parts import Drift, Friction, Kick
from ._split import Recipe, Split, compose

__all__ = ["KineticLangevin"]


@pytree_dataclass
class KineticLangevin(Recipe):
    """BAOAB kinetic Langevin stepper.

    One step (``c = e^{-gamma h}``, ``xi ~ N(0, I)``, unit mass)::

        v <- v + (h/2) grad log pi(x);  x <- x + (h/2) v
        v <- c v + sqrt(1 - c^2) xi
        x <- x + (h/2) v;  v <- v + (h/2) grad log pi(x)

    One score evaluation per step. On ``N(0, s2)`` the position variance is exact for every
    stable ``h < 2 sqrt(s2)``; the momentum variance is ``1 - h^2 / (4 s2)``. Source: "Rational
    construction of stochastic numerical methods for molecular sampling" (AMRX, 2013).

    Parameters
    ----------
    step_size : float
        Time step ``h`` (the initial value of the run's step-size controller).
    friction : float
        Friction ``gamma > 0`` (per unit time; traced). Small values keep momentum longer
        (fast exploration, oscillation); large values approach overdamped Langevin with time
        rescaled by ``1/gamma``.
    """

    step_size: float = 1e-2
    friction: float = 1.0

    stochastic = True
    reductions = {"grad_evals": "sum"}

    def __post_init__(self):
        for name in ("step_size", "friction"):
            object.__setattr__(self, name, positive(name, getattr(self, name)))

    @property
    def scheme(self) -> Split:
        """The equivalent splitting ``Split((Kick(), Drift(), Friction(friction)), order="strang")``."""
        return compose((unchecked(Kick), unchecked(Drift), unchecked(Friction, gamma=self.friction)), "strang")
