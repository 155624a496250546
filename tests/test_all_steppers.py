"""Every stepper of the library under the same default monitor.

Target: a correlated 2-D Gaussian, mean (1, -1), covariance [[1, 0.5], [0.5, 1]]. Each
stepper starts from the same off-centre ensemble of N = 256 particles and runs with the
default :class:`flowpost.Monitor`. Checks: the run completes with finite particles; the
monitor wrote its figures (discrepancy, mean log-density; R-hat only for stochastic
steppers) and the stepper's stats (grad_evals); the discrepancy fell to below half its
starting value; the ensemble mean is within 0.4 of the target's in each coordinate (about 6
Monte-Carlo standard errors of sd/sqrt(N) = 0.0625, leaving room for each stepper's own
bias, e.g. ULA's O(h)).
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost.diagnostics import stein_discrepancy

MEAN = jnp.array([1.0, -1.0])
COV = jnp.array([[1.0, 0.5], [0.5, 1.0]])


def log_p(x):
    return jst.multivariate_normal.logpdf(x, MEAN, COV)


STEPPERS = [
    fp.Langevin(step_size=0.05),
    fp.MALA(step_size=0.3),
    fp.SVGD(step_size=0.5),
    fp.BlobFlow(step_size=0.05),
    fp.EnsembleLangevin(step_size=0.05),
    fp.ImplicitLangevin(step_size=0.1),
    fp.JKO(step_size=0.2),
    fp.ForwardBackward(step_size=0.1),
    fp.ProximalLangevin(step_size=0.05, prox=fp.prox.Box(-20.0, 20.0)),
    fp.KineticLangevin(step_size=0.2, friction=1.0),
    fp.SGLD(step_size=0.05),
    fp.SGHMC(step_size=0.2, friction=1.0),
    fp.Split((fp.Explicit(), fp.HeatFlow()), step_size=0.05, order="strang"),
]


@pytest.mark.parametrize("stepper", STEPPERS, ids=lambda s: type(s).__name__)
def test_every_stepper_under_the_default_monitor(stepper):
    x0 = jax.random.normal(jax.random.key(0), (256, 2)) * 0.5 + jnp.array([3.0, 2.0])
    r = fp.run(log_p, stepper, x0, key=jax.random.key(1), steps=300, window=50, progress=False)
    assert r.status == "done", r.reason
    assert np.all(np.isfinite(r.unconstrained))
    last = r.history.last
    for name in ("ksd", "mean_logp", "centre_drift", "grad_evals"):
        assert name in last, name
    assert ("rhat" in last) == stepper.stochastic  # a declaration every stepper makes
    start_ksd = float(stein_discrepancy(x0, jax.vmap(jax.grad(log_p))(x0)))
    assert last["ksd"] < 0.5 * start_ksd, (start_ksd, last["ksd"])
    assert np.all(np.abs(r.unconstrained.mean(0) - np.asarray(MEAN)) < 0.4), r.unconstrained.mean(0)


def test_the_list_covers_every_library_stepper():
    assert sorted(type(s).__name__ for s in STEPPERS) == sorted(fp.steppers.LIBRARY_STEPPERS)


#: What each library stepper must declare: deterministic flows get no R-hat / ESS.
EXPECTED_STOCHASTIC = {
    "Langevin": True,
    "MALA": True,
    "SVGD": False,
    "BlobFlow": False,
    "EnsembleLangevin": True,
    "ImplicitLangevin": True,
    "JKO": False,
    "ForwardBackward": False,
    "ProximalLangevin": True,
    "KineticLangevin": True,
    "SGLD": True,
    "SGHMC": True,
    "Split": True,
}


@pytest.mark.parametrize("stepper", STEPPERS, ids=lambda s: type(s).__name__)
def test_every_stepper_declares_stochastic_and_reductions(stepper):
    assert stepper.stochastic is EXPECTED_STOCHASTIC[type(stepper).__name__]
    red = dict(stepper.reductions)
    assert red["grad_evals"] == "sum"
    assert set(red.values()) <= {"sum", "mean", "max"}


def test_a_stepper_missing_a_declaration_is_refused():
    @fp.pytree_dataclass
    class NoDeclarations(fp.Stepper):
        step_size: float = 0.1

        def start(self, target, x, key):
            return fp.ParticleState(x=x)

        def advance(self, target, state, key, h):
            return state, {"grad_evals": jnp.zeros(())}

    with pytest.raises(TypeError, match=r"stepper: expected NoDeclarations to declare `stochastic`"):
        fp.run(log_p, NoDeclarations(), jnp.zeros((8, 2)), key=jax.random.key(0), steps=1, progress=False)

    @fp.pytree_dataclass
    class UndeclaredStat(NoDeclarations):
        stochastic = False
        reductions = {"grad_evals": "sum"}

        def advance(self, target, state, key, h):
            return state, {"grad_evals": jnp.zeros(()), "surprise": jnp.ones(())}

    with pytest.raises(TypeError, match=r"undeclared \['surprise'\]"):
        fp.run(log_p, UndeclaredStat(), jnp.zeros((8, 2)), key=jax.random.key(0), steps=1, progress=False)
