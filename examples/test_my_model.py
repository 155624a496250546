"""How fast does the bakery's sourdough starter double? Testing the model with flowpost's fixtures.

An invented scenario. A small bakery feeds its sourdough starter every evening and notes how
many hours it takes to double in volume; twelve mornings of notes are below. The baker's model:

    mu     ~ Normal(6, 2^2)             typical doubling time in hours ("six hours, give or take")
    sigma  ~ Gamma(shape 9, rate 12)    day-to-day spread in hours (prior mean 0.75, sd 0.25)
    hours_i | mu, sigma ~ Normal(mu, sigma^2),   i = 1..12, independent given (mu, sigma)

The mornings are exchangeable: shuffling the notebook's rows must not change the likelihood.

This file is meant to be copied next to your own model and adapted. It uses the fixtures that
the flowpost pytest plugin provides once flowpost is installed (nothing to add to
``conftest.py``; ``python -m pytest --fixtures examples/test_my_model.py | grep fp_`` lists
them):

- ``fp_score_check``: the autodiff score against finite differences in float64;
- ``fp_health_check``: scalar output, finite values, jit/vmap agreement, determinism,
  exchangeable rows;
- ``fp_sbc``: simulation-based calibration with a small budget;
- ``fp_moments`` and ``fp_reference_families``: a flowpost run against a closed-form
  posterior, in Monte-Carlo standard errors;
- ``fp_key``: a fixed PRNG key.

Where the score and health checks look is one value, a ``flowpost.testing.Region``:
``Region.drawn(prior_draw)`` (points drawn from the prior) or ``Region.near(TYPICAL)``
(Gaussian perturbations of a plausible point). The keywords ``sampler=`` / ``around=``
(with ``scale=``, ``num_points=``, ``key=``) are a shortcut for the same region.

Two tests plant a bug on purpose and check that the kit catches it: a test kit that cannot
fail tells you nothing.

Run: ``python -m pytest examples/test_my_model.py -q`` (about half a minute on two cores).
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import pytest

import flowpost as fp
from flowpost.testing import Region

PRIOR_MU_MEAN, PRIOR_MU_SD = 6.0, 2.0  # hours
PRIOR_SIGMA_SHAPE, PRIOR_SIGMA_RATE = 9.0, 12.0  # Gamma(shape, rate) on sigma, in hours
N_MORNINGS = 12

# twelve mornings of the bakery's notebook: hours until the starter doubled
DATA = {"hours": jnp.array([5.9, 6.4, 5.2, 6.8, 6.1, 5.5, 7.0, 6.3, 5.8, 6.6, 6.0, 5.4])}
TYPICAL = {"mu": 6.0, "sigma": 0.75}  # a plausible point, to centre the checks on
NEAR_TYPICAL = Region.near(TYPICAL, scale=0.1)  # where to look: written once, used by every check
SUPPORT = {"sigma": fp.Positive()}


def log_p(theta, data):
    """Log posterior density of (mu, sigma) up to a constant."""
    mu, sigma = theta["mu"], theta["sigma"]
    return (
        jst.norm.logpdf(mu, PRIOR_MU_MEAN, PRIOR_MU_SD)
        + jst.gamma.logpdf(sigma, PRIOR_SIGMA_SHAPE, scale=1.0 / PRIOR_SIGMA_RATE)
        + jnp.sum(jst.norm.logpdf(data["hours"], mu, sigma))
    )


def prior_draw(key):
    """One draw of (mu, sigma) from the prior (for SBC and for the score check's points)."""
    k_mu, k_sigma = jax.random.split(key)
    return {
        "mu": PRIOR_MU_MEAN + PRIOR_MU_SD * jax.random.normal(k_mu),
        "sigma": jax.random.gamma(k_sigma, PRIOR_SIGMA_SHAPE) / PRIOR_SIGMA_RATE,
    }


def simulate(key, theta):
    """Twelve mornings of doubling times given (mu, sigma): the model run forwards."""
    return {"hours": theta["mu"] + theta["sigma"] * jax.random.normal(key, (N_MORNINGS,))}


# ----------------------------------------------------------------------------- 1. the score
def test_score_matches_finite_differences(fp_score_check):
    # 16 points drawn from the prior: the gradient is checked where the posterior may go, not
    # only at one convenient point. Fails when an element's relative error exceeds
    # --flowpost-score-tol (default 1e-4); a correct gradient gives about 1e-9.
    report = fp_score_check(log_p, Region.drawn(prior_draw), data=DATA)
    assert report.num_points == 16
    # the keyword shortcut for the same region checks the same points
    assert fp_score_check(log_p, data=DATA, sampler=prior_draw).worst_error == report.worst_error


@jax.custom_jvp
def _log_of_scale(s):
    return jnp.log(s)


@_log_of_scale.defjvp
def _log_of_scale_jvp(primals, tangents):
    (s,), (ds,) = primals, tangents
    return jnp.log(s), ds * s  # planted bug: d log(s) = ds / s


def _log_p_with_wrong_gradient(theta, data):
    """The same density, its likelihood hand-written with a custom derivative that is wrong."""
    mu, sigma = theta["mu"], theta["sigma"]
    y = data["hours"]
    loglik = (
        jnp.sum(-0.5 * ((y - mu) / sigma) ** 2)
        - y.shape[0] * _log_of_scale(sigma)
        - 0.5 * y.shape[0] * jnp.log(2 * jnp.pi)
    )
    return (
        jst.norm.logpdf(mu, PRIOR_MU_MEAN, PRIOR_MU_SD)
        + jst.gamma.logpdf(sigma, PRIOR_SIGMA_SHAPE, scale=1.0 / PRIOR_SIGMA_RATE)
        + loglik
    )


def test_planted_wrong_gradient_is_caught(fp_score_check):
    # the values agree with log_p (only the derivative is wrong), so only the score check sees it
    assert jnp.allclose(_log_p_with_wrong_gradient(TYPICAL, DATA), log_p(TYPICAL, DATA), rtol=1e-5)
    with pytest.raises(AssertionError, match="parameter 'sigma'"):
        fp_score_check(_log_p_with_wrong_gradient, NEAR_TYPICAL, data=DATA)


# ----------------------------------------------------------------------------- 2. health
def test_health(fp_health_check):
    report = fp_health_check(log_p, NEAR_TYPICAL, data=DATA, exchangeable=True)
    assert set(report.results) == {"scalar", "finite", "jit", "vmap", "deterministic", "exchangeable"}


def test_planted_row_bug_is_caught(fp_health_check):
    def log_p_skipping_first_morning(theta, data):
        # planted bug: the first row was taken for a header and dropped
        return log_p(theta, {"hours": data["hours"][1:]})

    report = fp_health_check(log_p_skipping_first_morning, NEAR_TYPICAL, data=DATA, exchangeable=True, check=False)
    assert list(report.failures) == ["exchangeable"]
    assert "data rows are permuted" in report.failures["exchangeable"]


# ----------------------------------------------------------------------------- 3. calibration
def test_simulation_based_calibration(fp_sbc):
    # "Validating Bayesian inference algorithms with simulation-based calibration" (2018):
    # ranks of the true (mu, sigma) among the posterior draws are uniform when the simulator,
    # the likelihood and the sampler agree. 100 datasets in 5 bins (the CI defaults of the
    # plugin) detect gross errors only; raise --flowpost-sbc-datasets for a stronger check.
    #
    # Step size: unadjusted Langevin inflates a posterior variance v by about h / (2 v)
    # ("Exponential convergence of Langevin distributions and their discrete approximations",
    # 1996). The smallest posterior variance here is that of mu when sigma is small,
    # sigma^2 / 12 >= 0.29^2 / 12 = 0.0071 for 99% of prior draws, so h = 1e-3 inflates it by
    # at most 7% (1% at the typical sigma^2 / 12 = 0.047), far below what 100 datasets can
    # resolve. 1500 steps (flow time 1.5) are over 8 relaxation times of the slowest
    # direction (v <= 0.18 for 99% of prior draws).
    report = fp_sbc(
        log_p, prior_draw, simulate, fp.Langevin(step_size=1e-3), fp_sbc.tile(TYPICAL), support=SUPPORT, steps=1500
    )
    assert report.names == ["mu", "sigma"]
    assert report.counts.sum(axis=1).tolist() == [fp_sbc.n_datasets] * 2


# ----------------------------------------------------------------------------- 4. closed form
def test_known_spread_matches_closed_form(fp_moments, fp_reference_families, fp_key):
    # With sigma held at 0.75 the model is the normal mean with known variance, whose
    # posterior is normal in closed form ("Bayesian Data Analysis", 3rd ed. (2013), sec. 2.5);
    # the family in flowpost.testing computes it independently of our log_p.
    sigma = TYPICAL["sigma"]

    def log_p_known_spread(theta, data):
        return log_p({"mu": theta["mu"], "sigma": sigma}, data)

    reference = fp_reference_families.NormalKnownVariance(
        prior_mean=PRIOR_MU_MEAN, prior_sd=PRIOR_MU_SD, noise_sd=sigma
    )

    # Posterior variance v = 1 / (1/4 + 12/0.5625) = 0.046. Unadjusted Langevin with
    # h = 5e-4 inflates it by h / (2 v) = 0.5%, a quarter of the standard error of a variance
    # from N = 4000 independent particles (sqrt(2 / N) = 2.2%); its stationary mean is exact on
    # a Gaussian target. 1000 steps (time 0.5) are 11 relaxation times v.
    result = fp.run(
        fp.Target(log_p_known_spread, data=DATA),
        fp.Langevin(step_size=5e-4),
        {"mu": jnp.full(4000, PRIOR_MU_MEAN)},
        key=fp_key,
        steps=1000,
        progress=False,
    )
    assert result.status == "done"
    # mean and variance within --flowpost-moment-z (default 4.5) Monte-Carlo standard errors;
    # Langevin particles do not interact, so the effective sample size is N.
    fp_moments.against(reference, {"y": DATA["hours"]}, result)
