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

Built as the Strang :class:`~flowpost.steppers.split.Split` scheme
``(Kick(), Drift(), Friction(gamma))``. The state is a
:class:`~flowpost.steppers.split.SplitState`: ``state.x`` the positions (all a result
reports), ``state.v`` the momentum (drawn from ``N(0, I)`` at the start), ``state.grad`` the
carried score.
"""
from __future__ import annotations

from dataclasses import dataclass

from .base import positive_number
from .split import Drift, Friction, Kick, Split, SplitState

__all__ = ["KineticLangevin"]


@dataclass(frozen=True)
class KineticLangevin:
    """BAOAB kinetic Langevin stepper (module docstring).

    Parameters
    ----------
    step_size : float
        Time step ``h``.
    friction : float
        Friction ``gamma > 0`` (per unit time). Small values keep momentum longer (fast
        exploration, oscillation); large values approach overdamped Langevin with time
        rescaled by ``1/gamma``.
    """

    step_size: float = 1e-2
    friction: float = 1.0

    def __post_init__(self):
        for name in ("step_size", "friction"):
            positive_number(name, getattr(self, name))

    @property
    def scheme(self) -> Split:
        """The equivalent :class:`Split` scheme."""
        return Split((Kick(), Drift(), Friction(gamma=self.friction)), step_size=self.step_size, order="strang")

    def start(self, target, x, key) -> SplitState:
        return self.scheme.start(target, x, key)

    def advance(self, target, state: SplitState, key):
        return self.scheme.advance(target, state, key)
