"""Big data: the minibatch score, control variates, SG-Langevin and data on disk.

Monte-Carlo error: a mean of K independent draws has standard error sd / sqrt(K); a Gaussian
sample variance from N independent values has standard error v sqrt(2 / N). Tolerances are 5
of these standard errors unless a test says otherwise (``Z``).

References are computed here with numpy from the closed forms named beside each check, never
with flowpost's own estimator.
"""

from __future__ import annotations

import os

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp

pytestmark = pytest.mark.slow  # every test here runs for several seconds (scheduled first)

Z = 5.0  # tolerance in Monte-Carlo standard errors


# ----- a small logistic regression (scikit-learn's make_classification, fixed seed) ----------


def _classification(n, p, seed):
    from sklearn.datasets import make_classification

    x, y = make_classification(
        n_samples=n, n_features=p, n_informative=p, n_redundant=0, n_repeated=0, random_state=seed
    )
    return np.column_stack([x, y]).astype(np.float64)


def _logistic_item(theta, row):
    """One row ``[x_1..x_p, y]``: the Bernoulli log-likelihood with logit ``x . w``."""
    z = jnp.dot(row[:-1], theta["w"])
    return row[-1] * z - jnp.logaddexp(0.0, z)


def _prior(theta):
    return jnp.sum(jst.norm.logpdf(theta["w"], 0.0, 5.0))


def _numpy_score(rows, w):
    """The full-data score of the logistic posterior above, by its closed form
    ``X^T (y - sigmoid(X w)) - w / 25`` ("Pattern Recognition and Machine Learning" (2006),
    eq. 4.91), in numpy."""
    x, y = rows[:, :-1], rows[:, -1]
    return x.T @ (y - 1.0 / (1.0 + np.exp(-(x @ w)))) - w / 25.0


def _numpy_mode(rows):
    """The posterior mode by Newton's method in numpy (IRLS; PRML (2006), sec. 4.3.3)."""
    x, y = rows[:, :-1], rows[:, -1]
    w = np.zeros(x.shape[1])
    for _ in range(50):
        mu = 1.0 / (1.0 + np.exp(-(x @ w)))
        hess = x.T @ (x * (mu * (1 - mu))[:, None]) + np.eye(x.shape[1]) / 25.0
        w = w + np.linalg.solve(hess, x.T @ (y - mu) - w / 25.0)
    mu = 1.0 / (1.0 + np.exp(-(x @ w)))
    hess = x.T @ (x * (mu * (1 - mu))[:, None]) + np.eye(x.shape[1]) / 25.0
    return w, np.linalg.inv(hess)


def test_minibatch_score_is_unbiased_and_control_variates_cut_its_variance():
    """E over batches of the n/b-scaled minibatch score equals the full score (closed form in
    numpy above), with and without control variates; around the mode, the control variates
    cut the per-coordinate variance by at least 20x (the ratio is of order n |u - u_hat|^2 /
    sd-scale, about 100 here; 20 leaves room for the estimate of the ratio itself, whose
    relative error from K=4000 batches is about 2 sqrt(2/K) = 4%)."""
    with jax.enable_x64(True):
        rows = _classification(4000, 3, seed=3)
        mode, cov = _numpy_mode(rows)
        sd = np.sqrt(np.diag(cov))
        # three points: one posterior sd and two sds from the mode (where a run spends its time)
        w = np.stack([mode + sd, mode - sd * np.array([1.0, -1.0, 1.0]), mode + 2 * sd])
        target = fp.ItemSum(_logistic_item, jnp.asarray(rows), log_prior=_prior, batch=50)
        bound, x = target.bind({"w": jnp.asarray(w)})
        anchored = target.anchor({"w": jnp.zeros(3)})
        # the inner solver's mode is Newton's to a thousandth of a posterior sd
        assert np.all(np.abs(np.asarray(anchored.reference[0]) - mode) < 1e-3 * sd)
        cv_bound, _ = anchored.bind({"w": jnp.asarray(w)})
        ref = np.stack([_numpy_score(rows, wi) for wi in w])
        np.testing.assert_allclose(np.asarray(bound.score(x)), ref, rtol=1e-10, atol=1e-8)  # exact full pass

        keys = jax.random.split(jax.random.key(0), 4000)
        plain = jax.vmap(lambda k: bound.estimate(x, k).score)(keys)
        with_cv = jax.vmap(lambda k: cv_bound.estimate(x, k).score)(keys)
        for draws in (np.asarray(plain), np.asarray(with_cv)):
            mean, se = draws.mean(axis=0), draws.std(axis=0, ddof=1) / np.sqrt(len(keys))
            assert np.all(np.abs(mean - ref) < Z * se), (mean - ref) / se
        ratio = np.asarray(plain).var(axis=0) / np.asarray(with_cv).var(axis=0)
        assert np.all(ratio > 20.0), ratio
        # the variance each estimate reports is that of the draws (mean over batches)
        reported = np.asarray(jax.vmap(lambda k: bound.estimate(x, k).variance)(keys[:400])).mean(axis=0)
        np.testing.assert_allclose(reported, np.asarray(plain).var(axis=0), rtol=0.15)


