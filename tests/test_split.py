"""Splitting schemes, forward-backward and proximal Langevin against closed forms and quadrature.

Monte-Carlo error: with N independent particles the standard error of a sample mean is
sd / sqrt(N), of a Gaussian sample variance v * sqrt(2 / N), of a sample proportion
sqrt(p (1 - p) / N); for a general (non-Gaussian) sample variance sqrt((m4 - v^2) / N) with m4
the fourth central moment. Tolerances are Z = 5 standard errors unless a test says
otherwise. Fixed keys throughout.
"""

from functools import partial

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest
import scipy.integrate as si
import scipy.stats as ss

import flowpost as fp
from flowpost.engine import BareMonitor
from flowpost.numerics import InnerSolver
from flowpost.numerics.prox import Box, L1Penalty
from flowpost.steppers import (
    Drift,
    ExactMap,
    Explicit,
    ForwardBackward,
    Friction,
    GaussianEntropy,
    HeatFlow,
    Kick,
    Proximal,
    ProximalLangevin,
    Split,
    SplitState,
)

Z = 5.0  # tolerance in Monte-Carlo standard errors


# ----------------------------------------------------------------------------------------
# Lie against Strang
# ----------------------------------------------------------------------------------------

M_LS, S2_LS = 1.5, 2.0  # target N(m, s2) of the Lie / Strang test


def _lie_strang_log_p(x):
    return jnp.sum(jst.norm.logpdf(x, M_LS, jnp.sqrt(S2_LS)))


def _potential_flow(x, t):
    """Exact flow of dx/dt = -(x - m)/s2 (the potential part of N(m, s2)) over time t."""
    return M_LS + jnp.exp(-t / S2_LS) * (x - M_LS)


@partial(jax.jit, static_argnames=("burn", "steps"))
def _time_averaged_second_moment(stepper, h, target, x0, key, burn, steps):
    """Average over the steps after ``burn`` of the ensemble mean of (x - m)^2 (the stepper is
    a traced argument: one compilation for every step size)."""
    state = stepper.start(target, x0, key)

    def body(carry, t):
        st, acc = carry
        st, _ = stepper.advance(target, st, jax.random.fold_in(key, t), h)
        acc = acc + jnp.where(t >= burn, jnp.mean((st.x - M_LS) ** 2), 0.0)
        return (st, acc), None

    (_, acc), _ = jax.lax.scan(body, (state, jnp.zeros((), x0.dtype)), jnp.arange(burn + steps))
    return acc / steps


