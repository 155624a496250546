"""Using a fit afterwards: predictive draws, export, the two-sample test, reading a run.

One short MALA run on a conjugate model is shared by the tests (module fixture). The model is
Bayesian linear regression, prior w ~ N(0, alpha^-1 I), noise precision beta, whose posterior
is N(m_N, S_N) with S_N^-1 = alpha I + beta Phi^T Phi and m_N = beta S_N Phi^T y, and whose
posterior predictive at a new input with features phi has mean m_N^T phi and variance
1/beta + phi^T S_N phi ("Pattern Recognition and Machine Learning" (2006), sec. 3.3.2),
computed here with numpy. A second parameter tau ~ Gamma(3, scale 0.5), independent of w,
lives on the positive half-line so that the constrained form of the particles is exercised.

Monte-Carlo error: the particles are N independent MALA chains after burn-in (as in
tests/test_mala.py), so a sample mean has standard error sd / sqrt(N) and a Gaussian sample
variance v * sqrt(2 / N). Tolerances are Z = 4.5 standard errors.
"""

import sys

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest
import scipy.spatial.distance
import scipy.stats

import flowpost as fp
from flowpost.diagnostics import Agreement, agreement_test

Z = 4.5  # tolerance in Monte-Carlo standard errors
N = 1000
ALPHA, BETA = 1.0, 4.0


def _features(u):
    u = np.asarray(u, dtype=np.float64)
    return np.column_stack([np.ones_like(u), u])


@pytest.fixture(scope="module")
def fit():
    rng = np.random.default_rng(0)
    u = np.linspace(-1.0, 1.0, 20)
    phi = _features(u)
    y = phi @ np.array([0.5, -1.0]) + rng.normal(0.0, 1.0 / np.sqrt(BETA), u.size)
    s_n = np.linalg.inv(ALPHA * np.eye(2) + BETA * phi.T @ phi)
    m_n = BETA * s_n @ phi.T @ y

    def log_p(th, data):
        prior = jnp.sum(jst.norm.logpdf(th["w"], 0.0, 1.0 / np.sqrt(ALPHA)))
        lik = jnp.sum(jst.norm.logpdf(data["y"], data["phi"] @ th["w"], 1.0 / np.sqrt(BETA)))
        return prior + lik + jst.gamma.logpdf(th["tau"], 3.0, scale=0.5)

    data = {"phi": jnp.asarray(phi, jnp.float32), "y": jnp.asarray(y, jnp.float32)}
    target = fp.Target(log_p, data=data, support={"tau": fp.Positive()})
    init = {"w": jax.random.normal(jax.random.key(1), (N, 2)), "tau": jnp.full((N,), 1.5)}
    # the monitor's cheap figures only (no Stein discrepancy, no R-hat trail): a cheaper run
    monitor = fp.Monitor(discrepancy=False, trail_particles=0)
    stepper = fp.MALA(step_size=5e-3, tune_steps=100)
    r = fp.run(target, stepper, init, key=jax.random.key(3), steps=300, monitor=monitor, progress=False)
    assert r.ok, r.reason
    return r, m_n, s_n


