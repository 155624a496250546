"""Tests of the test kit in flowpost.testing: closed-form reference families, the score
check, the health checks and the moment assertions.

Outside sources are named beside each check. Reference values are computed here
independently of the code under test (textbook formulas written out, scipy.stats densities,
scipy.integrate.quad, numpy linear algebra).
"""

from __future__ import annotations

import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.integrate
import scipy.special
import scipy.stats as ss
from hypothesis import HealthCheck, given, settings
from jax.scipy import stats as jss

from flowpost.testing.checks import (
    assert_deterministic,
    assert_exchangeable_rows,
    assert_finite_on_region,
    assert_jit_matches_eager,
    assert_scalar_output,
    assert_score_matches,
    assert_vmap_matches_loop,
    check_health,
    points_near,
    score_agreement,
)
from flowpost.testing.moments import assert_moments_match, moment_zscores
from flowpost.testing.references import (
    CLOSED_FORM_MODELS,
    BetaBinomial,
    DirichletMultinomial,
    GammaPoisson,
    LinearRegressionKnownNoise,
    NormalKnownVariance,
)
from flowpost.testing.region import Region

FEW = settings(max_examples=6, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])


# ============================================================================ helpers
def _quad_mean_var(log_unnorm, coarse, to_param=lambda u: u, log_jacobian=lambda u: 0.0 * u):
    """Posterior mean and variance by numerical normalisation of exp(log prior + log lik)
    with scipy.integrate.quad.

    The integral runs over an unconstrained variable u, the parameter being to_param(u) with
    |d param / du| = exp(log_jacobian(u)); this removes endpoint singularities. The coarse
    grid of u locates the mode and the window where the log-integrand is within 60 of its
    maximum (outside it the integrand is below e^-60 relative); quad then integrates over
    that finite window, split at the mode.
    """

    def log_g(u):
        with np.errstate(all="ignore"):
            v = log_unnorm(to_param(np.atleast_1d(u))) + log_jacobian(np.atleast_1d(u))
        return np.where(np.isnan(v), -np.inf, v)

    values = log_g(coarse)
    top = int(np.argmax(values))
    inside = np.flatnonzero(values > values[top] - 60.0)
    lo = coarse[max(inside[0] - 1, 0)]
    hi = coarse[min(inside[-1] + 1, coarse.size - 1)]

    def integral(power):
        f = lambda u: to_param(u) ** power * np.exp(log_g(u)[0] - values[top])
        return sum(
            scipy.integrate.quad(f, a, b, epsabs=0.0, epsrel=1e-10, limit=200)[0]
            for a, b in ((lo, coarse[top]), (coarse[top], hi))
        )

    z = integral(0)
    mean = integral(1) / z
    return mean, integral(2) / z - mean**2


def _scipy_log_unnorm(model, data):
    """log prior + log likelihood of a family written with scipy.stats (independent of the
    family's jax code), as a function of a theta dict."""
    if isinstance(model, NormalKnownVariance):
        return lambda th: (
            ss.norm.logpdf(th["mu"], model.prior_mean, model.prior_sd)
            + ss.norm.logpdf(data["y"], th["mu"], model.noise_sd).sum()
        )
    if isinstance(model, BetaBinomial):
        return lambda th: (
            ss.beta.logpdf(th["p"], model.a, model.b)
            + ss.binom.logpmf(data["successes"], data["trials"], th["p"]).sum()
        )
    if isinstance(model, GammaPoisson):
        return lambda th: (
            ss.gamma.logpdf(th["lam"], model.shape, scale=1 / model.rate)
            + ss.poisson.logpmf(data["counts"], th["lam"]).sum()
        )
    if isinstance(model, DirichletMultinomial):
        return lambda th: (
            ss.dirichlet.logpdf(th["probs"], model.alpha)
            + sum(ss.multinomial.logpmf(c, c.sum(), th["probs"]) for c in np.atleast_2d(data["counts"]))
        )
    return lambda th: (
        ss.multivariate_normal(model.prior_mean, model.prior_cov).logpdf(th["w"])
        + ss.norm.logpdf(data["y"], data["X"] @ th["w"], model.noise_sd).sum()
    )


# ============================================================================ reference families
@FEW
@given(NormalKnownVariance.instances())
def test_normal_known_variance_posterior(instance):
    model, data = instance
    y = data["y"]
    n = y.size
    m0, t0, s = model.prior_mean, model.prior_sd, model.noise_sd
    # "Bayesian Data Analysis", 3rd ed. (2013), sec. 2.5, eqs. (2.11)-(2.12) with ybar:
    # 1/tau_n^2 = 1/tau_0^2 + n/sigma^2, mu_n = (mu_0/tau_0^2 + n ybar/sigma^2) / (1/tau_n^2).
    precision = 1 / t0**2 + n / s**2
    mu_n = (m0 / t0**2 + n * y.mean() / s**2) / precision
    params = model.posterior_parameters(data)
    assert params["mean"] == pytest.approx(mu_n, rel=1e-12, abs=1e-12)
    assert params["sd"] == pytest.approx(precision**-0.5, rel=1e-12)
    assert model.posterior(data).mean() == pytest.approx(mu_n, rel=1e-12, abs=1e-12)

    # scipy: numerically normalised prior x likelihood (scipy.stats.norm, scipy.integrate.quad).
    def log_unnorm(mu):
        mu = np.asarray(mu, dtype=float)[:, None]
        return ss.norm.logpdf(mu[:, 0], m0, t0) + ss.norm.logpdf(y[None, :], mu, s).sum(axis=1)

    lo, hi = min(m0, y.mean()) - 50.0, max(m0, y.mean()) + 50.0
    mean, var = _quad_mean_var(log_unnorm, np.linspace(lo, hi, 4001))
    # tolerance 1e-7 relative: above the error of the numerical normalisation
    assert model.posterior_mean(data)[0] == pytest.approx(mean, rel=1e-7, abs=1e-9)
    assert model.posterior_cov(data)[0, 0] == pytest.approx(var, rel=1e-6)


