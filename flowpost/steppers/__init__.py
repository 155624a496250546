"""Steppers: time discretisations of the Wasserstein gradient flow of KL(mu | pi), all under
the one protocol of :mod:`flowpost.steppers.base` (whole steppers and the parts of
splitting schemes alike)."""
from __future__ import annotations

from ._blob import BlobFlow as BlobFlow
from ._ensemble_langevin import EnsembleLangevin as EnsembleLangevin
from ._forward_backward import (
    ForwardBackward as ForwardBackward,
    GaussianEntropy as GaussianEntropy,
    KernelEntropy as KernelEntropy,
)
from ._implicit_langevin import ImplicitLangevin as ImplicitLangevin
from ._jko import JKO as JKO
from ._kinetic_langevin import KineticLangevin as KineticLangevin
from ._langevin import Langevin as Langevin
from ._mala import MALA as MALA
from ._parts import (
    Drift as Drift,
    ExactMap as ExactMap,
    Explicit as Explicit,
    Friction as Friction,
    HeatFlow as HeatFlow,
    Kick as Kick,
    Part as Part,
    Proximal as Proximal,
)
from ._proximal_langevin import MoreauDrift as MoreauDrift, ProximalLangevin as ProximalLangevin
from ._solver_defaults import default_solver as default_solver
from ._split import Recipe as Recipe, Split as Split, SplitState as SplitState
from ._svgd import SVGD as SVGD
from .base import (
    ParticleState as ParticleState,
    ScoredState as ScoredState,
    Stepper as Stepper,
    check_stepper as check_stepper,
)

#: Every stepper of the library, by name (the all-steppers tests iterate over it).
LIBRARY_STEPPERS = (
    "Langevin", "MALA", "SVGD", "BlobFlow", "EnsembleLangevin", "ImplicitLangevin", "JKO",
    "ForwardBackward", "ProximalLangevin", "KineticLangevin", "Split",
)

__all__ = [
    "JKO",
    "LIBRARY_STEPPERS",
    "MALA",
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
