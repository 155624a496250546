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
    from . import (
        diagnostics as diagnostics,
        engine as engine,
        model as model,
        numerics as numerics,
        steppers as steppers,
        testing as testing,
    )
    from ._pytree import pytree_dataclass as pytree_dataclass, static as static
    from .engine import (
        AcceptanceTarget as AcceptanceTarget,
        BareMonitor as BareMonitor,
        Constant as Constant,
        Controller as Controller,
        Halving as Halving,
        History as History,
        Monitor as Monitor,
        Result as Result,
        Schedule as Schedule,
        Verdict as Verdict,
        evolve as evolve,
        load as load,
        run as run,
        sweep as sweep,
    )
    from .model import Interval as Interval, Positive as Positive, Real as Real, Simplex as Simplex, Target as Target
    from .numerics import IMQ as IMQ, RBF as RBF, InnerSolver as InnerSolver, prox as prox
    from .steppers import (
        JKO as JKO,
        MALA as MALA,
        SVGD as SVGD,
        BlobFlow as BlobFlow,
        Drift as Drift,
        EnsembleLangevin as EnsembleLangevin,
        ExactMap as ExactMap,
        Explicit as Explicit,
        ForwardBackward as ForwardBackward,
        Friction as Friction,
        GaussianEntropy as GaussianEntropy,
        HeatFlow as HeatFlow,
        ImplicitLangevin as ImplicitLangevin,
        KernelEntropy as KernelEntropy,
        Kick as Kick,
        KineticLangevin as KineticLangevin,
        Langevin as Langevin,
        MoreauDrift as MoreauDrift,
        Part as Part,
        ParticleState as ParticleState,
        Proximal as Proximal,
        ProximalLangevin as ProximalLangevin,
        ScoredState as ScoredState,
        Split as Split,
        SplitState as SplitState,
        Stepper as Stepper,
    )

# public name -> sub-package (relative to this package) that re-exports it
_WHERE = {
    **{n: "engine" for n in (
        "run", "evolve", "sweep", "load", "Result", "History", "Monitor", "BareMonitor", "Verdict",
        "Controller", "Constant", "Halving", "AcceptanceTarget", "Schedule")},
    **{n: "model" for n in ("Target", "Real", "Positive", "Interval", "Simplex")},
    **{n: "numerics" for n in ("InnerSolver", "RBF", "IMQ", "prox")},
    **{n: "steppers" for n in (
        "Stepper", "ParticleState", "ScoredState", "Langevin", "MALA", "SVGD", "BlobFlow",
        "EnsembleLangevin", "ImplicitLangevin", "JKO", "Split", "SplitState", "Part", "Explicit",
        "Proximal", "ExactMap", "HeatFlow", "Kick", "Drift", "Friction", "ForwardBackward",
        "GaussianEntropy", "KernelEntropy", "ProximalLangevin", "MoreauDrift", "KineticLangevin")},
    **{n: "_pytree" for n in ("pytree_dataclass", "static")},
}
_SUBMODULES = {"model", "steppers", "numerics", "diagnostics", "engine", "testing", "plotting", "demo"}

__all__ = sorted(_WHERE) + sorted(_SUBMODULES)


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