def test_lie_and_strang_stationary_variance_and_order():
    r"""Lie and Strang compositions of the potential's exact flow with the exact heat flow on
    N(m, s2); a = h / s2, rho = exp(-a), xi ~ N(0, 1).

    Derivation (each composition is a Gaussian AR(1) step, whose stationary variance is
    noise variance / (1 - coefficient^2)):
      Lie    (potential h, then heat h):  x' - m = rho (x - m) + sqrt(2h) xi
             var = 2h / (1 - rho^2) = s2 * 2a / (1 - exp(-2a))   = s2 (1 + a + O(a^2));
      Strang (potential h/2, heat h, potential h/2):
             x' - m = rho^{1/2} (rho^{1/2} (x - m) + sqrt(2h) xi) = rho (x - m) + rho^{1/2} sqrt(2h) xi
             var = 2h rho / (1 - rho^2) = 2h / (e^a - e^{-a}) = s2 * a / sinh(a) = s2 (1 - a^2/6 + ...).
    So the bias is O(h) for Lie and O(h^2) for Strang ("On the construction and comparison of
    difference schemes" (1968) for the orders of the two compositions).

    Monte-Carlo error: the time average over T steps of the ensemble mean of (x - m)^2, for
    a stationary Gaussian AR(1) with coefficient rho, has variance
    (2 v^2 / (N T)) (1 + rho^2) / (1 - rho^2), since Cov((x_t - m)^2, (x_{t+k} - m)^2) = 2 v^2 rho^{2k}.
    N = 50,000 particles, T = 300 steps after a burn-in of 40 (the variance relaxes like
    rho^{2t}: at most e^{-20} left).
    """
    n, burn, steps = 50_000, 40, 300
    x0 = M_LS + np.sqrt(S2_LS) * jax.random.normal(jax.random.key(0), (n, 1))
    target, x0u = fp.Target(_lie_strang_log_p).bind(x0)
    a_values = np.array([0.25, 0.5, 1.0])
    formula = {"lie": lambda a: 2 * a / (1 - np.exp(-2 * a)), "strang": lambda a: a / np.sinh(a)}
    slopes = {}
    for order in ("lie", "strang"):
        bias, bias_se = [], []
        for a in a_values:
            h = float(a * S2_LS)
            stepper = Split((ExactMap(_potential_flow), HeatFlow()), step_size=h, order=order)
            v = float(
                _time_averaged_second_moment(
                    stepper, jnp.asarray(h, x0u.dtype), target, x0u, jax.random.key(5), burn, steps
                )
            )
            expected = S2_LS * formula[order](a)
            rho = np.exp(-a)
            se = expected * np.sqrt(2 / (n * steps) * (1 + rho**2) / (1 - rho**2))
            assert abs(v - expected) < Z * se, (order, a, v, expected, se)
            bias.append(v / S2_LS - 1)
            bias_se.append(se / S2_LS)
        bias, bias_se = np.array(bias), np.array(bias_se)
        # every bias is resolved (many standard errors from zero), so its log is well defined
        assert np.all(np.abs(bias) > Z * bias_se), (order, bias, bias_se)
        # least-squares slope of log|bias| against log h, its delta-method standard error
        # (treating the three estimates as independent; they share keys, so positively
        # correlated errors partly cancel in the slope and this overstates the error)
        lx = np.log(a_values)
        w = (lx - lx.mean()) / np.sum((lx - lx.mean()) ** 2)
        slope = float(np.sum(w * np.log(np.abs(bias))))
        slope_se = float(np.sqrt(np.sum((w * bias_se / np.abs(bias)) ** 2)))
        exact_slope = float(np.sum(w * np.log(np.abs(formula[order](a_values) - 1))))
        assert abs(slope - exact_slope) < Z * slope_se, (order, slope, exact_slope, slope_se)
        slopes[order] = slope
    # the orders: ~1 for Lie and ~2 for Strang (the formulas' own slopes over this range are
    # 1.14 and 1.93, so the stated tolerance is 0.25 around the asymptotic orders)
    assert abs(slopes["lie"] - 1.0) < 0.25, slopes
    assert abs(slopes["strang"] - 2.0) < 0.25, slopes


# ----------------------------------------------------------------------------------------
# sub-steps on named terms, state layout, errors
# ----------------------------------------------------------------------------------------

C1, T1, C2, T2 = 2.0, 0.5, -1.0, 1.5  # likelihood N(c1, t1^2), prior N(c2, t2^2)


def _named_target():
    return fp.Target(
        {
            "likelihood": lambda x: jnp.sum(jst.norm.logpdf(x, C1, T1)),
            "prior": lambda x: jnp.sum(jst.norm.logpdf(x, C2, T2)),
        }
    )


