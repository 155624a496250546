"""Constrained parameters run unconstrained: moments against scipy.stats.

Each density is written with jax.scipy.stats on the constrained parameter; flowpost adds the
log-Jacobian and runs Langevin on the real line with a small step (ULA's step bias, of order
h times the curvature, is about 0.2% of a standard deviation here, well inside the error band).
Tolerances: 4.5 Monte-Carlo standard errors (sd/sqrt(N) for means; for variances the standard
error of a sample variance, sqrt((m4 - v^2)/N), with the fourth central moment m4 estimated
from the draws).
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import scipy.stats as sst

import flowpost as fp

Z = 4.5
N = 10_000


def _check(draws, ref_mean, ref_var):
    draws = np.asarray(draws, dtype=float).reshape(N, -1)
    mean, var = draws.mean(0), draws.var(0, ddof=1)
    m4 = np.mean((draws - mean) ** 4, axis=0)
    assert np.all(np.abs(mean - ref_mean) < Z * np.sqrt(ref_var / N)), (mean, ref_mean)
    assert np.all(np.abs(var - ref_var) < Z * np.sqrt((m4 - var**2) / N)), (var, ref_var)


def _run(target, init, h, steps, seed):
    return fp.run(
        target, fp.Langevin(step_size=h), init, key=jax.random.key(seed), steps=steps, window=200, progress=False
    )


def test_gamma_on_positive():
    """Gamma(a=4, scale=0.5) on a positive parameter; reference scipy.stats.gamma."""
    t = fp.Target(lambda th: jst.gamma.logpdf(th["lam"], 4.0, scale=0.5), support={"lam": fp.Positive()})
    r = _run(t, {"lam": jnp.full(N, 2.0)}, 0.004, 2000, 21)
    ref = sst.gamma(4.0, scale=0.5)
    _check(r.particles["lam"], ref.mean(), ref.var())


def test_beta_on_interval():
    """Beta(3, 5) on an interval parameter in (0, 1); reference scipy.stats.beta. The same
    density shifted to (2, 4) checks a general interval against scipy's loc/scale form."""
    t = fp.Target(lambda th: jst.beta.logpdf(th["p"], 3.0, 5.0), support={"p": fp.Interval(0.0, 1.0)})
    r = _run(t, {"p": jnp.full(N, 0.5)}, 0.01, 1500, 22)
    ref = sst.beta(3.0, 5.0)
    _check(r.particles["p"], ref.mean(), ref.var())

    t2 = fp.Target(
        lambda th: jst.beta.logpdf(th["q"], 3.0, 5.0, loc=2.0, scale=2.0), support={"q": fp.Interval(2.0, 4.0)}
    )
    r2 = _run(t2, {"q": jnp.full(N, 3.0)}, 0.01, 1500, 23)
    ref2 = sst.beta(3.0, 5.0, loc=2.0, scale=2.0)
    _check(r2.particles["q"], ref2.mean(), ref2.var())


def test_dirichlet_on_simplex():
    """Dirichlet(2, 3, 5) on a simplex parameter; reference scipy.stats.dirichlet."""
    alpha = np.array([2.0, 3.0, 5.0])
    t = fp.Target(
        lambda th: jst.dirichlet.logpdf(th["w"], jnp.asarray(alpha, jnp.float32)), support={"w": fp.Simplex()}
    )
    r = _run(t, {"w": jnp.tile(jnp.asarray(alpha / alpha.sum(), jnp.float32), (N, 1))}, 0.01, 1500, 24)
    w = np.asarray(r.particles["w"])
    np.testing.assert_allclose(w.sum(1), 1.0, atol=1e-5)
    ref = sst.dirichlet(alpha)
    _check(w, ref.mean(), ref.var())