def test_sg_langevin_gaussian_mean_matches_closed_form_with_noise_inflation():
    """Normal mean with known variance and a flat prior, n = 100,000 observations: posterior
    N(ybar, s2 = sigma^2 / n) ("Bayesian Data Analysis", 3rd ed. (2013), sec. 2.5). With b
    items drawn with replacement the score's noise is independent of theta, of variance
    V = (n^2 / b) var(y) / sigma^4, and SG-Langevin is the AR(1) chain
    x' - m = (1 - h/s2)(x - m) + h e + sqrt(2h) xi, whose stationary variance is
    s2 (1 + h V / 2) / (1 - h / (2 s2)) ("Bayesian learning via stochastic gradient Langevin
    dynamics" (ICML, 2011) for the scheme; the AR(1) variance is the textbook one). One batch
    per particle, so the N = 1,000 particles are independent chains. They start at the
    posterior itself (variance s2), so reaching the inflated variance is the flow's doing:
    after 3 relaxation times (s2 / h steps each) the start's variance gap has shrunk by
    e^-6."""
    with jax.enable_x64(True):
        rng = np.random.default_rng(21)
        n, sigma, b = 100_000, 2.0, 1000
        y = rng.normal(3.0, sigma, size=n)
        s2 = sigma**2 / n
        v_noise = n**2 / b * y.var() / sigma**4
        h = 2.0 / v_noise  # noise inflation 1 + h V / 2 = 2, step bias 1 / (1 - h / (2 s2)) = 1.01
        expected = s2 * (1 + h * v_noise / 2) / (1 - h / (2 * s2))

        def item(theta, row):
            return jst.norm.logpdf(row, theta["mu"], sigma)

        target = fp.ItemSum(item, jnp.asarray(y), batch=b, batches="per_particle")
        n_part = 1000
        init = {"mu": jnp.asarray(y.mean() + np.sqrt(s2) * rng.standard_normal(n_part))}
        steps = int(3 * s2 / h)
        r = fp.run(target, fp.SGLD(step_size=h), init, key=jax.random.key(4), steps=steps, window=steps, progress=False)
        mu = np.asarray(r.particles["mu"])
        assert abs(mu.mean() - y.mean()) < Z * np.sqrt(expected / n_part)
        se = expected * np.sqrt(2 / n_part)
        assert abs(mu.var(ddof=1) - expected) < Z * se, (mu.var(ddof=1), expected, se)
        # the inflation is real: the exact-score Langevin variance is outside the band
        assert abs(mu.var(ddof=1) - s2 / (1 - h / (2 * s2))) > Z * se
        # the stats: b item gradients per particle per step; the estimator's variance is V
        # (its estimate from each batch's b terms has relative sd sqrt(2 / b) = 4.5%; the
        # window's mean over steps x particles is far tighter than the 2% allowed here)
        rec = r.history.windows()[-1]
        assert rec["item_grads"] == steps * b
        assert abs(rec["score_variance"] / v_noise - 1) < 0.02, rec["score_variance"] / v_noise


