"""Implicit steppers (proximal Langevin, particle JKO) against closed forms.

Monte-Carlo error: with N independent particles the standard error of a Gaussian sample variance
v is v * sqrt(2 / N). Tolerances are Z = 5 of these standard errors (as in test_langevin.py)
unless a test says otherwise. The JKO stepper is deterministic: its checks use a quantile
(non-random) starting ensemble or a stated kernel-density bias instead of a Monte-Carlo error.

All Gaussian targets share one module-level log-density with the mean and standard deviation as
data, so the compiled window of a stepper is reused across tests (the data are pytree leaves).
"""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.stats import norm as sp_norm

import flowpost as fp
from flowpost.numerics import InnerSolver
from flowpost.steppers import JKO, ImplicitLangevin, default_solver

Z = 5.0  # tolerance in Monte-Carlo standard errors

# One configuration per stepper, shared by the tests that run it (one compilation each).
IL = ImplicitLangevin(step_size=0.1)
IL_N, IL_STEPS, IL_WINDOW = 10_000, 60, 30


def gauss_log_p(x, data):
    mean, sd = data
    return jnp.sum(jst.norm.logpdf(x, mean, sd))


def gauss(mean, sd, dtype=jnp.float32):
    data = (jnp.asarray(mean, dtype), jnp.asarray(sd, dtype))
    return fp.Target(gauss_log_p, data=data)


def ar1_variance(h, s2):
    """Stationary variance of x' = x / (1 + h/s2) + sqrt(2h) xi: v = v / (1 + h/s2)^2 + 2h."""
    return 2 * h / (1 - (1 + h / s2) ** -2)


def run_il(target, stepper=IL, key=3):
    x0 = jax.random.normal(jax.random.key(1), (IL_N, 2))
    return fp.run(target, stepper, x0, key=jax.random.key(key), steps=IL_STEPS, window=IL_WINDOW, progress=False)


# --------------------------------------------------------------------------------------------
# ImplicitLangevin
# --------------------------------------------------------------------------------------------


def test_implicit_langevin_ar1_variance_small_and_large_step():
    """On N(0, s2) the proximal map of the quadratic U(y) = y^2 / (2 s2) is
    argmin_y y^2/(2 s2) + (y - x)^2/(2h) = x / (1 + h/s2) (set the derivative to zero), so the
    chain is the Gaussian AR(1) x' = x / (1 + h/s2) + sqrt(2h) xi with stationary variance
    v = 2h / (1 - (1 + h/s2)^-2) (v = v/(1+h/s2)^2 + 2h). Source of the scheme: "Proximal Markov
    chain Monte Carlo algorithms" (Statistics and Computing, 2016); the variance is the textbook
    AR(1) stationary variance. A product target N(0, diag(1, 0.01)) with h = 0.1 has a small
    step (h = 0.1 s2) in the first coordinate and a large one (h = 10 s2) in the second; the
    proximal map of a separable function is separable, so each coordinate is its own chain.
    N = 10,000 independent particles from N(0, I), 60 steps (the slower chain contracts by 1/1.1
    per step: the initial variance deviation of 0.15 decays to 0.15 * 1.1^-120 < 1e-5)."""
    s2 = np.array([1.0, 0.01])
    h = IL.step_size
    r = run_il(gauss([0.0, 0.0], np.sqrt(s2)))
    assert r.status == "done", r.reason
    v = np.var(r.unconstrained, axis=0, ddof=1)
    expected = ar1_variance(h, s2)
    se = expected * np.sqrt(2 / IL_N)
    assert np.all(np.abs(v - expected) < Z * se), (v, expected, se)
    # the large step's bias is real: the target's own variance is far outside the band
    assert abs(v[1] - s2[1]) > Z * se[1]
    last = r.history.last
    assert last["inner_capped"] == 0 and r.report["inner_capped_total"] == 0
    assert last["inner_residual"] <= default_solver(jnp.float32).tol
    assert last["grad_evals"] >= IL_WINDOW  # at least one score evaluation per step


def closed_form_prox_unit_variance(u, h):
    """Proximal map of y^2/2 (target N(0, 1)): u / (1 + h)."""
    return u / (1.0 + h)