# ----- predictive draws ---------------------------------------------------------------------
def test_predictive_mean_and_draws_match_the_closed_form_predictive(fit):
    r, m_n, s_n = fit
    u_new = np.array([-1.5, 0.0, 2.0])
    phi_new = _features(u_new)
    phi_j = jnp.asarray(phi_new, jnp.float32)

    # the regression's mean at the new inputs, one value per particle: posterior of phi^T w
    mean_draws = np.asarray(r.predictive(lambda p: phi_j @ p["w"], block=128))
    assert mean_draws.shape == (N, 3)
    f_mean = phi_new @ m_n  # Bishop (2006) eq. 3.58: predictive mean m_N^T phi
    f_var = np.einsum("ij,jk,ik->i", phi_new, s_n, phi_new)  # phi^T S_N phi, the part of eq. 3.59 from w
    se_mean = np.sqrt(f_var / N)
    assert np.all(np.abs(mean_draws.mean(axis=0) - f_mean) < Z * se_mean), (mean_draws.mean(0) - f_mean) / se_mean
    se_var = f_var * np.sqrt(2.0 / N)
    v = mean_draws.var(axis=0, ddof=1)
    assert np.all(np.abs(v - f_var) < Z * se_var), (v - f_var) / se_var

    # new observations, one key per particle: eq. 3.59, variance 1/beta + phi^T S_N phi
    def observe(p, key):
        return {"y": phi_j @ p["w"] + jax.random.normal(key, (3,)) / np.sqrt(BETA)}

    y_draws = r.predictive(observe, jax.random.key(7), block=300)
    y = np.asarray(y_draws["y"])
    assert y.shape == (N, 3)
    y_var = 1.0 / BETA + f_var
    assert np.all(np.abs(y.mean(axis=0) - f_mean) < Z * np.sqrt(y_var / N))
    assert np.all(np.abs(y.var(axis=0, ddof=1) - y_var) < Z * y_var * np.sqrt(2.0 / N))
    # the noise adds 1/beta = 0.25 to the variance, far more than the error band: the keys are used
    assert np.all(y.var(axis=0, ddof=1) - v > 0.25 - 2 * Z * y_var * np.sqrt(2.0 / N))

    # same key, same draws, whatever the block; another key, other draws
    again = np.asarray(r.predictive(observe, jax.random.key(7), block=N)["y"])
    np.testing.assert_allclose(again, y, rtol=1e-6, atol=1e-6)
    other = np.asarray(r.predictive(observe, jax.random.key(8))["y"])
    assert not np.allclose(other, y)


def test_predictive_sees_the_constrained_pytree_and_refuses_bad_input(fit):
    r, _, _ = fit
    tau = np.asarray(r.predictive(lambda p: p["tau"], block=7))  # 7 does not divide N: padding dropped
    assert tau.shape == (N,)
    np.testing.assert_array_equal(tau, r.particles["tau"])
    assert np.all(tau > 0)

    with pytest.raises(TypeError, match=r"^fn: expected a function fn\(params\)"):
        r.predictive(3)
    with pytest.raises(TypeError, match=r"^fn: expected a function fn\(params, key\)"):
        r.predictive(lambda p: p, jax.random.key(0))
    with pytest.raises(TypeError, match=r"^key: expected one JAX PRNG key"):
        r.predictive(lambda p, k: p, 0)
    with pytest.raises(ValueError, match=r"^block: expected an integer >= 1; got 0"):
        r.predictive(lambda p: p, block=0)
    with pytest.raises(TypeError, match=r"^fn: expected a function fn\(params\) that JAX can trace"):
        r.predictive(lambda p: float(p["tau"]))  # not traceable: a Python float of a traced value


# ----- export ---------------------------------------------------------------------------------
def test_frame_and_dataset_hold_the_particles_exactly(fit, tmp_path):
    pytest.importorskip("pandas")
    xr = pytest.importorskip("xarray")
    r, _, _ = fit
    p = r.particles
    frame = r.to_frame()
    assert list(frame.columns) == ["tau", "w[0]", "w[1]"]  # the labeller's names, as in summary()
    assert frame.index.name == "particle" and len(frame) == N
    np.testing.assert_array_equal(frame["tau"].to_numpy(), p["tau"])
    for j in range(2):
        col = frame[f"w[{j}]"].to_numpy()
        assert col.dtype == p["w"].dtype
        np.testing.assert_array_equal(col, p["w"][:, j])

    ds = r.to_dataset()
    assert set(ds.data_vars) == {"tau", "w"}
    assert ds["w"].dims == ("particle", "w_axis0")
    assert ds["w"].dtype == p["w"].dtype
    np.testing.assert_array_equal(ds["w"].values, p["w"])
    np.testing.assert_array_equal(ds["tau"].values, p["tau"])
    assert ds.attrs["status"] == r.status and ds.attrs["steps"] == 300

    path = tmp_path / "fit.nc"
    ds.to_netcdf(path, engine="scipy")  # netCDF through xarray's own writer (scipy backend)
    with xr.open_dataset(path, engine="scipy") as back:
        np.testing.assert_array_equal(back["w"].values, p["w"])
        np.testing.assert_array_equal(back["tau"].values, p["tau"])
        assert back["tau"].attrs["support"] == ds["tau"].attrs["support"]


