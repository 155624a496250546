"""Unadjusted Langevin against closed forms.

Monte-Carlo error: with N independent particles the standard error of a sample mean is
sd / sqrt(N) and that of a Gaussian sample variance is v * sqrt(2 / N); of a Gaussian sample
covariance entry, sqrt((C_ii C_jj + C_ij^2) / N) (Wishart second moments). Tolerances are
5 of these standard errors unless the test says otherwise.
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp

Z = 5.0  # tolerance in Monte-Carlo standard errors


def _std_normal_scaled(s2):
    def log_p(x):
        return jnp.sum(jst.norm.logpdf(x, 0.0, jnp.sqrt(s2)))

    return log_p


@pytest.mark.parametrize("h", [0.2, 0.8])
def test_stationary_variance_bias(h):
    """ULA on N(0, s2) is the AR(1) chain x' = (1 - h/s2) x + sqrt(2h) xi, whose stationary
    variance is s2 / (1 - h / (2 s2)): "Exponential convergence of Langevin distributions and
    their discrete approximations" (Bernoulli, 1996). N = 20,000 particles."""
    s2, n = 1.0, 20_000
    key = jax.random.key(11)
    x0 = jax.random.normal(jax.random.key(1), (n, 1))
    r = fp.run(_std_normal_scaled(s2), fp.Langevin(step_size=h), x0, key=key, steps=300, progress=False)
    v = np.var(r.unconstrained[:, 0], ddof=1)
    expected = s2 / (1 - h / (2 * s2))
    se = expected * np.sqrt(2 / n)
    assert abs(v - expected) < Z * se, (v, expected, se)
    # and the bias is real: the target's own variance is far outside the error band
    assert abs(v - s2) > Z * se


def test_normal_model_known_variance():
    """Normal likelihood with known variance and a normal prior on the mean: posterior
    N(mu_n, tau_n^2) with 1/tau_n^2 = 1/tau0^2 + n/sigma^2 and
    mu_n = (mu0/tau0^2 + n ybar/sigma^2) tau_n^2 ("Bayesian Data Analysis", 3rd ed. (2013),
    sec. 2.5). Langevin's known step bias on a Gaussian (variance v / (1 - h/(2v)), mean
    unbiased; 1996 paper above) is added to the reference variance."""
    rng = np.random.default_rng(5)
    sigma, mu0, tau0 = 2.0, 1.0, 3.0
    y = rng.normal(4.0, sigma, size=25)
    prec = 1 / tau0**2 + len(y) / sigma**2
    tau_n2 = 1 / prec
    mu_n = (mu0 / tau0**2 + y.sum() / sigma**2) * tau_n2

    def log_p(theta, data):
        return jst.norm.logpdf(theta["mu"], mu0, tau0) + jnp.sum(jst.norm.logpdf(data, theta["mu"], sigma))

    n, h = 10_000, 0.01
    init = {"mu": jnp.zeros(n)}
    r = fp.run(
        fp.Target(log_p, data=jnp.asarray(y)),
        fp.Langevin(step_size=h),
        init,
        key=jax.random.key(2),
        steps=600,
        progress=False,
    )
    mu = np.asarray(r.particles["mu"])
    var_ref = tau_n2 / (1 - h / (2 * tau_n2))
    assert abs(mu.mean() - mu_n) < Z * np.sqrt(var_ref / n)
    assert abs(mu.var(ddof=1) - var_ref) < Z * var_ref * np.sqrt(2 / n)


def test_bayesian_linear_regression_pytree():
    """Known-noise linear regression with a Gaussian prior, parameters as a pytree
    {"w": (4,), "b": ()}: posterior N(m_N, S_N) with S_N^-1 = alpha I + beta Phi^T Phi,
    m_N = beta S_N Phi^T t ("Pattern Recognition and Machine Learning" (2006), sec. 3.3),
    computed here with numpy. ULA's stationary covariance on a Gaussian with precision P is
    S (I - h P / 2)^-1 (the AR(1) recursion per eigen-direction; same 1996 paper)."""
    rng = np.random.default_rng(7)
    m, alpha, beta = 40, 1.0, 4.0
    X = rng.normal(size=(m, 4))
    t = X @ np.array([0.5, -1.0, 0.0, 2.0]) + 0.7 + rng.normal(scale=beta**-0.5, size=m)
    Phi = np.column_stack([X, np.ones(m)])
    S_inv = alpha * np.eye(5) + beta * Phi.T @ Phi
    S = np.linalg.inv(S_inv)
    mean = beta * S @ Phi.T @ t

    def log_p(theta, data):
        Xd, td = data
        pred = Xd @ theta["w"] + theta["b"]
        prior = jnp.sum(jst.norm.logpdf(theta["w"], 0, alpha**-0.5)) + jst.norm.logpdf(theta["b"], 0, alpha**-0.5)
        return prior + jnp.sum(jst.norm.logpdf(td, pred, beta**-0.5))

    n, h = 10_000, 0.002
    init = {"w": jnp.zeros((n, 4)), "b": jnp.zeros(n)}
    r = fp.run(
        fp.Target(log_p, data=(jnp.asarray(X, jnp.float32), jnp.asarray(t, jnp.float32))),
        fp.Langevin(step_size=h),
        init,
        key=jax.random.key(3),
        steps=1500,
        window=250,
        progress=False,
    )
    assert r.particles["w"].shape == (n, 4) and r.particles["b"].shape == (n,)
    draws = np.column_stack([r.particles["w"], r.particles["b"]])
    C = S @ np.linalg.inv(np.eye(5) - h * S_inv / 2)
    z_mean = (draws.mean(0) - mean) / np.sqrt(np.diag(C) / n)
    assert np.all(np.abs(z_mean) < Z), z_mean
    emp = np.cov(draws.T)
    se = np.sqrt((np.outer(np.diag(C), np.diag(C)) + C**2) / n)
    assert np.all(np.abs(emp - C) < Z * se), (emp - C) / se