def test_implicit_langevin_closed_form_prox():
    """A user-supplied proximal map replaces the inner solve: on N(0, 1) the chain is the same
    AR(1) process as above (variance 2h / (1 - (1+h)^-2)) and no score is evaluated."""
    st = ImplicitLangevin(step_size=0.5, prox=closed_form_prox_unit_variance)
    r = run_il(gauss([0.0, 0.0], [1.0, 1.0]), stepper=st)
    v = np.var(r.unconstrained, axis=0, ddof=1)
    expected = ar1_variance(0.5, 1.0)
    se = expected * np.sqrt(2 / IL_N)
    assert np.all(np.abs(v - expected) < Z * se), (v, expected, se)
    assert r.history.last["grad_evals"] == 0


# --------------------------------------------------------------------------------------------
# JKO on a 1-D Gaussian: mean exactly, standard deviation up to the kernel-density bias
# --------------------------------------------------------------------------------------------


def jko_gaussian_std(s_k, s2, h, k=0.0):
    """One JKO step of N(m, s2) restricted to Gaussians N(m', s^2), from N(m_k, s_k^2).

    KL(N(m', s^2) | N(m, s2)) = (s^2 + (m' - m)^2) / (2 s2) - log s + const and, in 1-D,
    W2^2 = (m' - m_k)^2 + (s - s_k)^2, so the s-part of the objective is
    s^2/(2 s2) - log s + (s - s_k)^2/(2h); its derivative s/s2 - 1/s + (s - s_k)/h = 0, times s,
    gives s^2 (1/s2 + 1/h) - s s_k / h - 1 = 0, whose positive root is returned for k = 0
    (exact JKO step: "The variational formulation of the Fokker-Planck equation" (1998)).

    k > 0: the same restriction with the particle scheme's entropy E_mu[log(mu * N(0, k))]
    (kernel density of variance k in the mean-field limit) in place of E_mu[log mu]; for
    mu = N(m', s^2) it equals -log(2 pi (s^2 + k))/2 - s^2 / (2 (s^2 + k)), and the
    stationarity condition s/s2 - s/(s^2+k) - s k/(s^2+k)^2 + (s - s_k)/h = 0 is solved with
    scipy's brentq (this test's own derivation).
    """
    if k == 0.0:
        a = 1 / s2 + 1 / h
        return (s_k / h + np.sqrt((s_k / h) ** 2 + 4 * a)) / (2 * a)

    def g(s):
        return s / s2 - s / (s * s + k) - s * k / (s * s + k) ** 2 + (s - s_k) / h

    return brentq(g, 1e-3, 10 * s_k)


JKO_1D = JKO(step_size=0.2, solver=InnerSolver(tol=1e-8, max_iters=200))