@pytest.mark.long  # out of the default run: `-m long`
def test_batch_form_gives_the_item_form_estimates():
    """A log-likelihood written per batch (form="batch": the sum over the rows it is given)
    gives the same full-data score (the numpy closed form, PRML (2006) eq. 4.91) and, for
    one key, the same batch estimate as the per-item form; its variance estimate from
    groups of the batch is unbiased for the draws' variance (its mean over K = 2,000 batches
    within 5 se of the draws' empirical variance)."""
    with jax.enable_x64(True):
        rows = _classification(3000, 3, seed=5)

        def per_batch(theta, r):
            z = r[:, :-1] @ theta["w"]
            return jnp.sum(r[:, -1] * z - jnp.logaddexp(0.0, z))

        w = jnp.asarray([[0.3, -0.2, 0.5], [0.0, 0.1, 0.2]])
        item_t, x = fp.ItemSum(_logistic_item, jnp.asarray(rows), log_prior=_prior, batch=100).bind({"w": w})
        batch_t, _ = fp.ItemSum(
            per_batch, jnp.asarray(rows), log_prior=_prior, batch=100, form="batch", groups=20
        ).bind({"w": w})
        ref = np.stack([_numpy_score(rows, np.asarray(wi)) for wi in w])
        np.testing.assert_allclose(np.asarray(batch_t.score(x)), ref, rtol=1e-10, atol=1e-8)
        k = jax.random.key(3)
        np.testing.assert_allclose(
            np.asarray(batch_t.estimate(x, k).score), np.asarray(item_t.estimate(x, k).score), rtol=1e-10
        )
        keys = jax.random.split(jax.random.key(4), 2000)
        ests = jax.vmap(lambda kk: batch_t.estimate(x, kk))(keys)
        emp = np.asarray(ests.score).var(axis=0, ddof=1)
        rep = np.asarray(ests.variance).mean(axis=0)
        # se of the difference: the empirical variance's (v sqrt(2/K)) and the mean report's (sd / sqrt(K))
        se = np.sqrt((emp * np.sqrt(2 / len(keys))) ** 2 + np.asarray(ests.variance).var(axis=0) / len(keys))
        assert np.all(np.abs(rep - emp) < Z * se), (rep - emp) / se


@pytest.mark.long  # out of the default run: `-m long`
def test_monitor_discrepancy_takes_full_data_scores():
    """On a minibatch target the monitor's Stein discrepancy is computed from full-data
    scores: the same figure as for the equivalent plain Target (data in one log-density)
    at the same particles and step, while the steppers' kept scores are noisy estimates."""
    rows = _classification(2000, 2, seed=6).astype(np.float32)
    init = {"w": jnp.asarray(np.random.default_rng(0).normal(0.0, 0.1, (64, 2)), jnp.float32)}
    mini, x = fp.ItemSum(_logistic_item, jnp.asarray(rows), log_prior=_prior, batch=20).bind(init)
    full, _ = fp.Target(
        lambda th, d: _prior(th) + jnp.sum(jax.vmap(lambda r: _logistic_item(th, r))(d)), data=jnp.asarray(rows)
    ).bind(init)
    stepper = fp.SVGD(step_size=1e-3)
    figs = []
    for target in (mini, full):
        mon = fp.Monitor(discrepancy_points=32)
        state = stepper.start(target, x, jax.random.key(0))
        mon.open(target, stepper, state)
        figs.append(mon.measure(target, state, 100))
    assert np.isfinite(figs[0]["ksd"])
    np.testing.assert_allclose(figs[0]["ksd"], figs[1]["ksd"], rtol=1e-4)
    # the kept score of the minibatch target is an estimate, not the full score
    st = stepper.start(mini, x, jax.random.key(0))
    assert not np.allclose(np.asarray(st.score), np.asarray(full.score(x)), rtol=1e-3)


@pytest.fixture
def logistic_file(tmp_path):
    rows = _classification(100_000, 4, seed=7).astype(np.float32)
    path = tmp_path / "rows.npy"
    np.save(path, rows)
    return path, rows