@FEW
@given(BetaBinomial.instances())
def test_beta_binomial_posterior(instance):
    model, data = instance
    k, n = data["successes"].astype(float), data["trials"].astype(float)
    a, b = model.a, model.b
    # "Bayesian Data Analysis", 3rd ed. (2013), sec. 2.4: p | y ~ Beta(a + y, b + n - y),
    # summed over independent binomial rows.
    a_n, b_n = a + k.sum(), b + (n - k).sum()
    params = model.posterior_parameters(data)
    assert (params["a"], params["b"]) == (pytest.approx(a_n), pytest.approx(b_n))
    post = model.posterior(data)
    assert post.args == pytest.approx((a_n, b_n))

    def log_unnorm(p):
        p = np.asarray(p, dtype=float)
        return ss.beta.logpdf(p, a, b) + ss.binom.logpmf(k[None, :], n[None, :], p[:, None]).sum(1)

    # integrate over u = logit(p): p = 1 / (1 + exp(-u)), dp/du = p (1 - p)
    mean, var = _quad_mean_var(
        log_unnorm,
        np.linspace(-40.0, 40.0, 4001),
        to_param=scipy.special.expit,
        log_jacobian=lambda u: -np.logaddexp(0, -u) - np.logaddexp(0, u),
    )
    # tolerance 1e-7 relative: above the error of the numerical normalisation
    assert model.posterior_mean(data)[0] == pytest.approx(mean, rel=1e-7)
    assert model.posterior_cov(data)[0, 0] == pytest.approx(var, rel=1e-6)


@FEW
@given(GammaPoisson.instances())
def test_gamma_poisson_posterior(instance):
    model, data = instance
    y = data["counts"].astype(float)
    alpha, beta = model.shape, model.rate
    # "Bayesian Data Analysis", 3rd ed. (2013), sec. 2.6: theta | y ~ Gamma(alpha + n ybar,
    # beta + n) with rate parametrisation; mean (alpha + sum y)/(beta + n), var mean/(beta + n).
    a_n, b_n = alpha + y.sum(), beta + y.size
    params = model.posterior_parameters(data)
    assert params["shape"] == pytest.approx(a_n) and params["rate"] == pytest.approx(b_n)
    assert model.posterior(data).mean() == pytest.approx(a_n / b_n, rel=1e-12)

    def log_unnorm(lam):
        lam = np.asarray(lam, dtype=float)
        return ss.gamma.logpdf(lam, alpha, scale=1 / beta) + ss.poisson.logpmf(y[None, :], lam[:, None]).sum(1)

    # integrate over u = log(lam): d lam / du = lam
    mean, var = _quad_mean_var(log_unnorm, np.linspace(-40.0, 10.0, 4001), to_param=np.exp, log_jacobian=lambda u: u)
    # tolerance 1e-7 relative: above the error of the numerical normalisation
    assert model.posterior_mean(data)[0] == pytest.approx(mean, rel=1e-7)
    assert model.posterior_cov(data)[0, 0] == pytest.approx(var, rel=1e-6)
    assert model.posterior_cov(data)[0, 0] == pytest.approx(a_n / b_n**2, rel=1e-12)


@FEW
@given(DirichletMultinomial.instances())
def test_dirichlet_multinomial_posterior(instance):
    model, data = instance
    counts = data["counts"]
    alpha = model.alpha
    # "Bayesian Data Analysis", 3rd ed. (2013), sec. 3.4: theta | y ~ Dirichlet(alpha + y).
    a_n = alpha + counts.sum(axis=0)
    np.testing.assert_allclose(model.posterior_parameters(data)["alpha"], a_n, rtol=1e-12)
    # Dirichlet moments (standard closed form, from memory): E = a/a0,
    # Cov_ij = (a0 a_i delta_ij - a_i a_j) / (a0^2 (a0 + 1)).
    a0 = a_n.sum()
    np.testing.assert_allclose(model.posterior_mean(data), a_n / a0, rtol=1e-12)
    cov = (a0 * np.diag(a_n) - np.outer(a_n, a_n)) / (a0**2 * (a0 + 1))
    np.testing.assert_allclose(model.posterior_cov(data), cov, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(model.posterior(data).cov(), cov, rtol=1e-10, atol=1e-14)

    # scipy: the posterior density is proportional to prior x likelihood (scipy.stats
    # dirichlet and multinomial): the log ratio is the same constant at random simplex points,
    # and two normalised densities with a constant ratio are equal.
    log_unnorm = _scipy_log_unnorm(model, data)
    rng = np.random.default_rng(0)
    pts = rng.dirichlet(np.full(alpha.size, 3.0), size=4)
    ratio = [model.posterior(data).logpdf(p) - log_unnorm({"probs": p}) for p in pts]
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-9, atol=1e-9)