@pytest.mark.slow
def test_explicit_and_numerical_proximal_on_named_terms():
    """One Lie step, explicit on the likelihood then proximal on the prior, against the closed
    forms: the gradient step x1 = x + t (c1 - x) / t1^2, and the proximal map of the quadratic
    g(y) = (y - c2)^2 / (2 t2^2), prox_{t g}(v) = (t2^2 v + t c2) / (t2^2 + t) ("Proximal
    algorithms" (2014), sec. 6.1.1, prox of a quadratic). The numerical map comes from the
    inner optax solve with tolerance 1e-6 on the scaled objective's gradient, so the point is
    within sqrt(d) * 1e-6 of the exact one (1-strong convexity); float32 rounding dominates."""
    x0 = jax.random.normal(jax.random.key(0), (64, 3))
    target, x = _named_target().bind(x0)
    t = 0.3
    stepper = Split((Explicit("likelihood"), Proximal("prior", solver=InnerSolver(tol=1e-6))), step_size=t)
    state = stepper.start(target, x, jax.random.key(1))
    assert state.v is None and all(p.x is None for p in state.parts)  # no copy of x per part
    new, stats = jax.jit(stepper.advance)(target, state, jax.random.key(2), jnp.asarray(t))
    x = np.asarray(x, np.float64)
    x1 = x + t * (C1 - x) / T1**2
    x2 = (T2**2 * x1 + t * C2) / (T2**2 + t)
    np.testing.assert_allclose(np.asarray(new.x), x2, rtol=1e-5, atol=1e-5)
    assert set(stats) == {"grad_evals", "inner_iters", "inner_iters_max", "inner_residual", "inner_capped"}
    assert float(stats["inner_capped"]) == 0.0 and float(stats["inner_residual"]) <= 1e-6
    assert float(stats["grad_evals"]) >= 2.0  # the explicit gradient plus the inner solve's
    # a tuple of terms is their sum: the same as the whole log-density
    both = Split((Explicit(("likelihood", "prior")),), step_size=t)
    whole = Split((Explicit(),), step_size=t)
    k = jax.random.key(3)
    xa = both.advance(target, both.start(target, x0, k), k, jnp.asarray(t))[0].x
    xb = whole.advance(target, whole.start(target, x0, k), k, jnp.asarray(t))[0].x
    np.testing.assert_allclose(np.asarray(xa), np.asarray(xb), rtol=1e-6, atol=1e-6)


def test_state_layout_and_strang_schedule():
    """Position-only schemes carry no momentum (v is None); momentum schemes draw v ~ N(0, I)
    (sample variance within 5 standard errors, sqrt(2/n) for unit variance); the Strang
    schedule is A/2, B, A/2."""
    x0 = jax.random.normal(jax.random.key(0), (4000, 2))
    target, x = fp.Target(lambda u: jnp.sum(jst.norm.logpdf(u))).bind(x0)
    pos = Split((Explicit(), HeatFlow()), step_size=0.1)
    assert not pos.uses_momentum
    st = pos.start(target, x, jax.random.key(1))
    assert isinstance(st, SplitState) and st.v is None
    kin = Split((Kick(), Drift(), Friction(2.0)), step_size=0.1, order="strang")
    st = kin.start(target, x, jax.random.key(1))
    assert st.v.shape == x.shape
    assert abs(np.var(np.asarray(st.v)) - 1) < Z * np.sqrt(2 / st.v.size)
    strang = Split((Explicit(), HeatFlow()), step_size=0.1, order="strang")
    assert [(type(strang.parts[i]).__name__, f) for i, f in strang.schedule()] == [
        ("Explicit", 0.5),
        ("HeatFlow", 1.0),
        ("Explicit", 0.5),
    ]


def test_split_errors_are_clear():
    target, x = _named_target().bind(jnp.zeros((8, 2)))
    with pytest.raises(ValueError, match="terms of this target"):
        Split((Explicit("likelihod"), HeatFlow())).start(target, x, jax.random.key(0))
    with pytest.raises(ValueError, match="order"):
        Split((Explicit(),), order="symmetric")
    with pytest.raises(ValueError, match="parts"):
        Split(())
    with pytest.raises(TypeError, match="parts\\[1\\]"):
        Split((Explicit(), "heat"))
    with pytest.raises(ValueError, match="fraction"):
        HeatFlow(fraction=0.0)
    with pytest.raises(TypeError, match="term"):
        Kick(term=3)
    with pytest.raises(TypeError, match="prox"):
        Proximal(prox=1.5)
    with pytest.raises(ValueError, match="gamma"):
        Friction(gamma=-1.0)
    with pytest.raises(ValueError, match="shape"):
        s = Split((ExactMap(lambda u, t: u[:, :1]),))
        s.advance(target, s.start(target, x, jax.random.key(0)), jax.random.key(0), jnp.asarray(0.1))