def test_row_file_reads_rows_without_loading_the_file(logistic_file):
    """The memory-mapped source returns exactly numpy's rows at given indices and windows,
    and the full-data log-density from the file equals numpy's closed form."""
    path, rows = logistic_file
    src = fp.RowFile(path)
    assert len(src) == rows.shape[0] and src.shape == rows.shape
    idx = np.array([[5, 99_999], [0, 5]])
    np.testing.assert_array_equal(src.rows(idx), rows[idx])
    np.testing.assert_array_equal(src.window(10, 7), rows[10:17])
    got = jax.jit(lambda i: src.gather(i))(jnp.asarray(idx))
    np.testing.assert_array_equal(np.asarray(got), rows[idx])
    target = fp.ItemSum(_logistic_item, src, log_prior=_prior, batch=500, chunk=30_000)
    w = np.array([[0.1, -0.2, 0.3, 0.0], [0.0, 0.5, -0.5, 1.0]], np.float32)
    bound, x = target.bind({"w": jnp.asarray(w)})
    r64 = rows.astype(np.float64)
    z = r64[:, :-1] @ w.astype(np.float64).T
    ref = (r64[:, -1:] * z - np.logaddexp(0.0, z)).sum(axis=0) + jst.norm.logpdf(w, 0.0, 5.0).sum(axis=1)
    np.testing.assert_allclose(np.asarray(bound.log_density(x)), ref, rtol=2e-5)


@pytest.mark.long  # out of the default run: `-m long`
def test_row_file_run_is_reproducible_and_matches_the_posterior(logistic_file):
    """100,000 rows read from disk: SG-Langevin with control variates (batch 250) against
    the Laplace approximation by Newton's method in numpy (PRML (2006), sec. 4.4), accurate
    for n = 100,000 and p = 4 far below these tolerances (the posterior is Gaussian to
    relative O(n^-1/2) = 0.3%), with ULA's known step bias on a Gaussian applied to it.
    The issue's criteria: every posterior mean within 0.1 posterior sd and every sd within
    10%. With N = 2,500 particles these are at least 5 Monte-Carlo standard errors: sd /
    sqrt(N) = 0.02 sd for a mean, sd / sqrt(2N) = 1.4% for a sample sd. Two runs with one key
    read the same batches and end equal; another key gives other particles."""
    path, rows = logistic_file
    mode, cov = _numpy_mode(rows.astype(np.float64))
    sd = np.sqrt(np.diag(cov))
    n_part = 2500
    rng = np.random.default_rng(1)
    start = (mode + sd * rng.standard_normal((n_part, 4))).astype(np.float32)
    target = fp.ItemSum(_logistic_item, fp.RowFile(path), log_prior=_prior, batch=250).anchor(
        {"w": jnp.zeros(4, jnp.float32)}
    )
    h = 0.1 * float(np.min(np.linalg.eigvalsh(cov)))  # well inside ULA's stable range 2 / L
    mon = fp.Monitor(discrepancy=False)
    # 125 steps: 5 e-folds of the slowest coordinate's variance (condition number 5 here; the
    # start is already near the posterior, with its diagonal only)
    r = fp.run(
        target,
        fp.SGLD(step_size=h),
        {"w": start},
        key=jax.random.key(3),
        steps=125,
        window=25,
        monitor=mon,
        progress=False,
    )
    sg = np.asarray(r.particles["w"], np.float64)
    # ULA's stationary covariance on N(m, C) is C (I - h C^-1 / 2)^-1 (Roberts and Tweedie, 1996)
    cov_h = cov @ np.linalg.inv(np.eye(4) - 0.5 * h * np.linalg.inv(cov))
    sd_h = np.sqrt(np.diag(cov_h))
    assert Z / np.sqrt(n_part) <= 0.1 and Z / np.sqrt(2 * n_part) < 0.1  # the criteria are >= 5 se
    assert np.all(np.abs(sg.mean(axis=0) - mode) < 0.1 * sd_h), (sg.mean(axis=0) - mode) / sd_h
    assert np.all(np.abs(sg.std(axis=0) / sd_h - 1) < 0.10), sg.std(axis=0) / sd_h
    assert r.history.windows()[-1]["item_grads"] > 0
    again = [
        fp.run(
            target,
            fp.SGLD(step_size=h),
            {"w": start[:50]},
            key=jax.random.key(9),
            steps=20,
            monitor=mon,
            progress=False,
        ).unconstrained
        for _ in range(2)
    ]
    np.testing.assert_array_equal(again[0], again[1])
    other = fp.run(
        target, fp.SGLD(step_size=h), {"w": start[:50]}, key=jax.random.key(10), steps=20, monitor=mon, progress=False
    ).unconstrained
    assert not np.array_equal(again[0], other)