@FEW
@given(LinearRegressionKnownNoise.instances())
def test_linear_regression_posterior(instance):
    model, data = instance
    X, y = data["X"], data["y"]
    m0, S0, beta = model.prior_mean, model.prior_cov, 1.0 / model.noise_sd**2
    # "Pattern Recognition and Machine Learning" (2006), sec. 3.3, eqs. (3.50)-(3.51), written
    # as a stacked least-squares problem solved by numpy.linalg.lstsq: the posterior mean
    # minimises |R0 (w - m0)|^2 + beta |y - X w|^2 with R0^T R0 = S0^{-1}, and
    # S_N = (A^T A)^{-1} for the stacked design A.
    R0 = np.linalg.cholesky(np.linalg.inv(S0)).T
    A = np.vstack([R0, np.sqrt(beta) * X])
    rhs = np.concatenate([R0 @ m0, np.sqrt(beta) * y])
    m_n = np.linalg.lstsq(A, rhs, rcond=None)[0]
    S_n = np.linalg.inv(A.T @ A)
    np.testing.assert_allclose(model.posterior_mean(data), m_n, rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(model.posterior_cov(data), S_n, rtol=1e-7, atol=1e-10)

    # scipy: posterior / (prior x likelihood) is constant (scipy.stats multivariate_normal, norm)
    log_unnorm = _scipy_log_unnorm(model, data)
    rng = np.random.default_rng(1)
    thetas = [{"w": m_n + rng.normal(size=m0.size)} for _ in range(4)]
    ratio = [model.posterior(data).logpdf(th["w"]) - log_unnorm(th) for th in thetas]
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-8, atol=1e-8)


def _prior_marginal(model):
    """(function theta -> first scalar coordinate, scipy prior marginal of it), built here
    from the hyper-parameters (aggregation property of the Dirichlet: p_1 ~ Beta(a_1, a0-a_1))."""
    if isinstance(model, NormalKnownVariance):
        return lambda th: th["mu"], ss.norm(model.prior_mean, model.prior_sd)
    if isinstance(model, BetaBinomial):
        return lambda th: th["p"], ss.beta(model.a, model.b)
    if isinstance(model, GammaPoisson):
        return lambda th: th["lam"], ss.gamma(model.shape, scale=1 / model.rate)
    if isinstance(model, DirichletMultinomial):
        a = model.alpha
        return lambda th: th["probs"][:, 0], ss.beta(a[0], a.sum() - a[0])
    return lambda th: th["w"][:, 0], ss.norm(model.prior_mean[0], np.sqrt(model.prior_cov[0, 0]))


_FIXED_MODELS = [
    NormalKnownVariance(prior_mean=1.0, prior_sd=2.0, noise_sd=0.5),
    BetaBinomial(a=2.0, b=3.0),
    GammaPoisson(shape=3.0, rate=0.5),
    DirichletMultinomial(alpha=np.array([2.0, 3.0, 4.0])),
    LinearRegressionKnownNoise(
        prior_mean=np.array([0.5, -1.0]), prior_cov=np.array([[1.0, 0.3], [0.3, 0.5]]), noise_sd=0.7
    ),
]


def _data_for(model):
    """Fixed small data sets (numpy, seed 7) for the fixed instances."""
    rng = np.random.default_rng(7)
    if isinstance(model, NormalKnownVariance):
        return {"y": rng.normal(1.5, 0.5, size=6)}
    if isinstance(model, BetaBinomial):
        return {"successes": np.array([3, 5, 2, 6, 4, 4], np.int32), "trials": np.full(6, 10, np.int32)}
    if isinstance(model, GammaPoisson):
        return {"counts": rng.poisson(4.0, size=6).astype(np.int32)}
    if isinstance(model, DirichletMultinomial):
        return {"counts": rng.multinomial(10, [0.2, 0.3, 0.5], size=6).astype(np.int32)}
    X = rng.normal(size=(6, 2))
    return {"X": X, "y": X @ np.array([1.0, -0.5]) + 0.7 * rng.normal(size=6)}


def _exact_posterior_sampler(model, data):
    """sampler(key) -> theta drawing from the family's scipy posterior (numpy generator seeded
    with the key's data), so that the checks do not depend on the family's jax samplers."""
    name = next(iter(model.supports))
    post = model.posterior(data)
    shape = model.posterior_mean(data).shape if model.posterior_mean(data).size > 1 else ()

    def sampler(key):
        rng = np.random.default_rng(np.asarray(jax.random.key_data(key)))
        return {name: np.reshape(post.rvs(random_state=rng), shape)}

    return sampler