# ----------------------------------------------------------------------------------------
# forward-backward
# ----------------------------------------------------------------------------------------


def test_forward_backward_exact_fixed_point_against_langevin_bias():
    """N(0, s2), s2 = 2, h = 0.5. Forward-backward with the closed-form Gaussian entropy step
    has the target as an exact fixed point ("Wasserstein proximal gradient" (NeurIPS 2020)):
    with a = h / s2 the forward step maps sd sqrt(s2) to (1 - a) sqrt(s2), and
    ((1 - a) sqrt(s2) + sqrt((1 - a)^2 s2 + 4h)) / 2 = sqrt(s2). The scheme is deterministic
    (the ensemble's own mean and covariance, 1/N convention, follow a contracting map with
    factor (1 - a)/(1 + a) = 0.6 per step), so after 100 steps the ensemble variance equals s2
    up to float32 rounding (tolerance 1e-4 relative): no Monte-Carlo error enters.
    Unadjusted Langevin at the same h has stationary variance s2 / (1 - h / (2 s2)) = 2.2857
    ("Exponential convergence of Langevin distributions and their discrete approximations"
    (Bernoulli, 1996)); checked within 5 standard errors v sqrt(2/N), N = 20,000."""
    s2, h, n = 2.0, 0.5, 20_000

    def log_p(x):
        return jnp.sum(jst.norm.logpdf(x, 0.0, jnp.sqrt(s2)))

    x0 = 1.0 + 0.5 * jax.random.normal(jax.random.key(1), (n, 1))
    fb = fp.run(log_p, ForwardBackward(step_size=h), x0, key=jax.random.key(0), steps=100, progress=False)
    u = fb.unconstrained[:, 0].astype(np.float64)
    assert abs(np.var(u) / s2 - 1) < 1e-4, np.var(u)
    assert abs(np.mean(u)) < 1e-4 * np.sqrt(s2)
    assert fb.history.last["grad_evals"] == 100.0

    la = fp.run(log_p, fp.Langevin(step_size=h), x0, key=jax.random.key(0), steps=100, progress=False)
    v = np.var(la.unconstrained[:, 0], ddof=1)
    expected = s2 / (1 - h / (2 * s2))
    se = expected * np.sqrt(2 / n)
    assert abs(v - expected) < Z * se, (v, expected)
    assert abs(v - s2) > Z * se  # Langevin's bias is real; forward-backward has none


