"""MALA against closed forms.

Monte-Carlo error: the particles are independent chains, so after burn-in the end state is N
independent draws. The standard error of a sample mean is sd / sqrt(N), that of a Gaussian
sample variance v * sqrt(2 / N), and that of a Gaussian sample covariance entry
sqrt((C_ii C_jj + C_ij^2) / N) (second moments of a Gaussian sample covariance). Tolerances are Z = 4.5 standard
errors (two-sided false-alarm rate below 1e-5 per comparison, fixed keys).
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost import MALA

Z = 4.5  # tolerance in Monte-Carlo standard errors


def _normal(s2):
    def log_p(x):
        return jnp.sum(jst.norm.logpdf(x, 0.0, jnp.sqrt(s2)))

    return log_p


@pytest.mark.slow
def test_mala_removes_langevin_step_bias():
    """On N(0, s2) with s2 = 1 and h = 0.5 the unadjusted chain x' = (1 - h/s2) x + sqrt(2h) xi
    has stationary variance s2 / (1 - h / (2 s2)) = 4/3, while the Metropolis-adjusted chain
    leaves N(0, s2) invariant for every h: "Exponential convergence of Langevin distributions
    and their discrete approximations" (Bernoulli, 1996). N = 50,000 independent particles from
    a start far from the target (mean 3, sd 0.5), 200 steps of burn-in (the chains contract by
    about 0.5 per step)."""
    s2, h, n = 1.0, 0.5, 50_000
    x0 = 3.0 + 0.5 * jax.random.normal(jax.random.key(1), (n, 1))
    r_mala = fp.run(_normal(s2), MALA(step_size=h), x0, key=jax.random.key(2), steps=200, progress=False)
    r_ula = fp.run(_normal(s2), fp.Langevin(step_size=h), x0, key=jax.random.key(3), steps=200, progress=False)

    v_mala = np.var(r_mala.unconstrained[:, 0], ddof=1)
    assert abs(v_mala - s2) < Z * s2 * np.sqrt(2 / n), v_mala
    assert abs(np.mean(r_mala.unconstrained[:, 0])) < Z * np.sqrt(s2 / n)

    v_ula = np.var(r_ula.unconstrained[:, 0], ddof=1)
    biased = s2 / (1 - h / (2 * s2))
    assert abs(v_ula - biased) < Z * biased * np.sqrt(2 / n), v_ula
    # the two differ by far more than the error bands: the check can tell them apart
    assert abs(v_ula - v_mala) > 4 * Z * biased * np.sqrt(2 / n)

    # one value-and-gradient evaluation per particle per step; acceptance is a probability
    last = r_mala.history.last
    assert last["grad_evals"] == pytest.approx(100.0)  # summed over a window of 100 steps
    assert 0.5 < last["accept"] <= 1.0


def test_mala_bayesian_linear_regression_with_tuning():
    """Bayesian linear regression with prior w ~ N(0, alpha^-1 I) and noise precision beta has
    the Gaussian posterior N(m_N, S_N), S_N^-1 = alpha I + beta Phi^T Phi,
    m_N = beta S_N Phi^T y ("Pattern Recognition and Machine Learning" (2006), sec. 3.3),
    computed here with numpy. MALA starts from the prior at a step size 4x too small and tunes
    it during the first 100 steps towards the acceptance 0.574 ("Optimal scaling of discrete
    approximations to Langevin diffusions" (1998)); after 200 more steps the end state of
    N = 4,000 independent chains is compared with m_N and S_N."""
    rng = np.random.default_rng(0)
    n_obs, d, alpha, beta = 20, 3, 1.0, 4.0
    u = np.linspace(-1.0, 1.0, n_obs)
    phi = np.column_stack([np.ones(n_obs), u, 1.5 * (u**2 - np.mean(u**2))])
    y = phi @ np.array([0.5, -1.0, 1.0]) + rng.normal(0.0, 1.0 / np.sqrt(beta), n_obs)
    s_n = np.linalg.inv(alpha * np.eye(d) + beta * phi.T @ phi)
    m_n = beta * s_n @ phi.T @ y

    def log_p(w, data):
        prior = jnp.sum(jst.norm.logpdf(w, 0.0, 1.0 / np.sqrt(alpha)))
        return prior + jnp.sum(jst.norm.logpdf(data["y"], data["phi"] @ w, 1.0 / np.sqrt(beta)))

    data = {"phi": jnp.asarray(phi, jnp.float32), "y": jnp.asarray(y, jnp.float32)}
    n = 4000
    x0 = jax.random.normal(jax.random.key(1), (n, d))
    stepper = MALA(step_size=5e-3, tune_steps=100)
    r = fp.run(fp.Target(log_p, data=data), stepper, x0, key=jax.random.key(3), steps=300, progress=False)
    x = r.unconstrained

    se_mean = np.sqrt(np.diag(s_n) / n)
    assert np.all(np.abs(x.mean(axis=0) - m_n) < Z * se_mean), (x.mean(axis=0) - m_n) / se_mean
    cov = np.cov(x.T)
    se_cov = np.sqrt((np.outer(np.diag(s_n), np.diag(s_n)) + s_n**2) / n)
    assert np.all(np.abs(cov - s_n) < Z * se_cov), (cov - s_n) / se_cov

    # the tuned step is reported, differs from the initial one, and is the one in use after tuning
    tuned = r.report["tuned_step_size"]
    assert np.isfinite(tuned) and tuned > 2 * stepper.step_size
    assert r.history[-1]["step_size"] == pytest.approx(tuned, rel=1e-5)
    # after tuning the mean acceptance sits at the target; N = 4,000 particles x 100 steps make
    # the window mean's noise about 0.003, the remaining tuning error is well below 0.03
    assert abs(r.history[-1]["accept"] - 0.574) < 0.03


def test_mala_rejects_non_finite_proposals():
    """A proposal outside the density's support (log-density -inf) is always rejected, so
    particles stay inside: a half-normal on x > 0 written with an explicit -inf outside."""

    def log_p(x):
        return jnp.where(x[0] > 0, jst.norm.logpdf(x[0]), -jnp.inf)

    x0 = jnp.full((2000, 1), 0.5)
    r = fp.run(log_p, MALA(step_size=1.0), x0, key=jax.random.key(4), steps=100, progress=False)
    assert r.status == "done"
    assert np.all(r.unconstrained > 0)
    # half-normal mean sqrt(2/pi) (closed form); sd of a half-normal is sqrt(1 - 2/pi)
    se = np.sqrt((1 - 2 / np.pi) / 2000)
    assert abs(r.unconstrained.mean() - np.sqrt(2 / np.pi)) < Z * se


def test_mala_tuning_is_the_acceptance_target_controller():
    """With tune_steps > 0 the step is tuned by the run's default controller,
    AcceptanceTarget (the recursion of the module docstring, "Optimal scaling of discrete
    approximations to Langevin diffusions" (1998) for the target 0.574), which reports the tuned
    step; without tuning the default controller is the constant step. On N(0, I) in d = 10 from
    a step 100x too small: 300 tuning steps, then 200 frozen ones. The last window's mean
    acceptance (N = 2,000 particles x 100 steps: noise about 0.002) sits near the target; the
    tolerance 0.03 covers the remaining tuning error, as in the regression test above."""
    stepper = MALA(step_size=1e-3, tune_steps=300)
    ctrl = stepper.default_controller()
    assert isinstance(ctrl, fp.AcceptanceTarget)
    assert (ctrl.h, ctrl.accept, ctrl.adapt_steps, ctrl.gain) == (1e-3, 0.574, 300, 1.0)
    assert isinstance(MALA(step_size=0.2).default_controller(), fp.Constant)

    x0 = jax.random.normal(jax.random.key(5), (2000, 10))
    r = fp.run(_normal(1.0), stepper, x0, key=jax.random.key(6), steps=500, window=100, progress=False)
    assert r.status == "done", r.reason
    tuned = r.report["tuned_step_size"]
    assert np.isfinite(tuned) and tuned > 10 * stepper.step_size
    assert r.history[-1]["step_size"] == pytest.approx(tuned, rel=1e-5)
    assert abs(r.history[-1]["accept"] - 0.574) < 0.03

    # the stepper itself carries no tuning state: its step is the argument h
    target, x = fp.Target(_normal(1.0)).bind(x0[:8])
    state = stepper.start(target, x, jax.random.key(0))
    assert set(state._fields) == {"x", "logp", "score"}
    _, stats = jax.jit(lambda s, st, h: s.advance(target, st, jax.random.key(1), h))(stepper, state, jnp.asarray(0.5))
    assert set(stats) == set(MALA.reductions) == {"accept", "grad_evals"}
    assert MALA.reductions == {"accept": "mean", "grad_evals": "sum"} and MALA.stochastic is True


def test_mala_bad_arguments():
    with pytest.raises(ValueError, match="step_size"):
        MALA(step_size=0.0)
    with pytest.raises(ValueError, match="tune_steps"):
        MALA(step_size=0.1, tune_steps=-1)
    with pytest.raises(ValueError, match="target_accept"):
        MALA(step_size=0.1, target_accept=1.5)
    # no inf / nan, no silent coercion; every message names the argument
    with pytest.raises(ValueError, match="tune_gain: expected"):
        MALA(tune_gain=float("inf"))
    with pytest.raises(ValueError, match="tune_gain: expected"):
        MALA(tune_gain=float("nan"))
    with pytest.raises(ValueError, match="target_accept: expected"):
        MALA(target_accept=float("nan"))
    with pytest.raises(ValueError, match="step_size: expected"):
        MALA(step_size=float("inf"))
    for bad in (10.0, "ten", True):
        with pytest.raises(TypeError, match="tune_steps: expected an integer"):
            MALA(tune_steps=bad)
    m = MALA(step_size=np.float32(0.25), tune_steps=np.int64(5))
    assert type(m.step_size) is float and type(m.tune_steps) is int