@pytest.mark.parametrize("model", _FIXED_MODELS, ids=lambda m: type(m).__name__)
def test_log_density_matches_scipy_prior_times_likelihood(model):
    # The family's jax log-density (float64) equals log prior + log likelihood written with
    # scipy.stats up to one additive constant: differences between points must agree.
    data = _data_for(model)
    sampler = _exact_posterior_sampler(model, data)
    thetas = [sampler(k) for k in jax.random.split(jax.random.key(2), 5)]
    with jax.enable_x64(True):
        pts64 = jax.tree.map(lambda *v: jnp.asarray(np.stack(v), jnp.float64), *thetas)
        ours = np.asarray(jax.jit(jax.vmap(model.log_density, in_axes=(0, None)))(pts64, data))
    ref = np.array([_scipy_log_unnorm(model, data)(th) for th in thetas])
    np.testing.assert_allclose(ours - ours[0], ref - ref[0], rtol=1e-7, atol=1e-9 * max(1.0, np.abs(ref).max()))


@pytest.mark.parametrize("model", _FIXED_MODELS, ids=lambda m: type(m).__name__)
def test_simulator_draws_theta_from_the_prior_and_posterior_draws_match(model):
    # One draw per call in a Python loop: every call reuses the same compiled samplers
    # (a batched or longer draw would compile them again, which dominates the cost here).
    num = 400
    stack = lambda items: jax.tree.map(lambda *v: np.stack([np.asarray(x) for x in v]), *items)
    sims = [model.simulate(k, 4) for k in jax.random.split(jax.random.key(3), num)]
    thetas, data = stack([t for t, _ in sims]), stack([d for _, d in sims])
    # Prior draws: Kolmogorov-Smirnov test (scipy.stats.kstest) of the first coordinate
    # against the scipy prior marginal; p > 1e-3 with a fixed key (common practice).
    first, prior = _prior_marginal(model)
    assert ss.kstest(np.asarray(first(thetas), dtype=float), prior.cdf).pvalue > 1e-3
    assert all(leaf.shape[:2] == (num, 4) for leaf in jax.tree.leaves(data))

    # Exact posterior draws against the scipy posterior's mean and covariance, in Monte-Carlo
    # standard errors (threshold 5, independent draws).
    one = jax.tree.map(lambda v: v[0], data)
    post = model.posterior(one)
    draws = stack([model.draw_posterior(k, one) for k in jax.random.split(jax.random.key(4), num)])
    if isinstance(model, LinearRegressionKnownNoise):
        ref_mean, ref_cov = post.mean, post.cov
    elif isinstance(model, DirichletMultinomial):
        ref_mean, ref_cov = post.mean(), post.cov()
    else:
        ref_mean, ref_cov = np.atleast_1d(post.mean()), np.atleast_2d(post.var())
    assert_moments_match(draws, ref_mean, np.asarray(ref_cov), threshold=5.0)


def test_reference_families_validate_their_arguments():
    with pytest.raises(ValueError, match="prior_sd"):
        NormalKnownVariance(prior_sd=-1.0)
    with pytest.raises(ValueError, match="alpha"):
        DirichletMultinomial(alpha=np.array([1.0]))
    with pytest.raises(ValueError, match="prior_cov"):
        LinearRegressionKnownNoise(prior_mean=np.zeros(2), prior_cov=np.eye(3))
    with pytest.raises(ValueError, match="successes"):
        BetaBinomial().posterior_parameters({"successes": np.array([3]), "trials": np.array([2])})
    # the support names are ones the library's constraint transforms understand
    support = pytest.importorskip("flowpost.model")
    for cls in CLOSED_FORM_MODELS:
        for name in cls.supports.values():
            assert support.as_support(name).describe().startswith(name.replace("unit", "interval"))


# ============================================================================ score check


@pytest.mark.parametrize("model", _FIXED_MODELS, ids=lambda m: type(m).__name__)
def test_score_check_passes_on_reference_families(model):
    # A correct gradient agrees with central differences up to O(h^4) truncation and
    # round-off (Taylor expansion); measured errors are ~1e-9, the tolerance is 1e-6.
    data = _data_for(model)
    report = assert_score_matches(
        model.log_density,
        data=data,
        sampler=_exact_posterior_sampler(model, data),
        num_points=6,
        tolerance=1e-6,
    )
    assert report.worst_error < 1e-6 and report.num_points == 6


def test_score_check_reports_the_closed_form_normal_score():
    # Score of the normal-normal posterior (from BDA (2013) sec. 2.5 by differentiation):
    # d/dmu = -(mu - mu_0)/tau_0^2 + sum_i (y_i - mu)/sigma^2.
    model = _FIXED_MODELS[0]
    data = _data_for(model)
    rep = score_agreement(model.log_density, data=data, around={"mu": 0.3}, scale=1.0, num_points=4)
    mu = float(rep.point["mu"])
    exact = -(mu - 1.0) / 4.0 + np.sum(data["y"].astype(float) - mu) / 0.25
    assert rep.autodiff == pytest.approx(exact, rel=1e-10)
    assert rep.finite_difference == pytest.approx(exact, rel=1e-7)
    assert jnp.asarray(1.0).dtype == jnp.float32  # float64 was enabled only inside the check