@pytest.mark.slow
def test_forward_backward_1000d_gaussian_no_step_bias():
    """A 1000-dimensional Gaussian N(0, S), S = Q diag(lam) Q^T with Q a random orthogonal
    matrix (QR of a Gaussian matrix, numpy seed 3) and lam uniform on [1, 1.5]; N = 1200
    particles (the closed-form entropy step needs N > d), h = 0.9.

    Forward-backward: the target is an exact fixed point (the 1-D derivation applies along
    every eigen-direction of S; "Wasserstein proximal gradient" (NeurIPS 2020)); the
    deterministic covariance map contracts by at most (1 - a)/(1 + a) = 0.25 per step
    (a = h / lam >= 0.6), so after 6 steps the ensemble covariance (1/N convention) matches S:
    variance along each of 5 eigenvectors of S and the trace ratio within 2e-3 (convergence
    plus float32 rounding; no Monte-Carlo error enters).

    Unadjusted Langevin at the same h: along an eigenvector with variance lam the stationary
    variance is lam / (1 - h / (2 lam)) (1996 paper above), i.e. 1.43 to 1.82 times lam. Checked
    along the 5 eigenvectors with the largest predicted bias (standard error lam' sqrt(2/N))
    and for the trace (standard error sqrt(2 sum lam'^2 / N), Gaussian sample covariance).
    """
    d, n, h = 1000, 1200, 0.9
    rng = np.random.default_rng(3)
    q, _ = np.linalg.qr(rng.standard_normal((d, d)))
    lam = rng.uniform(1.0, 1.5, d)

    def log_p(x, data):
        rot, sd = data  # N(0, S) in the rotated coordinates Q^T x (unit Jacobian)
        return jnp.sum(jst.norm.logpdf(x @ rot, 0.0, sd))

    target = fp.Target(log_p, data=(jnp.asarray(q, jnp.float32), jnp.asarray(np.sqrt(lam), jnp.float32)))
    x0 = jax.random.normal(jax.random.key(1), (n, d))
    lam_lang = lam / (1 - h / (2 * lam))
    pick = np.argsort(lam)[:5]  # smallest variances: the largest Langevin bias

    def eigen_variances(u):
        u = u.astype(np.float64)
        proj = (u - u.mean(axis=0)) @ q[:, pick]
        centred = u - u.mean(axis=0)
        return np.mean(proj**2, axis=0), np.sum(centred**2) / len(u)

    # the monitor is not under test here; the bare one keeps this 1000-d test cheap
    fb = fp.run(
        target,
        ForwardBackward(step_size=h),
        x0,
        key=jax.random.key(0),
        steps=6,
        window=6,
        progress=False,
        monitor=BareMonitor(),
    )
    var_dir, trace = eigen_variances(fb.unconstrained)
    np.testing.assert_allclose(var_dir / lam[pick], 1.0, atol=2e-3)
    assert abs(trace / lam.sum() - 1) < 2e-3, trace / lam.sum()

    # ULA's AR(1) factor |1 - h/lam| <= 0.4 here: after 10 steps the variance is within
    # 0.4^20 ~ 1e-8 (relative) of stationary
    la = fp.run(
        target,
        fp.Langevin(step_size=h),
        x0,
        key=jax.random.key(0),
        steps=10,
        window=10,
        progress=False,
        monitor=BareMonitor(),
    )
    var_dir, trace = eigen_variances(la.unconstrained)
    se_dir = lam_lang[pick] * np.sqrt(2 / n)
    assert np.all(np.abs(var_dir - lam_lang[pick]) < Z * se_dir), (var_dir, lam_lang[pick])
    assert np.all(np.abs(var_dir - lam[pick]) > Z * se_dir)  # the bias is resolved
    se_tr = np.sqrt(2 * np.sum(lam_lang**2) / n)
    assert abs(trace - lam_lang.sum()) < Z * se_tr, (trace, lam_lang.sum(), se_tr)


def test_forward_backward_kernel_entropy_from_uniform_start():
    """The kernel-density entropy step on N(0, s2), s2 = 2, N = 200, started from a uniform
    ensemble on [-2, 2] (not Gaussian). The flow is deterministic and its fixed point is biased
    by the kernel smoothing: in whitened units the kernel adds variance b^2 with b the
    normal-reference bandwidth (4 / (3N))^(1/5) = 0.37, so the stated tolerance on var / s2 is
    b^2 = 0.13 (an order-of-magnitude bound, not a Monte-Carlo error). The shape check is
    against scipy: the Kolmogorov distance to N(0, s2) must fall below the 95% quantile of
    the distance of an iid sample of size N (scipy.stats.kstwo), which the start exceeds."""
    s2, n = 2.0, 200

    def log_p(x):
        return jnp.sum(jst.norm.logpdf(x, 0.0, jnp.sqrt(s2)))

    x0 = 4 * jax.random.uniform(jax.random.key(1), (n, 1)) - 2
    crit = ss.kstwo(n).ppf(0.95)
    ref = ss.norm(0, np.sqrt(s2)).cdf
    assert ss.kstest(np.asarray(x0[:, 0]), ref).statistic > crit
    r = fp.run(
        log_p,
        ForwardBackward(step_size=0.5, entropy="kernel"),
        x0,
        key=jax.random.key(0),
        steps=30,
        window=15,
        progress=False,
    )
    u = r.unconstrained[:, 0]
    b2 = (4 / (3 * n)) ** 0.4
    assert abs(np.var(u) / s2 - 1) < b2, np.var(u)
    assert abs(np.mean(u)) < b2 * np.sqrt(s2)
    assert ss.kstest(u, ref).statistic < crit
    last = r.history.last
    assert last["inner_capped"] == 0.0 and last["grad_evals"] == 15.0