def test_history_frame_and_missing_extra(fit, monkeypatch):
    pytest.importorskip("pandas")
    r, _, _ = fit
    h = r.history
    frame = h.to_frame()
    assert len(frame) == len(h)
    for name in ("step", "mean_logp", "centre_drift", "spread_drift"):
        np.testing.assert_array_equal(frame[name].to_numpy(dtype=float), h.column(name))
    assert "centre" not in frame.columns  # array-valued figures stay in History.column

    monkeypatch.setitem(sys.modules, "pandas", None)  # as if the extra were not installed
    with pytest.raises(ImportError, match=r"Result.to_frame: expected the optional package pandas.*flowpost\[export\]"):
        r.to_frame()
    with pytest.raises(ImportError, match=r"History.to_frame: expected the optional package pandas"):
        h.to_frame()
    monkeypatch.setitem(sys.modules, "xarray", None)
    with pytest.raises(ImportError, match=r"Result.to_dataset: expected the optional package xarray"):
        r.to_dataset()


# ----- reading a run at a glance --------------------------------------------------------------
def test_reprs_and_table_say_what_they_hold(fit):
    r, _, _ = fit
    text = repr(r)
    for part in ("status='done'", "300 steps", f"{N} particles", "tau", "w (2,)", "elapsed"):
        assert part in text, text

    h = r.history
    text = repr(h)
    n_windows = len(h.windows())
    last = h.last_record
    assert f"{n_windows} windows" in text and f"{int(last['step'])} steps" in text, text
    assert f"mean_logp={last['mean_logp']:.4g}" in text, text

    table = h.table()
    head = table.splitlines()[0].split()
    assert "centre_drift" in head and "spread_drift" in head  # never cut to 11 characters
    assert len({len(line) for line in table.splitlines()}) == 1  # columns aligned
    assert h.table(["step", "a_rather_long_figure_name"]).splitlines()[0].split()[-1] == "a_rather_long_figure_name"


# ----- a second opinion: the kernel two-sample test -----------------------------------------------
def test_two_sample_statistic_and_power_against_direct_formulas():
    """The unbiased MMD^2 of "A kernel two-sample test" (JMLR, 2012), eq. 3, with the median
    heuristic (sec. 8), recomputed directly with numpy / scipy in float64 on samples of
    N = 500 from N(0, 1) and N(0.5, 1): a mean shift of 0.5 sd, which the test rejects (its
    power there is close to 1 (from a short simulation during development, not a closed
    form); the fixed key makes the check deterministic)."""
    x = np.asarray(jax.random.normal(jax.random.key(13), (500, 1)))
    y = np.asarray(0.5 + jax.random.normal(jax.random.key(14), (500, 1)))
    out = agreement_test(x, y, key=jax.random.key(15), n_permutations=99)
    assert isinstance(out, Agreement) and out.n_permutations == 99
    assert out.statistic.dtype == x.dtype  # the user's float32 kept
    assert float(out.p_value) <= 0.05

    sigma = np.median(scipy.spatial.distance.pdist(np.vstack([x, y]).astype(np.float64)))
    # float32 rounding of squared distances: a relative error near 1e-6 (common practice)
    assert float(out.bandwidth) == pytest.approx(sigma, rel=1e-5)

    def k(a, b):
        return np.exp(-scipy.spatial.distance.cdist(a, b, "sqeuclidean") / (2 * float(out.bandwidth) ** 2))

    x64, y64 = x.astype(np.float64), y.astype(np.float64)
    kxx, kyy, kxy = k(x64, x64), k(y64, y64), k(x64, y64)
    n, m = len(x), len(y)
    mmd2 = (kxx.sum() - n) / (n * (n - 1)) + (kyy.sum() - m) / (m * (m - 1)) - 2 * kxy.mean()
    # float32 sums of 250,000 kernel values of order 1 (relative rounding ~1e-7 each) leave an
    # absolute error near 1e-6 on a statistic near 0.05: rel 1e-3 is wide of it (common practice)
    assert float(out.statistic) == pytest.approx(mmd2, rel=1e-3)

    with pytest.raises(ValueError, match=r"^second: expected draws of the same dimension as first \(1\)"):
        agreement_test(x, np.ones((5, 2)), key=jax.random.key(0))
    with pytest.raises(ValueError, match=r"^n_permutations: expected an integer >= 1"):
        agreement_test(x, y, key=jax.random.key(0), n_permutations=0)
    with pytest.raises(TypeError, match=r"^first: expected a flowpost Result or an \(N, d\) array"):
        agreement_test("draws", y, key=jax.random.key(0))
    with pytest.raises(TypeError, match=r"^key: expected one JAX PRNG key"):
        agreement_test(x, y, key=3)