@jax.custom_jvp
def _half_square_twice(x):
    return 0.5 * jnp.sum(x**2)


@_half_square_twice.defjvp
def _half_square_twice_jvp(primals, tangents):
    (x,), (t,) = primals, tangents
    return _half_square_twice(x), jnp.sum(2.0 * x * t)  # planted bug: true derivative is x


@jax.custom_vjp
def _half_square_vjp(x):
    return 0.5 * jnp.sum(x**2)


def _half_square_fwd(x):
    return _half_square_vjp(x), x


def _half_square_bwd(x, g):
    return (2.0 * g * x,)  # planted bug: true cotangent is g * x


_half_square_vjp.defvjp(_half_square_fwd, _half_square_bwd)


@pytest.mark.parametrize("bad", [_half_square_twice, _half_square_vjp], ids=["custom_jvp", "custom_vjp"])
def test_score_check_catches_a_factor_two_rule(bad):
    def log_p(theta):
        return -bad(theta["w"]) + jss.norm.logpdf(theta["s"], 0.0, 2.0)

    point = {"s": jnp.float32(0.2), "w": jnp.array([0.5, -1.0, 1.5])}
    rep = score_agreement(log_p, around=point, scale=0.3, num_points=5)
    # |2x - x| / max(|2x|, |x|) = 1/2 exactly for every w coordinate away from 0
    assert rep.worst_error == pytest.approx(0.5, abs=1e-6)
    assert rep.leaf == "w"
    assert rep.coordinate_errors["s"] < 1e-6  # finite-difference round-off only
    with pytest.raises(AssertionError, match=r"parameter 'w\[\d\]'.*relative error 0\.5"):
        assert_score_matches(log_p, around=point, scale=0.3, num_points=5)


def _normal_sum(w):
    return jnp.sum(jss.norm.logpdf(w, 1.0, 2.0))


@jax.custom_jvp
def _normal_sum_drop_two(w):
    return _normal_sum(w)


@_normal_sum_drop_two.defjvp
def _normal_sum_drop_two_jvp(primals, tangents):
    (w,), (t,) = primals, tangents
    g = jax.grad(_normal_sum)(w).at[2].set(0.0)  # planted bug: coordinate 2 lost
    return _normal_sum_drop_two(w), jnp.dot(g, t)


def test_score_check_names_the_one_wrong_coordinate():
    def log_p(theta):
        return _normal_sum_drop_two(theta["w"]) + jss.norm.logpdf(theta["s"])

    point = {"s": jnp.float32(0.0), "w": jnp.array([0.1, -0.4, 3.0, 0.7, 2.2])}
    rep = score_agreement(log_p, around=point, scale=0.5, num_points=6)
    assert rep.parameter == "w[2]" and rep.flat_index == 2 and rep.index == (2,)
    assert rep.worst_error == pytest.approx(1.0)  # |0 - g| / |g|
    assert rep.autodiff == 0.0
    others = {k: v for k, v in rep.coordinate_errors.items() if k != "w[2]"}
    assert max(others.values()) < 1e-6  # finite-difference round-off only
    with pytest.raises(AssertionError) as info:
        assert_score_matches(log_p, around=point, scale=0.5, num_points=6)
    msg = str(info.value)
    assert "'w[2]'" in msg and "index 2 of leaf 'w'" in msg and "at point" in msg


def test_score_check_names_matrix_entries_and_runs_eagerly():
    def plain(m):
        return -0.5 * jnp.sum((m - 1.0) ** 2)

    @jax.custom_jvp
    def broken(m):
        return plain(m)

    @broken.defjvp
    def _jvp(primals, tangents):
        (m,), (t,) = primals, tangents
        g = jax.grad(plain)(m).at[1, 0].multiply(3.0)  # planted bug in entry (1, 0)
        return broken(m), jnp.sum(g * t)

    point = jnp.zeros((2, 3))  # a plain array: the root is named 'theta'
    for compiled in (True, False):
        rep = score_agreement(broken, around=point, scale=0.2, num_points=3, compiled=compiled)
        assert rep.parameter == "theta[1,0]" and rep.flat_index == 3
        assert rep.worst_error == pytest.approx(2.0 / 3.0)  # |3g - g| / |3g|


def test_score_check_rejects_bad_arguments():
    with pytest.raises(ValueError, match="around, sampler: expected exactly one"):
        score_agreement(lambda t: -jnp.sum(t**2))
    with pytest.raises(ValueError, match="scalar"):
        score_agreement(lambda t: -(t**2), around=jnp.zeros(3))
    with pytest.raises(ValueError, match=r"data: expected .*\(exchangeable=True\); got None"):
        check_health(lambda t: -jnp.sum(t**2), around=jnp.zeros(3), exchangeable=True)