def test_forward_backward_options_are_checked():
    target, x = fp.Target(lambda u: jnp.sum(jst.norm.logpdf(u))).bind(jnp.zeros((5, 5)))
    with pytest.raises(ValueError, match="N > d"):
        ForwardBackward(step_size=0.1).start(target, x, jax.random.key(0))
    with pytest.raises(ValueError, match="N > d"):
        Split((Explicit(), GaussianEntropy())).start(target, x, jax.random.key(0))
    with pytest.raises(ValueError, match="entropy"):
        ForwardBackward(entropy="exact")
    with pytest.raises(ValueError, match="kernel"):
        ForwardBackward(bandwidth=0.3)


# ----------------------------------------------------------------------------------------
# proximal Langevin
# ----------------------------------------------------------------------------------------

Y_OBS, SIGMA, RATE = 0.5, 1.0, 2.0  # one observation y ~ N(theta, sigma^2); Laplace(rate) prior


def _quadrature_moments(neg_log):
    """Mean, variance and P(theta > 0) of exp(-neg_log) by scipy.integrate.quad."""
    f = lambda t: np.exp(-neg_log(t))
    kw = dict(points=[0.0], limit=200)
    z = si.quad(f, -20, 20, **kw)[0]
    m = si.quad(lambda t: t * f(t), -20, 20, **kw)[0] / z
    v = si.quad(lambda t: (t - m) ** 2 * f(t), -20, 20, **kw)[0] / z
    p = si.quad(f, 0, 20, limit=200)[0] / z
    return np.array([m, v, p])


def _huber(t, lam):
    """Moreau envelope of RATE |t| with parameter lam (the Huber function): t^2 / (2 lam) for
    |t| <= lam RATE, else RATE |t| - lam RATE^2 / 2 ("Proximal algorithms" (2014), sec. 3.1)."""
    a = abs(t)
    return t * t / (2 * lam) if a <= lam * RATE else RATE * a - lam * RATE**2 / 2


