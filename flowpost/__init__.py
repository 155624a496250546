"""flowpost: posterior approximation with particle flows.

A modeller writes ``log_p(theta)`` (a JAX function of a pytree of parameters); flowpost
moves an ensemble of particles along a time discretisation of the Wasserstein gradient flow
of KL(mu | posterior) and watches its convergence.

    >>> import flowpost as fp
    >>> result = fp.run(fp.Target(log_p, data=data, support={"sigma": fp.Positive()}),
    ...                 fp.Langevin(step_size=1e-3), init, key=jax.random.key(0), steps=5000)

The package is organised by concern: :mod:`flowpost.model` (the target, supports, labels),
:mod:`flowpost.steppers` (one protocol for steppers and the parts of splittings),
:mod:`flowpost.numerics` (kernels, blocked pairwise sums, kernel densities, whitening, the
inner solver, proximal maps), :mod:`flowpost.diagnostics` (Stein discrepancy, R-hat, ESS),
:mod:`flowpost.engine` (the driver, controllers, monitor, history, checkpoints, result) and
:mod:`flowpost.testing` (the test kit). The public names below are re-exported here.

Names are imported on first use (PEP 562), so that ``import flowpost`` (and the pytest
plugin that every pytest run in an environment with flowpost loads) does not pay for JAX
until something is used; the ``TYPE_CHECKING`` block lists them for editors and type
checkers.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

__version__ = "0.2.0"

if TYPE_CHECKING:  # pragma: no cover - for editors and type checkers
    from . import demo as demo
    from . import diagnostics as diagnostics
    from . import engine as engine
    from . import model as model
    from . import numerics as numerics
    from . import plotting as plotting
    from . import steppers as steppers
    from . import testing as testing
    from ._pytree import pytree_dataclass as pytree_dataclass
    from ._pytree import static as static
    from .diagnostics import agreement_test as agreement_test
    from .engine import AcceptanceTarget as AcceptanceTarget
    from .engine import BareMonitor as BareMonitor
    from .engine import Constant as Constant
    from .engine import Controller as Controller
    from .engine import Halving as Halving
    from .engine import History as History
    from .engine import Monitor as Monitor
    from .engine import Result as Result
    from .engine import Schedule as Schedule
    from .engine import Verdict as Verdict
    from .engine import evolve as evolve
    from .engine import load as load
    from .engine import run as run
    from .engine import sweep as sweep
    from .model import Interval as Interval
    from .model import ItemSum as ItemSum
    from .model import Positive as Positive
    from .model import Real as Real
    from .model import RowFile as RowFile
    from .model import Simplex as Simplex
    from .model import Target as Target
    from .numerics import IMQ as IMQ
    from .numerics import RBF as RBF
    from .numerics import InnerSolver as InnerSolver
    from .numerics import prox as prox
    from .steppers import JKO as JKO
    from .steppers import MALA as MALA
    from .steppers import SGHMC as SGHMC
    from .steppers import SGLD as SGLD
    from .steppers import SVGD as SVGD
    from .steppers import BlobFlow as BlobFlow
    from .steppers import Drift as Drift
    from .steppers import EnsembleLangevin as EnsembleLangevin
    from .steppers import ExactMap as ExactMap
    from .steppers import Explicit as Explicit
    from .steppers import ForwardBackward as ForwardBackward
    from .steppers import Friction as Friction
    from .steppers import GaussianEntropy as GaussianEntropy
    from .steppers import HeatFlow as HeatFlow
    from .steppers import ImplicitLangevin as ImplicitLangevin
    from .steppers import KernelEntropy as KernelEntropy
    from .steppers import Kick as Kick
    from .steppers import KineticLangevin as KineticLangevin
    from .steppers import Langevin as Langevin
    from .steppers import MoreauDrift as MoreauDrift
    from .steppers import Part as Part
    from .steppers import ParticleState as ParticleState
    from .steppers import Proximal as Proximal
    from .steppers import ProximalLangevin as ProximalLangevin
    from .steppers import ScoredState as ScoredState
    from .steppers import Split as Split
    from .steppers import SplitState as SplitState
    from .steppers import Stepper as Stepper

# public name -> sub-package (relative to this package) that re-exports it
_WHERE = {
    **{
        n: "engine"
        for n in (
            "run",
            "evolve",
            "sweep",
            "load",
            "Result",
            "History",
            "Monitor",
            "BareMonitor",
            "Verdict",
            "Controller",
            "Constant",
            "Halving",
            "AcceptanceTarget",
            "Schedule",
        )
    },
    **{n: "model" for n in ("Target", "Real", "Positive", "Interval", "Simplex", "ItemSum", "RowFile")},
    **{n: "numerics" for n in ("InnerSolver", "RBF", "IMQ", "prox")},
    **{
        n: "steppers"
        for n in (
            "Stepper",
            "ParticleState",
            "ScoredState",
            "Langevin",
            "MALA",
            "SGLD",
            "SGHMC",
            "SVGD",
            "BlobFlow",
            "EnsembleLangevin",
            "ImplicitLangevin",
            "JKO",
            "Split",
            "SplitState",
            "Part",
            "Explicit",
            "Proximal",
            "ExactMap",
            "HeatFlow",
            "Kick",
            "Drift",
            "Friction",
            "ForwardBackward",
            "GaussianEntropy",
            "KernelEntropy",
            "ProximalLangevin",
            "MoreauDrift",
            "KineticLangevin",
        )
    },
    **{n: "_pytree" for n in ("pytree_dataclass", "static")},
    "agreement_test": "diagnostics",
}
_SUBMODULES = {"model", "steppers", "numerics", "diagnostics", "engine", "testing", "plotting", "demo"}

# the names of _WHERE and _SUBMODULES (spelt out: type checkers do not evaluate expressions here)
__all__ = [
    "IMQ",
    "JKO",
    "MALA",
    "RBF",
    "SGHMC",
    "SGLD",
    "SVGD",
    "AcceptanceTarget",
    "BareMonitor",
    "BlobFlow",
    "Constant",
    "Controller",
    "Drift",
    "EnsembleLangevin",
    "ExactMap",
    "Explicit",
    "ForwardBackward",
    "Friction",
    "GaussianEntropy",
    "Halving",
    "HeatFlow",
    "History",
    "ImplicitLangevin",
    "InnerSolver",
    "Interval",
    "ItemSum",
    "KernelEntropy",
    "Kick",
    "KineticLangevin",
    "Langevin",
    "Monitor",
    "MoreauDrift",
    "Part",
    "ParticleState",
    "Positive",
    "Proximal",
    "ProximalLangevin",
    "Real",
    "Result",
    "RowFile",
    "Schedule",
    "ScoredState",
    "Simplex",
    "Split",
    "SplitState",
    "Stepper",
    "Target",
    "Verdict",
    "agreement_test",
    "demo",
    "diagnostics",
    "engine",
    "evolve",
    "load",
    "model",
    "numerics",
    "plotting",
    "prox",
    "pytree_dataclass",
    "run",
    "static",
    "steppers",
    "sweep",
    "testing",
]


def __getattr__(name: str):
    if name in _WHERE:
        value = getattr(importlib.import_module(f".{_WHERE[name]}", __name__), name)
    elif name in _SUBMODULES:
        value = importlib.import_module(f".{name}", __name__)
    else:
        raise AttributeError(f"module 'flowpost' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(_WHERE) | _SUBMODULES)
