"""Kinetic Langevin (BAOAB) against closed forms for the harmonic target.

Monte-Carlo error: N independent particles; the standard error of a Gaussian sample
variance v is v * sqrt(2 / N). Tolerances are Z = 5 standard errors.
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost.steppers import Drift, Friction, Kick, KineticLangevin, Split

Z = 5.0  # tolerance in Monte-Carlo standard errors


def _std_normal(x):
    return jnp.sum(jst.norm.logpdf(x))


@pytest.mark.parametrize("friction", [1.0, 3.0])
def test_baoab_harmonic_position_variance_exact(friction):
    r"""BAOAB on N(0, 1) (unit frequency and mass): positions have variance exactly 1 at every
    stable step h < 2, momenta variance 1 - h^2/4. Source: "Rational construction of
    stochastic numerical methods for molecular sampling" (AMRX, 2013), the harmonic analysis
    of BAOAB.

    Derivation (q = 1 - h^2/4 > 0). Suppose at the start of a step x ~ N(0, 1) and
    v ~ N(0, q) independently.
      B: v1 = v - (h/2) x;   A: x1 = x + (h/2) v1 = q x + (h/2) v.
         Var v1 = q + h^2/4 = 1;  Var x1 = q^2 + q h^2/4 = q;
         Cov(x1, v1) = -q h/2 + (h/2) q = 0,  so (x1, v1) ~ N(0, diag(q, 1)).
      O: v2 = c v1 + sqrt(1 - c^2) xi keeps N(0, 1) and independence from x1 (any c).
      A: x2 = x1 + (h/2) v2;  B: v3 = v2 - (h/2) x2 = q v2 - (h/2) x1.
         Var x2 = q + h^2/4 = 1;  Var v3 = q^2 + q h^2/4 = q;
         Cov(x2, v3) = -(h/2) q + (h/2) q = 0.
    So N(0, diag(1, q)) is invariant; the chain is linear, Gaussian and contracting for
    gamma > 0 and h < 2, so it is the stationary law: the position variance carries no step
    bias, the momentum variance 1 - h^2/4 does. Three step sizes per friction, N = 40,000.
    """
    n = 40_000
    x0 = 0.5 * jax.random.normal(jax.random.key(3), (n, 1))
    for h in (0.5, 1.0, 1.5):
        r = fp.run(
            _std_normal,
            KineticLangevin(step_size=h, friction=friction),
            x0,
            key=jax.random.key(7),
            steps=100,
            progress=False,
        )
        x = r.unconstrained[:, 0]
        v = np.asarray(r.state.v)[:, 0]
        var_x, var_v = np.var(x, ddof=1), np.var(v, ddof=1)
        se_x = 1.0 * np.sqrt(2 / n)
        q = 1 - h**2 / 4
        se_v = q * np.sqrt(2 / n)
        assert abs(var_x - 1.0) < Z * se_x, (h, friction, var_x)
        assert abs(var_v - q) < Z * se_v, (h, friction, var_v, q)
        # the momentum bias is real at every step size (q is many standard errors below 1)
        assert abs(var_v - 1.0) > Z * se_v, (h, friction, var_v)
        # the mean is unbiased: sd / sqrt(N)
        assert abs(np.mean(x)) < Z * np.sqrt(1 / n)


def test_baoab_one_score_per_step_and_carried_score():
    """BAOAB's closing half kick evaluates the score at the new positions; the next opening
    kick reuses it, so one evaluation per step (the stepper's own count), and the carried
    score equals a fresh evaluation at the final positions (reference: the target's score by
    autodiff of jax.scipy.stats.norm.logpdf, i.e. -x)."""
    n = 64
    x0 = jax.random.normal(jax.random.key(0), (n, 2))
    r = fp.run(
        _std_normal,
        KineticLangevin(step_size=0.3, friction=2.0),
        x0,
        key=jax.random.key(1),
        steps=50,
        window=25,
        progress=False,
    )
    evals = [rec["grad_evals"] for rec in r.history.records if "grad_evals" in rec]
    assert evals == [25.0, 25.0]
    # the kick keeps it
    np.testing.assert_allclose(np.asarray(r.state.parts[0].grad), -np.asarray(r.state.x), rtol=1e-5, atol=1e-6)
    # the result reports positions only, with the user's shape
    assert np.shape(r.particles) == (n, 2)


def test_kinetic_is_the_strang_split():
    """KineticLangevin is the Strang composition of kick, drift and friction (B A O A B): the
    same keys give the same trajectory as the hand-built Split."""
    x0 = jax.random.normal(jax.random.key(2), (100, 3))
    target, x = fp.Target(_std_normal).bind(x0)
    split = Split((Kick(), Drift(), Friction(0.7)), step_size=0.2, order="strang")
    finals = []
    for stepper in (KineticLangevin(step_size=0.2, friction=0.7), split):
        state = stepper.start(target, x, jax.random.key(4))
        for t in range(5):
            state, _ = stepper.advance(target, state, jax.random.fold_in(jax.random.key(5), t), jnp.asarray(0.2))
        finals.append(np.asarray(state.x))
    np.testing.assert_array_equal(finals[0], finals[1])
    sched = [(type(split.parts[i]).__name__, f) for i, f in split.schedule()]
    assert sched == [("Kick", 0.5), ("Drift", 0.5), ("Friction", 1.0), ("Drift", 0.5), ("Kick", 0.5)]


def test_kinetic_rejects_bad_settings():
    with pytest.raises(ValueError, match="friction"):
        KineticLangevin(step_size=0.1, friction=0.0)
    with pytest.raises(ValueError, match="step_size"):
        KineticLangevin(step_size=-1.0)
    with pytest.raises(TypeError, match="friction"):
        KineticLangevin(step_size=0.1, friction="high")