@pytest.mark.slow
def test_proximal_langevin_laplace_prior_against_quadrature():
    """Posterior of theta with y = 0.5 ~ N(theta, 1) and a Laplace prior with rate 2: density
    ∝ exp(-(theta - y)^2 / 2 - 2 |theta|); mean, variance and P(theta > 0) by
    scipy.integrate.quad. Moreau-Yosida Langevin ("Efficient Bayesian computation by proximal
    MCMC: when Langevin meets Moreau" (2018)) samples exp(f - g_lam), g_lam the Moreau
    envelope of g = 2|theta| (the Huber function, closed form in the helper above); its moments,
    also by quad, are checked for three smoothing values lam = 0.8, 0.2, 0.05. Then the
    smoothing bias against the exact posterior shrinks with lam, and at lam = 0.05 the
    measured moments match the exact posterior.

    h = 0.002 (discretisation bias O(h), about h/2 = 0.001 on the variance for a unit-curvature
    Gaussian part, 1996 paper, below one standard error), 1500 steps (flow time 3, about
    11 relaxation times of a variance-0.27 posterior), N = 10,000 independent particles.
    Standard errors: mean sqrt(v / N); variance sqrt((m4 - v^2) / N) with m4 from quadrature
    of the smoothed density; P(theta > 0) sqrt(p (1 - p) / N). Z = 5."""
    n, h = 10_000, 0.002
    exact = _quadrature_moments(lambda t: (t - Y_OBS) ** 2 / (2 * SIGMA**2) + RATE * abs(t))

    def log_lik(theta):
        return jnp.sum(jst.norm.logpdf(Y_OBS, theta, SIGMA))

    x0 = 0.13 + 0.5 * jax.random.normal(jax.random.key(1), (n, 1))
    biases, ses = [], []
    for lam in (0.8, 0.2, 0.05):
        neg = lambda t, lam=lam: (t - Y_OBS) ** 2 / (2 * SIGMA**2) + _huber(t, lam)
        smooth = _quadrature_moments(neg)
        f = lambda t, neg=neg: np.exp(-neg(t))
        z = si.quad(f, -20, 20, points=[0.0], limit=200)[0]
        m4 = si.quad(lambda t: (t - smooth[0]) ** 4 * f(t), -20, 20, points=[0.0], limit=200)[0] / z
        se = np.array(
            [np.sqrt(smooth[1] / n), np.sqrt((m4 - smooth[1] ** 2) / n), np.sqrt(smooth[2] * (1 - smooth[2]) / n)]
        )
        r = fp.run(
            log_lik,
            ProximalLangevin(step_size=h, prox=L1Penalty(RATE), smoothing=lam),
            x0,
            key=jax.random.key(0),
            steps=1500,
            window=500,
            progress=False,
        )
        u = r.unconstrained[:, 0].astype(np.float64)
        measured = np.array([u.mean(), u.var(ddof=1), np.mean(u > 0)])
        assert np.all(np.abs(measured - smooth) < Z * se), (lam, measured, smooth, se)
        biases.append(measured - exact)
        ses.append(se)
    biases, ses = np.abs(np.array(biases)), np.array(ses)
    # at the largest lam the smoothing bias is resolved in every statistic ...
    assert np.all(biases[0] > Z * ses[0]), biases[0] / ses[0]
    # ... it shrinks with lam (same keys for the three runs, so the noise is common) ...
    assert np.all(biases[0] > biases[1]) and np.all(biases[1] > biases[2]), biases
    # ... and at lam = 0.05 the exact posterior is matched
    assert np.all(biases[2] < Z * ses[2]), biases[2] / ses[2]