# ============================================================================ health checks
def test_health_report_passes_for_a_reference_family():
    model = _FIXED_MODELS[0]
    data = _data_for(model)
    report = check_health(
        model.log_density, data=data, sampler=_exact_posterior_sampler(model, data), exchangeable=True
    )
    assert report.passed, report.summary()
    assert set(report.results) == {"scalar", "finite", "jit", "vmap", "deterministic", "exchangeable"}
    report.assert_passed()


def test_health_catches_a_non_scalar_return():
    def log_p(w):
        return jss.norm.logpdf(w)  # forgot the sum

    with pytest.raises(AssertionError, match=r"returned shape \(3,\)"):
        assert_scalar_output(log_p, jnp.zeros(3))
    report = check_health(log_p, around=jnp.zeros(3))
    assert report.failures.keys() >= {"scalar"} and not report.passed
    with pytest.raises(AssertionError, match="scalar"):
        report.assert_passed()


def test_health_catches_numpy_randomness():
    rng = np.random.default_rng(0)

    def log_p(w):
        return -0.5 * jnp.sum(w**2) + rng.normal(scale=1e-3)  # planted: global-state noise

    with pytest.raises(AssertionError, match="not deterministic"):
        assert_deterministic(log_p, jnp.ones(2))
    assert "deterministic" in check_health(log_p, around=jnp.ones(2)).failures


def test_health_catches_dependence_on_row_order():
    model = _FIXED_MODELS[0]
    data = _data_for(model)

    def first_row_special(theta, d):  # planted: the first row gets a different noise scale
        y = d["y"]
        return jss.norm.logpdf(y[0], theta["mu"], 10.0) + jnp.sum(jss.norm.logpdf(y[1:], theta["mu"], 0.5))

    point = {"mu": jnp.float32(0.5)}
    assert_exchangeable_rows(model.log_density, point, data)  # the correct model passes
    with pytest.raises(AssertionError, match="rows are permuted"):
        assert_exchangeable_rows(first_row_special, point, data)
    report = check_health(first_row_special, data=data, around=point, exchangeable=True)
    assert set(report.failures) == {"exchangeable"}
    with pytest.raises(ValueError, match="leading"):
        assert_exchangeable_rows(model.log_density, point, {"y": np.zeros(4), "z": np.zeros(3)})


def test_health_catches_nan_on_part_of_the_region():
    def log_p(x):
        return jnp.sum(jnp.log(x))  # planted: NaN for negative entries

    with pytest.raises(AssertionError, match=r"not finite at \d+ of 32 points"):
        assert_finite_on_region(log_p, around=jnp.array([0.5]), scale=1.0)
    assert_finite_on_region(log_p, around=jnp.array([5.0]), scale=0.1)  # far from 0: fine
    assert "finite" in check_health(log_p, around=jnp.array([0.5]), scale=1.0).failures


def test_health_catches_jit_and_vmap_faults():
    def branchy(x):
        if x > 0:  # Python branch on a traced value: fails under jit
            return -(x**2)
        return -2 * x**2

    with pytest.raises(AssertionError, match=r"fails under jax\.jit"):
        assert_jit_matches_eager(branchy, jnp.float32(1.0))

    @jax.custom_batching.custom_vmap
    def shifted_when_batched(x):
        return -0.5 * jnp.sum(x**2)

    @shifted_when_batched.def_vmap
    def _rule(axis_size, in_batched, x):
        return -0.5 * jnp.sum(x**2, axis=1) + 1.0, True  # planted: batching rule off by 1

    with pytest.raises(AssertionError, match="differs from the one-point value"):
        assert_vmap_matches_loop(shifted_when_batched, around=jnp.zeros(2))
    assert_vmap_matches_loop(lambda x: -0.5 * jnp.sum(x**2), around=jnp.zeros(2))


_BASE = {"s": np.float32(1.0), "w": np.zeros(3, dtype=np.float32)}


@FEW
@given(points_near(_BASE, radius=0.5))
def test_points_near_strategy_and_health_at_those_points(point):
    assert jax.tree.structure(point) == jax.tree.structure(_BASE)
    assert point["w"].dtype == np.float32 and point["w"].shape == (3,)
    assert np.all(np.abs(point["w"] - _BASE["w"]) <= 0.5 + 1e-6)
    model = _FIXED_MODELS[0]
    theta = {"mu": point["w"][0] * point["s"]}
    assert_scalar_output(model.log_density, theta, data=_data_for(model))
    assert_deterministic(model.log_density, theta, data=_data_for(model))


# ============================================================================ regions
def _old_perturbations(around, scale, num, key):
    """The points of the former keyword form ``around=, scale=, num_points=, key=``, written
    out here: per point, per leaf in tree_flatten order, ``leaf + scale * z`` with ``z`` from
    a numpy generator seeded by the key's raw bits; float32 leaves stay float32."""
    rng = np.random.default_rng(np.asarray(jax.random.key_data(key), dtype=np.uint32).ravel())
    leaves, treedef = jax.tree.flatten(around)
    out = []
    for _ in range(num):
        out.append(
            jax.tree.unflatten(
                treedef, [(np.asarray(b) + scale * rng.standard_normal(np.shape(b))).astype(np.float32) for b in leaves]
            )
        )
    return out


