"""flowpost: posterior approximation with particle flows.

A modeller writes ``log_p(theta)`` (a JAX function of a pytree of parameters); flowpost
moves an ensemble of particles along a time discretisation of the Wasserstein gradient flow
of KL(mu | posterior) and watches its convergence.

    >>> import flowpost as fp
    >>> result = fp.run(fp.Target(log_p, data=data, support={"sigma": fp.Positive()}),
    ...                 fp.Langevin(step_size=1e-3), init, key=jax.random.key(0), steps=5000)

Names are imported on first use (PEP 562), so that ``import flowpost`` (and the pytest
plugin that every pytest run in an environment with flowpost loads) does not pay for JAX
until something is used.
"""
from __future__ import annotations

import importlib

__version__ = "0.1.0"

# public name -> module (relative to this package) that defines it
_WHERE = {
    "run": "driver", "evolve": "driver",
    "load": "result", "Result": "result",
    "Target": "target",
    "History": "history",
    "Monitor": "monitor", "BareMonitor": "monitor", "Verdict": "monitor",
    "Stepper": "steppers.base", "ParticleState": "steppers.base", "ScoredState": "steppers.base",
    "Langevin": "steppers.langevin",
    "MALA": "steppers.mala",
    "SVGD": "steppers.svgd",
    "BlobFlow": "steppers.blob",
    "EnsembleLangevin": "steppers.ensemble_langevin",
    "ImplicitLangevin": "steppers.implicit_langevin",
    "JKO": "steppers.jko",
    "Split": "steppers.split", "SubStep": "steppers.split", "Explicit": "steppers.split",
    "Proximal": "steppers.split", "ExactMap": "steppers.split", "HeatFlow": "steppers.split",
    "Kick": "steppers.split", "Drift": "steppers.split", "Friction": "steppers.split",
    "ForwardBackward": "steppers.forward_backward", "GaussianEntropy": "steppers.forward_backward",
    "KernelEntropy": "steppers.forward_backward",
    "ProximalLangevin": "steppers.proximal_langevin",
    "KineticLangevin": "steppers.kinetic_langevin",
    "InnerSolver": "inner",
    "RBF": "kernels", "IMQ": "kernels",
    "Real": "support", "Positive": "support", "Interval": "support", "Simplex": "support",
}
_SUBMODULES = {"prox", "testing", "kernels", "discrepancy", "mixing", "inner", "monitor", "steppers",
               "plotting", "demo"}

__all__ = sorted(_WHERE) + ["prox"]


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