def test_box_constraint_by_projection_against_truncnorm():
    r"""Gaussian likelihood N(0.3, 0.3^2) restricted to [0, 1] by the projection onto the box
    (forward-prox-noise proximal Langevin with flowpost.prox.Box; projected Langevin, "Finite-
    time analysis of projected Langevin Monte Carlo" (NeurIPS 2015)). Reference: mean and
    variance of scipy.stats.truncnorm.

    The projection keeps every particle in [0, 1] but leaves a boundary layer: a Gaussian
    random walk with steps of sd sqrt(2h) that is projected at a wall stacks excess mass
    ≈ p(b) * 0.58 * sqrt(2h) within O(sqrt(h)) of the wall (the expected ladder-height
    overshoot constant -zeta(1/2)/sqrt(2 pi) = 0.58, "Corrected diffusion approximations in
    certain random walk problems" (1979); from memory), so the moments carry a bias
    c sqrt(h) + O(h). Two step sizes h and h/4 and the extrapolation 2 m(h/4) - m(h) remove
    the sqrt(h) term and leave O(h). Checks: (1) the mean's bias at h is resolved (> 5
    standard errors) and at least 1.5 times that at h/4 (2 for a pure sqrt(h) law); (2) the
    extrapolated mean and variance match truncnorm within Z = 5 standard errors, the two runs
    using independent keys and particles so that the extrapolation's standard error is
    sqrt(4 + 1) times a single run's (mean sd / sqrt(N), variance sqrt((m4 - v^2) / N) with m4
    from scipy). N = 20,000, h = 4e-3 and 1e-3, flow time 1.5 (17 relaxation times of a
    variance-0.09 likelihood)."""
    mu, sd, n = 0.3, 0.3, 20_000
    tn = ss.truncnorm((0 - mu) / sd, (1 - mu) / sd, loc=mu, scale=sd)
    ref = np.array([tn.mean(), tn.var()])
    m4 = tn.expect(lambda t: (t - ref[0]) ** 4)
    se1 = np.array([np.sqrt(ref[1] / n), np.sqrt((m4 - ref[1] ** 2) / n)])

    def log_lik(x):
        return jnp.sum(jst.norm.logpdf(x, mu, sd))

    measured = []
    for i, h in enumerate((4e-3, 1e-3)):
        x0 = jax.random.uniform(jax.random.key(10 + i), (n, 1))
        r = fp.run(
            log_lik,
            ProximalLangevin(step_size=h, prox=Box(0.0, 1.0), variant="forward_prox"),
            x0,
            key=jax.random.key(20 + i),
            steps=round(1.5 / h),
            window=500,
            progress=False,
        )
        u = r.unconstrained[:, 0].astype(np.float64)
        assert u.min() >= 0.0 and u.max() <= 1.0
        measured.append(np.array([u.mean(), u.var(ddof=1)]))
    coarse, fine = measured
    assert abs(coarse[0] - ref[0]) > Z * se1[0], (coarse - ref) / se1
    assert abs(coarse[0] - ref[0]) > 1.5 * abs(fine[0] - ref[0]), (coarse - ref, fine - ref)
    extrapolated = 2 * fine - coarse
    assert np.all(np.abs(extrapolated - ref) < Z * np.sqrt(5) * se1), (extrapolated - ref) / se1


@pytest.mark.slow
def test_proximal_langevin_user_map_and_options():
    """A user's soft-threshold map (the closed form of the L1 proximal map, "Proximal
    algorithms" (2014), sec. 6.5.2) gives the same chain as the built-in L1Penalty, for both
    variants; bad options raise clear errors."""

    def soft(v, h):
        return jnp.sign(v) * jnp.maximum(jnp.abs(v) - 2.0 * h, 0.0)

    def log_lik(x):
        return jnp.sum(jst.norm.logpdf(x, 0.5, 1.0))

    x0 = jax.random.normal(jax.random.key(0), (200, 3))
    for variant in ("moreau", "forward_prox"):
        a = fp.run(
            log_lik,
            ProximalLangevin(0.01, prox=soft, variant=variant),
            x0,
            key=jax.random.key(1),
            steps=20,
            progress=False,
        )
        b = fp.run(
            log_lik,
            ProximalLangevin(0.01, prox=L1Penalty(2.0), variant=variant),
            x0,
            key=jax.random.key(1),
            steps=20,
            progress=False,
        )
        np.testing.assert_allclose(a.unconstrained, b.unconstrained, rtol=1e-6, atol=1e-6)
    # smoothing = step_size turns the Moreau update into prox_{hg}(x) + h grad f(x) + noise
    assert ProximalLangevin(0.01, prox=L1Penalty(1.0)).lam == 0.01
    with pytest.raises(ValueError, match="prox"):
        ProximalLangevin(0.01)
    with pytest.raises(TypeError, match="prox"):
        ProximalLangevin(0.01, prox="l1")
    with pytest.raises(ValueError, match="variant"):
        ProximalLangevin(0.01, prox=L1Penalty(1.0), variant="mala")
    with pytest.raises(ValueError, match="smoothing"):
        ProximalLangevin(0.01, prox=L1Penalty(1.0), smoothing=-1.0)
    with pytest.raises(ValueError, match="smoothing"):
        ProximalLangevin(0.01, prox=L1Penalty(1.0), smoothing=0.1, variant="forward_prox")