def _sghmc_stationary_var(h, c, s2, momentum_noise):
    """Stationary variance of x for the linear recursion SGHMC is on N(m, s2):
    x' = x + h v, v' = v - h x' / s2 - h c v + e with Var e = momentum_noise, solved as a
    discrete Lyapunov equation by scipy."""
    from scipy.linalg import solve_discrete_lyapunov

    a = np.array([[1.0, h], [-h / s2, 1.0 - h * h / s2 - h * c]])
    return solve_discrete_lyapunov(a, np.diag([0.0, momentum_noise]))[0, 0]


@pytest.mark.long  # out of the default run: `-m long`
def test_sghmc_noise_correction_and_svgd_minibatch_scores():
    """Normal mean, sigma = 1, n = 5,000, prior N(0, 10^2): posterior N(mu_n, s2) ("Bayesian
    Data Analysis", 3rd ed. (2013), sec. 2.5). SGHMC ("Stochastic gradient Hamiltonian
    Monte Carlo" (ICML, 2014)) without control variates, one batch of b = 2,000 per particle:
    the score's noise e has the theta-free variance V = (n^2 / b) var(y), so the momentum
    receives h^2 V = 2 h B from it and the corrected injection 2 (C - B) h tops it up to 2 C h.
    The stationary variance is then that of the exact-score scheme, from the Lyapunov
    equation in scipy above; without the correction it would be that with 2 h (C + B), about
    1.5x larger here, and the test tells the two apart (5 standard errors of a sample variance
    of N = 1,000 independent chains, v sqrt(2 / N), are 22%). SVGD with the anchored
    (control-variate) minibatch score: its ensemble mean within 5 se of the posterior mean."""
    with jax.enable_x64(True):
        rng = np.random.default_rng(8)
        n, sigma, b = 5_000, 1.0, 2000
        y = rng.normal(-1.5, sigma, size=n)
        prec = 1 / 100.0 + n / sigma**2
        post_mean, s2 = (y.sum() / sigma**2) / prec, 1 / prec
        post_sd = np.sqrt(s2)
        v_noise = n**2 / b * y.var() / sigma**4
        h = 0.3 * post_sd
        b_noise = h * v_noise / 2
        c = 2.0 * b_noise  # the correction removes half of the injected noise
        assert h * c < 2

        def item(theta, row):
            return jst.norm.logpdf(row, theta["mu"], sigma)

        def prior(theta):
            return jst.norm.logpdf(theta["mu"], 0.0, 10.0)

        target = fp.ItemSum(item, jnp.asarray(y), log_prior=prior, batch=b, batches="per_particle")
        n_part = 1000
        init = {"mu": jnp.asarray(post_mean + post_sd * rng.standard_normal(n_part))}
        mon = fp.Monitor(discrepancy=False)
        hmc = fp.run(
            target,
            fp.SGHMC(step_size=h, friction=c),
            init,
            key=jax.random.key(1),
            steps=40,
            monitor=mon,
            progress=False,
        )  # 40 steps: 16 relaxation times (C s2 / h = V s2 = n / b = 2.5 steps each, overdamped)
        mu = np.asarray(hmc.particles["mu"])
        corrected = _sghmc_stationary_var(h, c, s2, 2 * c * h)
        uncorrected = _sghmc_stationary_var(h, c, s2, 2 * (c + b_noise) * h)
        se = corrected * np.sqrt(2 / n_part)
        assert abs(mu.mean() - post_mean) < Z * np.sqrt(corrected / n_part)
        assert abs(mu.var(ddof=1) - corrected) < Z * se, (mu.var(ddof=1), corrected, se)
        assert abs(mu.var(ddof=1) - uncorrected) > Z * se
        assert hmc.history.windows()[-1]["noise_capped"] == 0.0

        anchored = fp.ItemSum(item, jnp.asarray(y), log_prior=prior, batch=200).anchor({"mu": jnp.zeros(())})
        small = {"mu": init["mu"][:200]}
        sv = fp.run(
            anchored, fp.SVGD(step_size=0.05 * s2), small, key=jax.random.key(2), steps=100, monitor=mon, progress=False
        )
        assert abs(np.asarray(sv.particles["mu"]).mean() - post_mean) < Z * post_sd / np.sqrt(200)


