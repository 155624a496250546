"""flowpost: posterior approximation with particle flows.

A modeller writes ``log_p(theta)`` (a JAX function of a pytree of parameters); flowpost
moves an ensemble of particles along a time discretisation of the Wasserstein gradient flow
of KL(mu | posterior) and watches its convergence.

    >>> import flowpost as fp
    >>> result = fp.run(fp.Target(log_p, data=data, support={"sigma": fp.Positive()}),
    ...                 fp.Langevin(step_size=1e-3), init, key=jax.random.key(0), steps=5000)
"""
from .driver import run
from .history import History
from .monitor import BareMonitor, Monitor, Verdict
from .result import Result, load
from .steppers.base import ParticleState, ScoredState, Stepper
from .steppers.blob import BlobFlow
from .steppers.ensemble_langevin import EnsembleLangevin
from .steppers.forward_backward import ForwardBackward, GaussianEntropy, KernelEntropy
from .steppers.implicit_langevin import ImplicitLangevin
from .steppers.jko import JKO
from .steppers.kinetic_langevin import KineticLangevin
from .steppers.langevin import Langevin
from .steppers.mala import MALA
from .steppers.proximal_langevin import ProximalLangevin
from .steppers.split import (
    Drift, ExactMap, Explicit, Friction, HeatFlow, Kick, Proximal, Split, SubStep,
)
from .steppers.svgd import SVGD
from .inner import InnerSolver
from .kernels import IMQ, RBF
from . import prox
from .support import Interval, Positive, Real, Simplex
from .target import Target

__version__ = "0.1.0"

__all__ = [
    "run", "load", "Target", "Result", "History", "Monitor", "Verdict",
    "Stepper", "ParticleState", "ScoredState",
    "Langevin", "MALA", "SVGD", "BlobFlow", "EnsembleLangevin",
    "ImplicitLangevin", "JKO",
    "Split", "SubStep", "Explicit", "Proximal", "ExactMap", "HeatFlow", "Kick", "Drift", "Friction",
    "ForwardBackward", "GaussianEntropy", "KernelEntropy", "ProximalLangevin", "KineticLangevin",
    "InnerSolver", "RBF", "IMQ", "prox", "BareMonitor",
    "Real", "Positive", "Interval", "Simplex",
]
