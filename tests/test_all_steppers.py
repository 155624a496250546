"""Every stepper of the library under the same default monitor.

Target: a correlated 2-D Gaussian, mean (1, -1), covariance [[1, 0.5], [0.5, 1]]. Each
stepper starts from the same off-centre ensemble of N = 256 particles and runs with the
default :class:`flowpost.Monitor`. Checks: the run completes with finite particles; the
monitor wrote its figures (discrepancy, mean log-density; R-hat only for stochastic
steppers) and the stepper's stats (grad_evals); the discrepancy fell to below half its starting value; the ensemble mean is
within 0.4 of the target's in each coordinate (about 6 Monte-Carlo standard errors of
sd/sqrt(N) = 0.0625, leaving room for each stepper's own bias, e.g. ULA's O(h)).
"""
import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost.discrepancy import stein_discrepancy

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
    assert ("rhat" in last) == bool(getattr(stepper, "stochastic", True))
    start_ksd = float(stein_discrepancy(x0, jax.vmap(jax.grad(log_p))(x0)))
    assert last["ksd"] < 0.5 * start_ksd, (start_ksd, last["ksd"])
    assert np.all(np.abs(r.unconstrained.mean(0) - np.asarray(MEAN)) < 0.4), r.unconstrained.mean(0)