@pytest.mark.slow
def test_jko_gaussian_mean_exact_and_std_converges_with_n():
    """One particle JKO step on N(m, s2), m = 1, s2 = 0.5, h = 0.2, from the quantile ensemble
    x_i = 3 + 1.5 Phi^-1((i - 1/2)/N) (scipy's normal quantiles; a Gaussian ensemble without
    sampling noise).

    Mean: the kernel term sum_j log mu_hat_Y(y_j) is invariant under a common shift of all
    y_i, so its gradients sum to zero. The gradient of the scaled objective
    sum_i [h (y_i - m)^2/(2 s2) + |y_i - x_i|^2/2] + h (kernel term) in y_i is
    g_i = h (y_i - m)/s2 + (y_i - x_i) + h (kernel gradient)_i; averaging over i,
    (1 + h/s2) (mean(Y) - m) = (mean(X) - m) + mean_i g_i, i.e. the exact JKO mean step
    m_{k+1} - m = (m_k - m)/(1 + h/s2) up to |mean_i g_i| / (1 + h/s2). The solver stops at
    max-abs gradient <= tol in the preconditioned variables u (y = x + a u,
    a = (1 + h (1 + 1/b^2)/var(X))^-1/2, the documented preconditioner; the gradient in u is
    a g_i), so |g_i| <= tol / a. Run in float64 (tol = 1e-8); add 1e-12 for rounding.

    Std: the exact Gaussian JKO step (derived in jko_gaussian_std) is approached as N grows. The
    particle step carries the kernel-density bias: at N = 100, 400, 1600 the mean-field
    prediction (jko_gaussian_std with k = b^2 var(X), b = (4/(3N))^(1/5) the normal-reference
    bandwidth in whitened units, "Density estimation for statistics and data analysis" (1986),
    quoted from memory) differs from the exact step by about 5e-3, 2e-3, 8e-4. Tolerance:
    1.5 times that predicted bias plus the inner tolerance, so it shrinks with N; the measured
    error must also shrink.
    """
    m, s2, h = 1.0, 0.5, JKO_1D.step_size
    errors = []
    for n in (100, 400, 1600):
        x0 = (3.0 + 1.5 * sp_norm.ppf((np.arange(n) + 0.5) / n))[:, None]
        with jax.enable_x64(True):
            target = gauss([m], [np.sqrt(s2)], jnp.float64)
            r = fp.run(
                target, JKO_1D, jnp.asarray(x0, jnp.float64), key=jax.random.key(0), steps=1, window=1, progress=False
            )
        assert r.status == "done", r.reason
        assert r.unconstrained.dtype == np.float64
        y = r.unconstrained[:, 0]
        x = x0[:, 0]
        b = (4.0 / (3.0 * n)) ** 0.2
        var_x = np.var(x, ddof=1)
        a = (1 + h * (1 + 1 / b**2) / var_x) ** -0.5
        tol = JKO_1D.solver.tol
        assert r.history.last["inner_capped"] == 0
        mean_expected = m + (x.mean() - m) / (1 + h / s2)
        assert abs(y.mean() - mean_expected) <= tol / a / (1 + h / s2) + 1e-12, (n, y.mean(), mean_expected)

        s_k = np.std(x)
        s_exact = jko_gaussian_std(s_k, s2, h)
        s_meanfield = jko_gaussian_std(s_k, s2, h, k=b * b * var_x)
        err = abs(np.std(y) - s_exact)
        allowed = 1.5 * abs(s_meanfield - s_exact) + tol
        assert err <= allowed, (n, np.std(y), s_exact, s_meanfield)
        errors.append(err)
    assert errors[0] > errors[1] > errors[2], errors


# --------------------------------------------------------------------------------------------
# Stiffness: curvatures 10^4 and 1
# --------------------------------------------------------------------------------------------

STIFF_SD = np.array([0.01, 1.0])  # -log pi has curvatures 1e4 and 1


def test_stiff_explicit_langevin_blows_up_and_returns_last_good_ensemble():
    """Explicit Langevin is unstable once h > 2/L ("Exponential convergence of Langevin
    distributions and their discrete approximations" (1996)): with L = 1e4 and h = 1e-3 the
    stiff coordinate is multiplied by |1 - hL| = 9 per step and overflows. The driver rolls back
    and returns the last good (finite) ensemble with the reason."""
    x0 = jax.random.normal(jax.random.key(1), (1000, 2)) * jnp.asarray(STIFF_SD)
    r = fp.run(
        gauss([0.0, 0.0], STIFF_SD),
        fp.Langevin(step_size=1e-3),
        x0,
        key=jax.random.key(0),
        steps=200,
        window=50,
        progress=False,
    )
    assert r.status == "blow-up"
    assert "non-finite" in r.reason or "growth" in r.reason, r.reason
    assert np.all(np.isfinite(r.unconstrained))


def test_stiff_implicit_langevin_stays_finite_with_ar1_variances():
    """ImplicitLangevin at h = 0.1 (= 1000 times the stiff variance) stays finite and each
    coordinate's variance is its AR(1) value 2h / (1 - (1 + h/s2)^-2) (derivation in the first
    test): about 0.2 in the stiff direction (one step of noise; the target's 1e-4 is not
    reached: the scheme is stable, not unbiased) and 1.152 in the soft one. Z = 5 standard
    errors, N = 10,000."""
    r = run_il(gauss([0.0, 0.0], STIFF_SD))
    assert r.status == "done", r.reason
    assert np.all(np.isfinite(r.unconstrained))
    v = np.var(r.unconstrained, axis=0, ddof=1)
    expected = ar1_variance(IL.step_size, STIFF_SD**2)
    se = expected * np.sqrt(2 / IL_N)
    assert np.all(np.abs(v - expected) < Z * se), (v, expected, se)