def test_item_sum_rejects_bad_declarations(tmp_path):
    """Bad declarations fail with the argument's name and what was expected."""
    y = jnp.zeros((10,))
    with pytest.raises(ValueError, match="batch: expected"):
        fp.ItemSum(lambda th, r: r, y, batch=11)
    with pytest.raises(ValueError, match="data: expected"):
        fp.ItemSum(lambda th, r: r, {"a": jnp.zeros(10), "b": jnp.zeros(9)}, batch=2)
    with pytest.raises(TypeError, match="batch: expected"):
        fp.ItemSum(lambda th, r: r, y, batch=2.0)
    with pytest.raises(FileNotFoundError, match="path: expected"):
        fp.RowFile(os.fspath(tmp_path / "missing.npy"))
    target = fp.ItemSum(lambda th, r: jnp.zeros(2), y, batch=2)
    with pytest.raises(ValueError, match="log_lik: expected a scalar"):
        fp.run(target, fp.SGLD(step_size=0.1), {"mu": jnp.zeros(4)}, key=jax.random.key(0), steps=2, progress=False)


# ----- the 1,000,000-row checks (minutes: `python -m pytest -m bigdata tests/test_bigdata.py`) -----

_MEMORY_CHILD = """
import json, sys
import jax, jax.numpy as jnp, jax.scipy.stats as jst
import flowpost as fp

def item(theta, row):
    z = jnp.dot(row[:-1], theta["w"])
    return row[-1] * z - jnp.logaddexp(0.0, z)

def prior(theta):
    return jnp.sum(jst.norm.logpdf(theta["w"], 0.0, 5.0))

import numpy as np
p = int(sys.argv[2])
data = fp.RowFile(sys.argv[1]) if sys.argv[3] == "file" else jnp.asarray(np.load(sys.argv[1]))  # the control
target = fp.ItemSum(item, data, log_prior=prior, batch=1000).anchor({"w": jnp.zeros(p)})
init = {"w": 0.01 * jax.random.normal(jax.random.key(0), (1000, p))}
r = fp.run(target, fp.SGLD(step_size=1e-6), init, key=jax.random.key(1), steps=100,
           monitor=fp.Monitor(discrepancy=False), progress=False)
# VmHWM: this process's own peak (ru_maxrss would carry the parent's peak over fork + exec)
peak = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
print(json.dumps({"peak_kib": peak, "status": r.status}))
"""


def _peak_kib(path, p, mode="file"):
    import json
    import subprocess
    import sys

    out = subprocess.run(
        [sys.executable, "-c", _MEMORY_CHILD, os.fspath(path), str(p), mode], capture_output=True, text=True, check=True
    )
    return json.loads(out.stdout.strip().splitlines()[-1])["peak_kib"]