def test_region_points_are_those_of_the_keywords():
    point = {"s": jnp.float32(0.2), "w": jnp.array([0.5, -1.0, 1.5])}
    key = jax.random.key(7)
    near = Region.near(point, scale=0.3, num_points=5, key=key)
    got = near.points(16)
    assert len(got) == 5
    for a, b in zip(got, _old_perturbations(point, 0.3, 5, key), strict=True):
        assert jax.tree.structure(a) == jax.tree.structure(b)
        for x, y in zip(jax.tree.leaves(a), jax.tree.leaves(b), strict=True):
            assert x.dtype == y.dtype and np.array_equal(x, y)
    # unset num_points takes the check's default; unset key is jax.random.key(0)
    assert len(Region.near(point).points(8)) == 8
    for a, b in zip(
        Region.near(point, num_points=3).points(99),
        Region.near(point, num_points=3, key=jax.random.key(0)).points(99),
        strict=True,
    ):
        assert all(np.array_equal(x, y) for x, y in zip(jax.tree.leaves(a), jax.tree.leaves(b), strict=True))
    # drawn: sampler(k) for keys split from the region's key
    sampler = lambda k: {"w": jax.random.normal(k, (2,))}
    drawn = Region.drawn(sampler, key=key).points(4)
    expected = [sampler(k) for k in jax.random.split(key, 4)]
    np.testing.assert_array_equal(np.stack([d["w"] for d in drawn]), np.stack([e["w"] for e in expected]))

    # the checks give the same numbers with a region as with the keywords
    def log_p(theta):
        return -_half_square_twice(theta["w"]) + jss.norm.logpdf(theta["s"], 0.0, 2.0)

    by_keywords = score_agreement(log_p, around=point, scale=0.3, num_points=5, key=key)
    by_region = score_agreement(log_p, near)
    assert by_region.worst_error == by_keywords.worst_error
    np.testing.assert_array_equal(by_region.point_errors, by_keywords.point_errors)
    assert by_region.coordinate_errors == by_keywords.coordinate_errors
    model = _FIXED_MODELS[0]
    data = _data_for(model)

    def first_row_special(theta, d):
        y = d["y"]
        return jss.norm.logpdf(y[0], theta["mu"], 10.0) + jnp.sum(jss.norm.logpdf(y[1:], theta["mu"], 0.5))

    mu = {"mu": jnp.float32(0.5)}
    kw = check_health(first_row_special, data=data, around=mu, scale=0.2, key=key, exchangeable=True)
    rg = check_health(first_row_special, Region.near(mu, 0.2, key=key), data=data, exchangeable=True)
    assert kw.results == rg.results and set(rg.failures) == {"exchangeable"}
    assert_finite_on_region(lambda x: jnp.sum(jnp.log(x)), region=Region.near(jnp.array([5.0])))
    with pytest.raises(AssertionError, match=r"not finite at \d+ of 7 points"):
        assert_finite_on_region(lambda x: jnp.sum(jnp.log(x)), Region.near(jnp.array([0.5]), 1.0, 7))
    assert_vmap_matches_loop(lambda x: -0.5 * jnp.sum(x**2), Region.drawn(lambda k: jax.random.normal(k, (2,))))


def test_region_refuses_bad_values_naming_the_argument():
    point = jnp.zeros(2)
    with pytest.raises(TypeError, match=r"^num_points: expected an integer >= 1; got 2\.5$"):
        Region.near(point, num_points=2.5)
    with pytest.raises(TypeError, match=r"^num_points: expected an integer >= 1; got True$"):
        Region.near(point, num_points=True)
    with pytest.raises(ValueError, match=r"^num_points: expected an integer >= 1; got 0$"):
        Region.drawn(lambda k: point, num_points=0)
    with pytest.raises(ValueError, match=r"^scale: expected a finite number >= 0; got nan$"):
        Region.near(point, scale=float("nan"))
    with pytest.raises(ValueError, match=r"^scale: expected a finite number >= 0; got inf$"):
        Region.near(point, scale=float("inf"))
    with pytest.raises(ValueError, match=r"^scale: expected a finite number >= 0; got -0\.1$"):
        Region.near(point, scale=-0.1)
    with pytest.raises(TypeError, match=r"^scale: expected .*; got '0\.1'$"):
        Region.near(point, scale="0.1")
    with pytest.raises(ValueError, match=r"^around, sampler: expected exactly one .*; got both$"):
        Region(around=point, sampler=lambda k: point)
    with pytest.raises(ValueError, match=r"^around, sampler: expected exactly one .*; got neither$"):
        Region()
    with pytest.raises(TypeError, match=r"^sampler: expected a callable key -> pytree; got"):
        Region.drawn(point)
    with pytest.raises(TypeError, match=r"^key: expected a jax PRNG key .*; got 0$"):
        Region.near(point, key=0)
    with pytest.raises(ValueError, match=r"^key: expected a single PRNG key"):
        Region.near(point, key=jax.random.split(jax.random.key(0), 3))
    with pytest.raises(ValueError, match=r"^around: expected a pytree with at least one array leaf"):
        Region.near({})
    Region.near(point, key=jax.random.PRNGKey(1))  # a legacy raw key is a key
    # the same refusals through the keyword shortcut, named the same way
    with pytest.raises(TypeError, match=r"^num_points: expected an integer"):
        score_agreement(lambda t: -jnp.sum(t**2), around=point, num_points=2.5)
    with pytest.raises(ValueError, match=r"^scale: expected a finite number >= 0; got nan$"):
        check_health(lambda t: -jnp.sum(t**2), around=point, scale=float("nan"))