def test_stiff_jko_stays_finite_and_reaches_target_variances():
    """JKO at h = 0.1 stays finite and its per-direction variances approach the target's own
    (1e-4, 1): the target is a fixed point of the exact JKO step ("The variational formulation
    of the Fokker-Planck equation" (1998)). The particle scheme's fixed point is lower by the
    kernel-density bias stated in flowpost.steppers.jko (derived there): the mean-field deficit
    b^4/(1 + b^2)^2 plus the own-kernel share ((1 + b^2)/b^2)^(d/2)/N, with
    b = (4/((d + 2) N))^(1/(d + 4)) = N^(-1/6) in d = 2 (4.3 % in all at N = 300). The start
    (spreads 5 and 2 times the target's) is forgotten geometrically: the soft direction's
    Gaussian JKO step (jko_gaussian_std) contracts deviations by about 0.83 per step near the
    target, so after 40 steps an initial variance excess of 3 leaves 3 * 0.833^40 < 3e-3,
    allowed above 1."""
    n, steps = 300, 40
    x0 = jax.random.normal(jax.random.key(3), (n, 2)) * jnp.asarray(STIFF_SD * [5.0, 2.0])
    r = fp.run(
        gauss([0.0, 0.0], STIFF_SD),
        JKO(step_size=0.1),
        x0,
        key=jax.random.key(0),
        steps=steps,
        window=10,
        progress=False,
    )
    assert r.status == "done", r.reason
    assert np.all(np.isfinite(r.unconstrained))
    ratio = np.var(r.unconstrained.astype(np.float64), axis=0, ddof=1) / STIFF_SD**2
    b2 = n ** (-1.0 / 3.0)
    deficit = b2 * b2 / (1 + b2) ** 2 + ((1 + b2) / b2) / n
    relax = 3 * 0.8334**steps
    assert np.all(ratio > 1 - deficit) and np.all(ratio < 1 + relax), (ratio, deficit, relax)


# --------------------------------------------------------------------------------------------
# A capped inner solve is never silent
# --------------------------------------------------------------------------------------------


def test_capped_inner_solves_are_reported():
    """max_iters=1 with tol=1e-12 cannot converge on a stiff 2-D Gaussian: every particle's
    solve (ImplicitLangevin) and every ensemble solve (JKO) is capped, and the counts reach the
    per-window stats of the history and the stepper's running total in the report."""
    capped = InnerSolver(tol=1e-12, max_iters=1)
    target = gauss([0.0, 0.0], STIFF_SD)
    n, steps = 64, 10
    x0 = jax.random.normal(jax.random.key(1), (n, 2)) * jnp.asarray(STIFF_SD)
    r = fp.run(
        target,
        ImplicitLangevin(step_size=0.1, solver=capped),
        x0,
        key=jax.random.key(0),
        steps=steps,
        window=steps,
        progress=False,
    )
    assert r.history.last["inner_capped"] == n * steps
    assert r.report["inner_capped_total"] == n * steps
    assert r.history.last["inner_iters"] == 1.0
    assert r.history.last["inner_residual"] > 1e-12

    r = fp.run(
        target, JKO(step_size=0.1, solver=capped), x0, key=jax.random.key(0), steps=steps, window=steps, progress=False
    )
    assert r.history.last["inner_capped"] == steps
    assert r.report["inner_capped_total"] == steps


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------


def test_bad_configuration_errors():
    with pytest.raises(ValueError, match="step_size"):
        ImplicitLangevin(step_size=-1.0)
    with pytest.raises(ValueError, match="step_size"):
        JKO(step_size=float("nan"))
    with pytest.raises(TypeError, match="solver"):
        ImplicitLangevin(solver="lbfgs")
    with pytest.raises(TypeError, match="prox"):
        ImplicitLangevin(prox=3.0)
    with pytest.raises(ValueError, match="bandwidth"):
        JKO(bandwidth=0.0)
    with pytest.raises(ValueError, match="block"):
        JKO(block=0)
    with pytest.raises(ValueError, match="more particles than dimensions"):
        fp.run(gauss([0.0], [1.0]), JKO(), jnp.zeros((1, 1)), key=jax.random.key(0), steps=1, progress=False)
    # configurations are hashable (static arguments of the compiled step)
    assert hash(JKO()) == hash(JKO()) and hash(IL) == hash(ImplicitLangevin(step_size=0.1))
