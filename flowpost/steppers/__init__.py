"""Steppers: time discretisations of the Wasserstein gradient flow of KL(mu | pi), all under
the one protocol of :mod:`flowpost.steppers.base` (whole steppers and the parts of
splitting schemes alike)."""

from __future__ import annotations

from ._blob import BlobFlow as BlobFlow
from ._ensemble_langevin import EnsembleLangevin as EnsembleLangevin
from ._forward_backward import ForwardBackward as ForwardBackward
from ._forward_backward import GaussianEntropy as GaussianEntropy
from ._forward_backward import KernelEntropy as KernelEntropy
from ._implicit_langevin import ImplicitLangevin as ImplicitLangevin
from ._jko import JKO as JKO
from ._kinetic_langevin import KineticLangevin as KineticLangevin
from ._langevin import Langevin as Langevin
from ._mala import MALA as MALA
from ._parts import Drift as Drift
from ._parts import ExactMap as ExactMap
from ._parts import Explicit as Explicit
from ._parts import Friction as Friction
from ._parts import HeatFlow as HeatFlow
from ._parts import Kick as Kick
from ._parts import Part as Part
from ._parts import Proximal as Proximal
from ._proximal_langevin import MoreauDrift as MoreauDrift
from ._proximal_langevin import ProximalLangevin as ProximalLangevin
from ._sghmc import SGHMC as SGHMC
from ._sghmc import MomentumState as MomentumState
from ._sgld import SGLD as SGLD
from ._solver_defaults import default_solver as default_solver
from ._split import Recipe as Recipe
from ._split import Split as Split
from ._split import SplitState as SplitState
from ._svgd import SVGD as SVGD
from .base import ParticleState as ParticleState
from .base import ScoredState as ScoredState
from .base import Stepper as Stepper
from .base import check_stepper as check_stepper

#: Every stepper of the library, by name (the all-steppers tests iterate over it).
LIBRARY_STEPPERS = (
    "Langevin",
    "MALA",
    "SVGD",
    "BlobFlow",
    "EnsembleLangevin",
    "ImplicitLangevin",
    "JKO",
    "ForwardBackward",
    "ProximalLangevin",
    "KineticLangevin",
    "SGLD",
    "SGHMC",
    "Split",
)

__all__ = [
    "JKO",
    "LIBRARY_STEPPERS",
    "MALA",
    "SGHMC",
    "SGLD",
    "SVGD",
    "BlobFlow",
    "Drift",
    "EnsembleLangevin",
    "ExactMap",
    "Explicit",
    "ForwardBackward",
    "Friction",
    "GaussianEntropy",
    "HeatFlow",
    "ImplicitLangevin",
    "KernelEntropy",
    "Kick",
    "KineticLangevin",
    "Langevin",
    "MomentumState",
    "MoreauDrift",
    "Part",
    "ParticleState",
    "Proximal",
    "ProximalLangevin",
    "Recipe",
    "ScoredState",
    "Split",
    "SplitState",
    "Stepper",
    "check_stepper",
    "default_solver",
]