def test_region_and_loose_keywords_are_not_both_given():
    point = jnp.zeros(2)
    log_p = lambda t: -jnp.sum(t**2)
    region = Region.near(point)
    for check in (
        score_agreement,
        assert_score_matches,
        assert_finite_on_region,
        assert_vmap_matches_loop,
        check_health,
    ):
        with pytest.raises(TypeError, match=r"^region, around: expected either region= or the keywords"):
            check(log_p, region, around=point)
        with pytest.raises(TypeError, match=r"^region, num_points, key: expected either region="):
            check(log_p, region=region, num_points=3, key=jax.random.key(1))
        # a misspelt keyword is named, with the region keyword it resembles
        with pytest.raises(
            TypeError,
            match=rf"^{check.__name__}: expected keywords .*'aroud' "
            r"\(did you mean 'around'\?\)",
        ):
            check(log_p, aroud=point)
        with pytest.raises(TypeError, match=r"^region: expected a Region .*; got the class Region"):
            check(log_p, Region)


# ============================================================================ moment assertions
_MEAN = np.array([1.0, -2.0, 0.5])
_COV = np.array([[1.0, 0.5, 0.2], [0.5, 2.0, -0.3], [0.2, -0.3, 0.5]])
_N = 4000


def _exact_draws():
    # exact independent draws from scipy.stats.multivariate_normal with a fixed seed
    return ss.multivariate_normal(_MEAN, _COV).rvs(size=_N, random_state=12345)


def test_moments_pass_for_exact_draws():
    draws = _exact_draws()
    # threshold 4.5 standard errors: false-alarm probability ~7e-6 per quantity (normal tail)
    for kind in ("empirical", "gaussian"):
        z = assert_moments_match(draws, _MEAN, _COV, threshold=4.5, variance_error=kind)
        assert z.max_abs_z < 4.5 and z.cov_z.shape == (3, 3)
    # For Gaussian draws m4 = 3 s^4, so the empirical variance error sqrt((m4 - s^4)/n) should be
    # close to the normal-theory sqrt(2 s^4 / n) (textbook normal moments); 10% covers the
    # sampling error of m4 at N = 4000.
    emp = moment_zscores(draws, _MEAN, _COV).cov_se
    gau = moment_zscores(draws, _MEAN, _COV, variance_error="gaussian").cov_se
    np.testing.assert_allclose(np.diag(emp), np.diag(gau), rtol=0.1)
    # mean standard error: sqrt(Sigma_kk / N) for independent draws (textbook)
    np.testing.assert_allclose(moment_zscores(draws, _MEAN).mean_se, np.sqrt(np.diag(_COV) / _N), rtol=0.05)


def test_moments_name_a_mean_shifted_by_ten_standard_errors():
    draws = _exact_draws()
    shifted = _MEAN.copy()
    shifted[1] += 10 * np.sqrt(_COV[1, 1] / _N)  # 10 standard errors of the mean
    with pytest.raises(AssertionError) as info:
        assert_moments_match(draws, shifted, _COV, threshold=4.5)
    msg = str(info.value)
    assert "mean of theta[1]" in msg
    assert "mean of theta[0]" not in msg and "mean of theta[2]" not in msg
    z = float(re.search(r"mean of theta\[1\].*off by ([-+0-9.e]+) standard errors", msg).group(1))
    assert -10 - 4.5 < z < -10 + 4.5  # ensemble - reference = -10 se, plus sampling noise of ~1 se
    # with an effective sample size 100 times smaller the same shift is ~1 standard error
    z_small = moment_zscores(draws, shifted, n_eff=_N / 100).mean_z
    np.testing.assert_allclose(z_small, moment_zscores(draws, shifted).mean_z / 10, rtol=1e-12)
    assert_moments_match(draws, shifted, n_eff=_N / 100)


def test_moments_name_a_wrong_variance_in_a_pytree():
    draws = _exact_draws()
    tree = {"a": draws[:, 0], "b": draws[:, 1:]}
    ref_cov = _COV.copy()
    ref_cov[2, 2] *= 1.5  # variance of b[1] off by 50%: ~22 standard errors at N = 4000
    with pytest.raises(AssertionError, match=r"variance of b\[1\]"):
        assert_moments_match(tree, {"a": _MEAN[0], "b": _MEAN[1:]}, ref_cov)
    z = assert_moments_match(tree, {"a": _MEAN[0], "b": _MEAN[1:]}, _COV)
    assert z.labels == ["a", "b[0]", "b[1]"]
    with pytest.raises(ValueError, match="cov"):
        assert_moments_match(tree, _MEAN, np.eye(2))