def test_two_sample_level():
    """Level: 400 pairs of samples of 50 from one bivariate Gaussian, 39 permutations each,
    so that P(p <= 0.05) = 2 / 40 = 0.05 exactly (a permutation test is exact under
    exchangeability; "A kernel two-sample test" (JMLR, 2012)). The rejection count is
    Binomial(400, 0.05): 3 binomial standard errors, sqrt(0.05 * 0.95 / 400) = 0.0109 each.
    The power at N = 500 is checked in the test above."""
    pairs, n, n_perm = 400, 50, 39
    xs = jax.random.normal(jax.random.key(10), (pairs, n, 2))
    ys = jax.random.normal(jax.random.key(11), (pairs, n, 2))
    keys = jax.random.split(jax.random.key(12), pairs)
    p = jax.jit(jax.vmap(lambda a, b, k: agreement_test(a, b, key=k, n_permutations=n_perm).p_value))(xs, ys, keys)
    p = np.asarray(p)
    rate = float(np.mean(p <= 0.05))
    se = np.sqrt(0.05 * 0.95 / pairs)
    assert abs(rate - 0.05) <= 3 * se, rate
    # under the null the p-value is uniform on the grid {1/40, ..., 40/40}: a chi-square test
    # of the 40 cell counts (scipy), 10 expected per cell
    counts = np.bincount(np.rint(p * (n_perm + 1)).astype(int) - 1, minlength=n_perm + 1)
    assert counts.sum() == pairs and counts.size == n_perm + 1
    assert scipy.stats.chisquare(counts).pvalue > 1e-3


def test_two_sample_between_a_result_and_reference_draws(fit):
    """A run against exact posterior draws (numpy, from N(m_N, S_N), Bishop (2006) sec. 3.3)
    agrees; against draws with tau shifted by 0.5 sd it does not (tau, the widest coordinate,
    sets the median bandwidth; a shift of a narrow coordinate is seen only at larger N)."""
    r, m_n, s_n = fit
    rng = np.random.default_rng(5)
    w = rng.multivariate_normal(m_n, s_n, size=N)
    tau = scipy.stats.gamma(3.0, scale=0.5).rvs(size=N, random_state=rng)
    ref = np.column_stack([tau, w]).astype(np.float32)  # columns as in Result.draws(): tau, w[0], w[1]
    same = agreement_test(r, ref, key=jax.random.key(20), n_permutations=99)
    assert float(same.p_value) > 0.01, same  # fixed keys: a false alarm here would be a 1-in-100 event
    shifted = ref.copy()
    shifted[:, 0] += 0.5 * np.sqrt(3.0) * 0.5  # sd of Gamma(3, scale 0.5) = sqrt(3) * 0.5
    assert float(agreement_test(r, shifted, key=jax.random.key(20), n_permutations=99).p_value) <= 0.01
