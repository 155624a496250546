"""Simulation-based calibration ("Validating Bayesian inference algorithms with
simulation-based calibration", 2018): uniform ranks for a correct model, non-uniform ranks
for a planted mismatch between simulator and likelihood."""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import pytest

import flowpost as fp
from flowpost.testing.calibration import calibrate

N_OBS = 8
SIGMA = 1.0


def log_p(theta, y):
    # normal mean with known noise SIGMA and a N(0, 1) prior; positive scale of a second,
    # independent parameter with a Gamma(3, 1) prior and no data, to exercise a support
    return (
        jst.norm.logpdf(theta["mu"])
        + jnp.sum(jst.norm.logpdf(y, theta["mu"], SIGMA))
        + jst.gamma.logpdf(theta["tau"], 3.0)
    )


def prior_draw(key):
    k1, k2 = jax.random.split(key)
    return {"mu": jax.random.normal(k1), "tau": jax.random.gamma(k2, 3.0)}


def simulator(noise):
    def simulate(key, theta):
        return theta["mu"] + noise * jax.random.normal(key, (N_OBS,))

    return simulate


def _sbc(noise):
    init = {"mu": jnp.zeros(99), "tau": jnp.full(99, 2.0)}
    # ULA with a small step: its variance bias on this posterior (sd about 0.33) is
    # h / (2 v) = 0.5%, far below what 300 datasets can resolve
    return calibrate(
        log_p,
        prior_draw,
        simulator(noise),
        fp.Langevin(step_size=0.001),
        init,
        key=jax.random.key(42),
        n_datasets=300,
        steps=1500,
        bins=10,
        support={"tau": fp.Positive()},
        batch=50,
    )


def test_correct_model_passes():
    rep = _sbc(SIGMA)
    assert rep.names == ["mu", "tau"]
    assert rep.ranks.shape == (300, 2) and rep.counts.sum(axis=1).tolist() == [300, 300]
    assert rep.passed(alpha=0.01), str(rep)


def test_noise_scale_off_by_half_is_flagged():
    """Simulator noise 1.5 while the likelihood assumes 1.0: the posterior of mu is too narrow
    for the data's real scatter, so the true mu falls in the tails of the draws (U-shaped ranks)."""
    rep = _sbc(1.5 * SIGMA)
    assert rep.p_values["mu"] < 0.01, str(rep)
    edges = rep.counts[0][[0, -1]].sum()
    middle = rep.counts[0][4:6].sum()
    assert edges > middle  # the U shape, not just any departure
    assert not rep.passed()


def test_bad_arguments_are_named():
    with pytest.raises(ValueError, match=r"^init: expected a number of particles L with L \+ 1 divisible"):
        calibrate(
            log_p,
            prior_draw,
            simulator(1.0),
            fp.Langevin(step_size=0.01),
            {"mu": jnp.zeros(50), "tau": jnp.ones(50)},
            key=jax.random.key(0),
            n_datasets=20,
            steps=5,
            support={"tau": fp.Positive()},
        )
    with pytest.raises(TypeError, match="simulate"):
        calibrate(log_p, prior_draw, None, fp.Langevin(step_size=0.01), {"mu": jnp.zeros(9)}, key=jax.random.key(0))
