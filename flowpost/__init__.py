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
from .monitor import Monitor, Verdict
from .result import Result, load
from .steppers.base import ParticleState, ScoredState, Stepper
from .steppers.langevin import Langevin
from .support import Interval, Positive, Real, Simplex
from .target import Target

__version__ = "0.1.0"

__all__ = [
    "run", "load", "Target", "Result", "History", "Monitor", "Verdict",
    "Stepper", "ParticleState", "ScoredState",
    "Langevin",
    "Real", "Positive", "Interval", "Simplex",
]