@pytest.mark.bigdata
def test_million_rows_sg_langevin_with_control_variates_agrees_with_full_data_mala(tmp_path):
    """The issue's check: logistic regression on 1,000,000 rows from scikit-learn's
    make_classification (random_state=0, 5 informative features), stored as a memory-mapped
    .npy file. SG-Langevin with control variates, batch 1,000, read from the file, agrees
    with full-data MALA (data in memory) in every posterior mean within 0.1 posterior sd and
    in every sd within 10%; both started over-dispersed (mode + 3 sd noise, the mode from
    Newton's method in numpy) so that agreement is reached, not kept. N = 2,500 SG-Langevin
    particles and 1,000 MALA particles (each MALA step costs N n = 10^9 item gradients): the
    sd criterion is 3.8 Monte-Carlo standard errors of the ratio of the two ensembles' sds
    (sqrt(1/(2 N1) + 1/(2 N2)) = 2.6%), the mean criterion 2.7 of the difference of their
    means (sd sqrt(1/N1 + 1/N2) = 0.037 sd): the issue's criteria, not widened; against
    the numpy Laplace mode SG-Langevin's mean criterion is 5 se (0.02 sd).
    SG-Langevin's step h = 0.1 lambda_min(C) biases its variance by 1 / (1 - h / (2 lambda))
    <= 5% (ULA on a Gaussian, Roberts and Tweedie, 1996), inside the 10%.

    Memory: the SG-Langevin pipeline in a child process on the 1,000,000-row file and on a
    10,000-row file (the same code, particles and chunk of rows per full pass): its peak
    resident memory grows by less than the data's size on disk. The control: the same
    pipeline with the rows loaded into memory grows by at least the data's size (so the
    measure sees a loaded file)."""
    p, n, n_part = 5, 1_000_000, 2500
    from sklearn.datasets import make_classification

    x, y = make_classification(n_samples=n, n_features=p, n_informative=p, n_redundant=0, n_repeated=0, random_state=0)
    rows = np.column_stack([x, y]).astype(np.float32)
    path = tmp_path / "rows.npy"
    np.save(path, rows)
    small = tmp_path / "small.npy"
    np.save(small, rows[:10_000])
    mode, cov = _numpy_mode(rows.astype(np.float64))
    sd = np.sqrt(np.diag(cov))
    lam_min = float(np.linalg.eigvalsh(cov).min())
    rng = np.random.default_rng(2)
    start = {"w": jnp.asarray(mode + 3.0 * sd * rng.standard_normal((n_part, p)), jnp.float32)}
    mon = fp.Monitor(discrepancy=False)

    target = fp.ItemSum(_logistic_item, fp.RowFile(path), log_prior=_prior, batch=1000).anchor(
        {"w": jnp.zeros(p, jnp.float32)}
    )
    sg = fp.run(target, fp.SGLD(step_size=0.1 * lam_min), start, key=jax.random.key(1), steps=200, monitor=mon,
                progress=False)  # fmt: skip
    # full-data MALA: the exact full-data score of an ItemSum over the rows in memory (chunked
    # passes checked against numpy above; a plain Target over all rows would hold (N, n) arrays)
    full = fp.ItemSum(_logistic_item, jnp.asarray(rows), log_prior=_prior, batch=1000)
    few = {"w": start["w"][:1000]}
    ma = fp.run(full, fp.MALA(step_size=0.5 * lam_min), few, key=jax.random.key(2), steps=40, window=20,
                monitor=mon, progress=False)  # fmt: skip
    a, b = np.asarray(sg.particles["w"], np.float64), np.asarray(ma.particles["w"], np.float64)
    assert np.all(np.abs(a.mean(0) - b.mean(0)) < 0.1 * b.std(0)), (a.mean(0) - b.mean(0)) / b.std(0)
    assert np.all(np.abs(a.std(0) / b.std(0) - 1) < 0.10), a.std(0) / b.std(0)
    # and SG-Langevin's ensemble is the posterior (Laplace in numpy, exact to O(n^-1/2) = 0.1%)
    assert np.all(np.abs(a.mean(0) - mode) < 0.1 * sd) and np.all(np.abs(a.std(0) / sd - 1) < 0.10)

    base = _peak_kib(small, p)
    grown = (_peak_kib(path, p) - base) * 1024
    assert grown < rows.nbytes, (grown, rows.nbytes)
    loaded = (_peak_kib(path, p, "memory") - base) * 1024
    assert loaded > rows.nbytes, (loaded, rows.nbytes)


@pytest.mark.long  # out of the default run: `-m long`
def test_readme_big_data_block_runs(tmp_path):
    """The README's "Many data items" script runs as written on a file of rows (fewer steps);
    the posterior it gives is near the numpy Laplace mode (within 5 sd: a smoke check, the
    accuracy is the other tests' business)."""
    import re
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    block = next(b for b in re.findall(r"```python\n(.*?)```", text, re.S) if "fp.ItemSum" in b)
    scope: dict = {}
    exec(compile(block.replace("steps=2000,", "steps=100, progress=False,"), "README", "exec"), scope)
    rows = _classification(5_000, 3, seed=4).astype(np.float32)
    np.save(tmp_path / "rows.npy", rows)
    r = scope["fit"](os.fspath(tmp_path / "rows.npy"), 3, n_particles=64)
    mode, cov = _numpy_mode(rows.astype(np.float64))
    assert r.status == "done", r.reason
    assert np.all(np.abs(np.asarray(r.particles["w"]).mean(0) - mode) < 5 * np.sqrt(np.diag(cov)))
