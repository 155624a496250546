"""Tests of the kernel numerics of flowpost.numerics: kernels, bandwidth rules, blocked sums, KDE, random batches.

References are computed independently of the code under test: brute-force
numpy with per-pair differences (the textbook derivatives of the two kernels
written out here), scipy (pdist, multivariate_normal) and central finite
differences.
"""

from __future__ import annotations

import math
import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import stats
from scipy.spatial.distance import pdist
from scipy.special import logsumexp as np_logsumexp

from flowpost.numerics import (
    IMQ,
    RBF,
    grad_log_kde,
    interaction_means,
    kernel_sums,
    log_kde,
    median_distance,
    normal_reference_bandwidth,
    random_batch_sums,
    whiten,
)

# --------------------------------------------------------------------------
# independent numpy references
# --------------------------------------------------------------------------


def np_kernel(kind: str, param: tuple, x: np.ndarray, y: np.ndarray):
    """k(x, y) and grad_x k(x, y) by broadcasting per-pair differences.

    Textbook closed forms: RBF exp(-r2 / (2 h^2)) has gradient -k (x - y) / h^2;
    IMQ (c^2 + r2)^b has gradient 2 b (c^2 + r2)^(b - 1) (x - y).
    """
    diff = x - y
    r2 = np.sum(diff**2, axis=-1)
    if kind == "rbf":
        (h,) = param
        k = np.exp(-r2 / (2 * h * h))
        g = -k[..., None] * diff / (h * h)
    else:
        c, b = param
        k = (c * c + r2) ** b
        g = 2 * b * ((c * c + r2) ** (b - 1))[..., None] * diff
    return k, g


def np_sums(kind, param, x_src, values, x_dst):
    """A_i = sum_j k(x_j, y_i) v_j and B_i = sum_j grad_{x_j} k(x_j, y_i), full matrices."""
    k, g = np_kernel(kind, param, x_src[:, None, :], x_dst[None, :, :])  # (N, M), (N, M, d)
    return np.einsum("jm,jk->mk", k, values), g.sum(axis=0)


def median_heuristic_reference(x: np.ndarray) -> float:
    """h = med / sqrt(2 log(N + 1)): the median heuristic of "Stein variational
    gradient descent" (2016) (b = med^2 / log N in exp(-r2 / b)), in the
    exp(-r2 / (2 h^2)) parametrisation with N + 1 as documented."""
    return float(np.median(pdist(x)) / math.sqrt(2 * math.log(x.shape[0] + 1)))


def _points(seed: int, n: int, d: int) -> np.ndarray:
    return np.random.default_rng(seed).normal(size=(n, d))


# --------------------------------------------------------------------------
# kernels
# --------------------------------------------------------------------------

KERNELS = [
    (RBF(0.7), "rbf", (0.7,)),
    (IMQ(1.0, -0.5), "imq", (1.0, -0.5)),
    (IMQ(2.0, -0.8), "imq", (2.0, -0.8)),
]


@pytest.mark.parametrize("kernel,kind,param", KERNELS)
def test_kernel_value_and_gradient(kernel, kind, param):
    @jax.jit
    def evaluate(x, y, r2):
        s = kernel.scale_for(x)
        f_of_r2 = lambda t: kernel.profile(t, s)[0]
        return (
            kernel.value(x, y),
            kernel.grad_x(x, y),
            jax.vmap(jax.grad(lambda a, b: kernel.value(a, b)))(x, y),
            kernel.profile(r2, s),
            jax.vmap(jax.grad(f_of_r2))(r2),
            jax.vmap(jax.grad(jax.grad(f_of_r2)))(r2),
        )

    with jax.enable_x64(True):
        x = _points(0, 15, 3)
        y = _points(1, 15, 3)
        k_ref, g_ref = np_kernel(kind, param, x, y)
        value, grad, auto, (_, df, d2f), f1, f2 = evaluate(x, y, jnp.linspace(0.0, 6.0, 13))
        # closed-form values and gradients against the textbook formulas
        np.testing.assert_allclose(value, k_ref, rtol=1e-12)
        np.testing.assert_allclose(grad, g_ref, rtol=1e-10, atol=1e-14)
        # closed-form gradient against autodiff of the kernel value
        np.testing.assert_allclose(grad, auto, rtol=1e-10, atol=1e-14)
        # profile derivatives f', f'' (used by the Stein kernel) against autodiff in r2
        np.testing.assert_allclose(df, f1, rtol=1e-12)
        np.testing.assert_allclose(d2f, f2, rtol=1e-12)


def test_kernel_configs_are_hashable_and_validated():
    assert hash(RBF(0.5)) == hash(RBF(0.5)) and RBF(0.5) == RBF(0.5)
    assert IMQ(1.0, -0.5) == IMQ() and IMQ(1.0) != IMQ(2.0)
    with pytest.raises(ValueError, match="bandwidth"):
        RBF(-1.0)
    with pytest.raises(ValueError, match="scale"):
        IMQ(scale=0.0)
    with pytest.raises(ValueError, match="power"):
        IMQ(power=0.5)
    with pytest.raises(ValueError, match="scale="):
        RBF().value(np.zeros(2), np.ones(2))  # data-driven bandwidth needs an explicit scale


# --------------------------------------------------------------------------
# bandwidth rules
# --------------------------------------------------------------------------


def test_median_distance_against_scipy():
    with jax.enable_x64(True):
        x = _points(2, 50, 3)
        # scipy.spatial.distance.pdist median over all pairs i < j
        assert float(median_distance(x)) == pytest.approx(np.median(pdist(x)), rel=1e-12)
        # documented deterministic subset: rows floor(k N / m), k < m
        m = 7
        idx = (np.arange(m) * 50) // m
        got = float(median_distance(x, max_points=m))
        assert got == pytest.approx(np.median(pdist(x[idx])), rel=1e-12)
        # RBF(None) uses the median heuristic of "Stein variational gradient descent" (2016)
        assert float(RBF().scale_for(jnp.asarray(x))) == pytest.approx(median_heuristic_reference(x), rel=1e-12)
    with pytest.raises(ValueError, match="at least 2"):
        median_distance(np.zeros((1, 2), np.float32))


def test_normal_reference_bandwidth_formula():
    # h = sigma (4 / ((d + 2) N))^(1 / (d + 4)), the normal-reference AMISE rule
    # ("Density estimation for statistics and data analysis" (1986), from memory),
    # sigma^2 = mean per-coordinate sample variance.
    with jax.enable_x64(True):
        x = _points(3, 200, 4) * np.array([1.0, 2.0, 0.5, 1.5])
        sigma = math.sqrt(np.mean(np.var(x, axis=0, ddof=1)))
        ref = sigma * (4.0 / (6.0 * 200)) ** (1.0 / 8.0)
        assert float(normal_reference_bandwidth(x)) == pytest.approx(ref, rel=1e-12)


# --------------------------------------------------------------------------
# blocked kernel sums
# --------------------------------------------------------------------------


@pytest.mark.parametrize("kernel,kind,param", [*KERNELS, (RBF(), "rbf", None)])
def test_kernel_sums_match_brute_force(kernel, kind, param):
    with jax.enable_x64(True):
        x_src = _points(4, 37, 3)
        values = _points(5, 37, 2)
        x_dst = _points(6, 23, 3) * 1.3 + 0.2
        if param is None:  # median heuristic on the sources
            param = (median_heuristic_reference(x_src),)
        a_ref, b_ref = np_sums(kind, param, x_src, values, x_dst)
        # blocks of 1, 5 (does not divide 23), M and > M for one kernel; one size
        # for the others to keep compilation time down
        blocks = (1, 5, 23, 64) if kernel == IMQ(1.0, -0.5) else (5,)
        for block in blocks:
            a, b = kernel_sums(kernel, x_src, values, x_dst, block=block)
            np.testing.assert_allclose(a, a_ref, rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(b, b_ref, rtol=1e-10, atol=1e-12)
        # self-interaction (x_dst defaults to x_src) and a vector of scalar values
        a, b = kernel_sums(kernel, x_src, values[:, 0], block=10)
        a_ref, b_ref = np_sums(kind, param, x_src, values[:, :1], x_src)
        np.testing.assert_allclose(a, a_ref[:, 0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(b, b_ref, rtol=1e-10, atol=1e-12)


def test_kernel_sums_scale_override_and_dtype():
    x = _points(7, 40, 2).astype(np.float32)
    v = _points(8, 40, 2).astype(np.float32)
    a, b = kernel_sums(RBF(), x, v, block=16, scale=0.9)
    assert a.dtype == jnp.float32 and b.dtype == jnp.float32
    a_ref, b_ref = np_sums("rbf", (0.9,), x.astype(float), v.astype(float), x.astype(float))
    # float32 arithmetic on O(1) sums of 40 terms: relative rounding ~1e-6
    np.testing.assert_allclose(a, a_ref, rtol=2e-5, atol=2e-5)
    np.testing.assert_allclose(b, b_ref, rtol=2e-5, atol=2e-5)


def test_bad_inputs_raise_clear_errors():
    x = np.zeros((5, 2), np.float32)
    with pytest.raises(ValueError, match="x_src"):
        kernel_sums(IMQ(), np.zeros(5, np.float32), x)
    with pytest.raises(TypeError, match="x_src"):
        kernel_sums(IMQ(), np.zeros((5, 2), np.int32), x)
    with pytest.raises(ValueError, match="values"):
        kernel_sums(IMQ(), x, np.zeros((4, 2), np.float32))
    with pytest.raises(ValueError, match="x_dst"):
        kernel_sums(IMQ(), x, x, np.zeros((3, 3), np.float32))
    with pytest.raises(ValueError, match="block"):
        kernel_sums(IMQ(), x, x, block=0)
    with pytest.raises(ValueError, match="batch"):
        random_batch_sums(IMQ(), x, x, jax.random.key(0), 1)
    with pytest.raises(ValueError, match="batch"):
        random_batch_sums(IMQ(), x, x, jax.random.key(0), 6)
    with pytest.raises(ValueError, match="key"):
        interaction_means(IMQ(), x, x, batch=2)
    with pytest.raises(ValueError, match="bandwidth"):
        log_kde(x, x, -1.0)


# --------------------------------------------------------------------------
# random batches ("Random batch methods for interacting particle systems" (2020))
# --------------------------------------------------------------------------


def test_random_batch_with_full_batch_equals_full_sums():
    x = _points(9, 30, 3).astype(np.float32)
    v = _points(10, 30, 3).astype(np.float32)
    for kernel in (RBF(),):  # median bandwidth: resolved once from the whole ensemble
        a_full, b_full = kernel_sums(kernel, x, v)
        a, b, sizes = random_batch_sums(kernel, x, v, jax.random.key(1), 30)
        assert np.all(np.asarray(sizes) == 30)
        # same sums in a different order of summation: float32 rounding only
        np.testing.assert_allclose(a, a_full, rtol=1e-5, atol=1e-5)
        np.testing.assert_allclose(b, b_full, rtol=1e-5, atol=1e-5)
        # the reweighting (N - 1) / (N (p_i - 1)) reduces to 1/N when p = N
        m_rb = interaction_means(kernel, x, v, batch=30, key=jax.random.key(2))
        np.testing.assert_allclose(m_rb[0], a_full / 30, rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(m_rb[1], b_full / 30, rtol=1e-5, atol=1e-6)


def test_random_batches_partition_the_particles():
    # One-hot values expose each particle's interaction partners: A[i, j] =
    # k(x_j, x_i) if j is in the batch of i, else 0 (the RBF kernel is > 0).
    with jax.enable_x64(True):
        n, p = 23, 5  # 23 = 4 * 5 + 3: batches 5, 5, 5 and 5 + 3 = 8 (documented)
        x = _points(11, n, 2)
        a, b, sizes = random_batch_sums(RBF(1.0), x, np.eye(n), jax.random.key(3), p)
        a, b, sizes = np.asarray(a), np.asarray(b), np.asarray(sizes)
        member = a > 0
        k_ref, g_ref = np_kernel("rbf", (1.0,), x[:, None, :], x[None, :, :])  # k_ref[j, i]
        groups = set()
        for i in range(n):
            c = np.flatnonzero(member[i])
            assert i in c and sizes[i] == len(c)
            assert np.all(member[c][:, c])  # equivalence classes: same batch for all members
            groups.add(tuple(c))
            np.testing.assert_allclose(a[i, c], k_ref[c, i], rtol=1e-12)
            np.testing.assert_allclose(b[i], g_ref[c, i].sum(axis=0), rtol=1e-10, atol=1e-14)
        assert sorted(len(g) for g in groups) == [5, 5, 5, 8]
        # a different key gives a different partition
        a2 = np.asarray(random_batch_sums(RBF(1.0), x, np.eye(n), jax.random.key(4), p)[0])
        assert not np.array_equal(a2 > 0, member)


def test_random_batch_means_are_unbiased():
    # "Random batch methods for interacting particle systems" (2020): the batch
    # interaction reweighted by (N - 1) / (p_i - 1) is unbiased for the full mean.
    # Tolerance: 4.5 Monte-Carlo standard errors per coordinate (std over keys /
    # sqrt(R)); with 2 * 12 * 2 = 48 coordinates a false alarm has probability
    # about 48 * 7e-6 < 1e-3.
    n, d, p, reps = 12, 2, 5, 4000  # 12 = 2 * 5 + 2: batch sizes 5 and 7
    x = _points(12, n, d).astype(np.float32)
    v = _points(13, n, d).astype(np.float32)
    kernel = IMQ(1.0, -0.5)
    exact = [np.asarray(t, float) for t in interaction_means(kernel, x, v)]
    keys = jax.random.split(jax.random.key(5), reps)
    est = jax.vmap(lambda k: interaction_means(kernel, x, v, batch=p, key=k))(keys)
    for e, ref in zip(est, exact):
        e = np.asarray(e, float)
        se = e.std(axis=0) / math.sqrt(reps)
        assert np.all(se > 0)
        z = (e.mean(axis=0) - ref) / se
        assert np.max(np.abs(z)) < 4.5, z


# --------------------------------------------------------------------------
# Gaussian kernel density
# --------------------------------------------------------------------------


def scipy_log_kde(y: np.ndarray, centres: np.ndarray, h: float) -> np.ndarray:
    """log mean_j N(y; x_j, h^2 I) with scipy.stats.multivariate_normal."""
    d = centres.shape[1]
    logs = np.stack([stats.multivariate_normal(mean=c, cov=h * h * np.eye(d)).logpdf(y) for c in centres])
    return np_logsumexp(logs, axis=0) - math.log(len(centres))


def test_log_kde_against_scipy_mixture():
    with jax.enable_x64(True):
        centres = _points(14, 30, 2)
        y = _points(15, 17, 2) * 1.5
        ref = scipy_log_kde(y, centres, 0.6)
        for block in (4, 17, 512):
            np.testing.assert_allclose(log_kde(y, centres, 0.6, block=block), ref, rtol=1e-11)
        # far-away points: logsumexp keeps it finite and exact
        far = y + 40.0
        np.testing.assert_allclose(log_kde(far, centres, 0.6, block=5), scipy_log_kde(far, centres, 0.6), rtol=1e-10)


def test_log_kde_gradients_against_finite_differences():
    # Central finite differences of the scipy reference (step 1e-5, float64:
    # truncation ~1e-10 and rounding ~1e-11, hence atol 1e-7).
    with jax.enable_x64(True):
        centres = _points(16, 10, 2)
        y = _points(17, 7, 2)
        h, eps = 0.8, 1e-5
        weights = np.linspace(0.5, 1.5, 7)  # a generic scalar: sum_i w_i log mu_hat(y_i)

        def objective(yy, cc, hh):
            return float(weights @ scipy_log_kde(yy, cc, hh))

        def fd(fun, arr):
            g = np.zeros_like(arr)
            for idx in np.ndindex(arr.shape):
                e = np.zeros_like(arr)
                e[idx] = eps
                g[idx] = (fun(arr + e) - fun(arr - e)) / (2 * eps)
            return g

        g_y_ref = fd(lambda a: objective(a, centres, h), y)
        g_c_ref = fd(lambda a: objective(y, a, h), centres)
        g_h_ref = (objective(y, centres, h + eps) - objective(y, centres, h - eps)) / (2 * eps)

        loss = lambda yy, cc, hh: jnp.dot(weights, log_kde(yy, cc, hh, block=3))
        g_y, g_c, g_h = jax.grad(loss, argnums=(0, 1, 2))(jnp.asarray(y), jnp.asarray(centres), h)
        np.testing.assert_allclose(g_y, g_y_ref, atol=1e-7)
        np.testing.assert_allclose(g_c, g_c_ref, atol=1e-7)
        assert float(g_h) == pytest.approx(g_h_ref, abs=1e-7)
        # the closed-form score of the density, row by row
        g_rows = grad_log_kde(y, centres, h, block=3) * weights[:, None]
        np.testing.assert_allclose(g_rows, g_y_ref, atol=1e-7)


def test_log_kde_keeps_float32():
    x = _points(18, 20, 3).astype(np.float32)
    assert log_kde(x, x, 0.5).dtype == jnp.float32
    assert grad_log_kde(x, x, jnp.float32(0.5)).dtype == jnp.float32


# --------------------------------------------------------------------------
# whitening
# --------------------------------------------------------------------------


def test_whiten_against_numpy_covariance():
    with jax.enable_x64(True):
        a = np.array([[2.0, 0.0, 0.0], [1.5, 0.5, 0.0], [-1.0, 0.3, 0.1]])
        x = _points(19, 200, 3) @ a.T + np.array([1.0, -2.0, 3.0])
        w = whiten(x, ridge=1e-3)
        cov = np.cov(x.T)  # numpy, N - 1 denominator
        cov_reg = cov + 1e-3 * np.trace(cov) / 3 * np.eye(3)
        np.testing.assert_allclose(w.chol @ w.chol.T, cov_reg, rtol=1e-10)
        np.testing.assert_allclose(w.mean, x.mean(axis=0), rtol=1e-12)
        z = np.asarray(w.apply(x))
        z_ref = np.linalg.solve(np.linalg.cholesky(cov_reg), (x - x.mean(0)).T).T
        np.testing.assert_allclose(z, z_ref, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(w.invert(z), x, rtol=1e-10)
        assert float(w.log_abs_det()) == pytest.approx(0.5 * np.linalg.slogdet(cov_reg)[1], rel=1e-10)
    # fewer particles than dimensions: still invertible and finite (float32)
    small = whiten(_points(20, 3, 6).astype(np.float32))
    assert small.chol.dtype == jnp.float32 and bool(jnp.all(jnp.isfinite(small.chol)))


# --------------------------------------------------------------------------
# memory: no N x N buffer in the compiled computations
# --------------------------------------------------------------------------


def largest_buffer(hlo_text: str) -> int:
    """Largest element count of any array shape appearing in optimised HLO text."""
    best = 1
    for m in re.finditer(r"\b(?:f|s|u|pred|bf)\d*\[([\d,]*)\]", hlo_text):
        dims = [int(t) for t in m.group(1).split(",") if t]
        best = max(best, int(np.prod(dims)) if dims else 1)
    return best


def test_blocked_computations_never_build_an_n_by_n_buffer():
    # Compiled (not run) for N = 8192: an N x N float32 matrix would be 256 MiB.
    # The largest array must be a (block, N) block = N^2 / 16 for block = 512,
    # and XLA's own temp-memory estimate must stay far below one N x N matrix.
    n, d, block = 8192, 10, 512
    spec = jax.ShapeDtypeStruct((n, d), jnp.float32)
    cases = {
        "kernel_sums": lambda x: kernel_sums(RBF(), x, x, block=block),
        "grad_log_kde": jax.grad(lambda x: jnp.sum(log_kde(x, x, 0.5, block=block))),
        "random_batch": lambda x: interaction_means(IMQ(), x, x, batch=64, key=jax.random.key(0)),
    }
    for name, fun in cases.items():
        compiled = jax.jit(fun).lower(spec).compile()
        biggest = largest_buffer(compiled.as_text())
        assert biggest <= block * n, (name, biggest)
        temp = compiled.memory_analysis().temp_size_in_bytes
        assert temp < 4 * n * n / 4, (name, temp)


# --------------------------------------------------------------------------
# kernels as pytrees: numbers traced, no recompilation for a new bandwidth
# --------------------------------------------------------------------------


def test_kernels_are_pytrees_with_numbers_as_leaves():
    leaves = jax.tree_util.tree_leaves
    assert leaves(RBF(0.5)) == [0.5]
    assert leaves(RBF()) == []  # the median rule: bandwidth=None is an empty subtree
    assert leaves(IMQ(2.0, -0.8)) == [2.0, -0.8]
    tree = jax.tree_util.tree_structure
    assert tree(RBF(0.5)) == tree(RBF(3.0)) and tree(RBF(0.5)) != tree(RBF())
    leaves_, treedef = jax.tree_util.tree_flatten(IMQ(2.0, -0.8))
    assert jax.tree_util.tree_unflatten(treedef, leaves_) == IMQ(2.0, -0.8)


@pytest.mark.parametrize(
    "first, second, kind",
    [
        ((RBF(0.5), (0.5,)), (RBF(0.9), (0.9,)), "rbf"),
        ((IMQ(1.0, -0.5), (1.0, -0.5)), (IMQ(2.0, -0.8), (2.0, -0.8)), "imq"),
    ],
)
def test_jitted_function_taking_a_kernel_compiles_once(first, second, kind):
    traces = []

    @jax.jit
    def sums(kernel, x, v):
        traces.append(1)  # runs once per trace
        return kernel_sums(kernel, x, v, block=7), kernel.value(x[0], x[1])

    with jax.enable_x64(True):
        x = _points(21, 19, 3)
        v = _points(22, 19, 2)
        for kernel, param in (first, second):
            (a, b), k01 = sums(kernel, jnp.asarray(x), jnp.asarray(v))
            a_ref, b_ref = np_sums(kind, param, x, v, x)  # brute-force numpy reference
            np.testing.assert_allclose(a, a_ref, rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(b, b_ref, rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(k01, np_kernel(kind, param, x[0], x[1])[0], rtol=1e-12)
    assert len(traces) == 1


def test_kernel_numbers_traced_through_every_blocked_function():
    traces = []

    @jax.jit
    def everything(kernel, x, v, key):
        traces.append(1)
        return (
            interaction_means(kernel, x, v, block=8),
            interaction_means(kernel, x, v, batch=5, key=key),
            random_batch_sums(kernel, x, v, key, 5),
        )

    x = _points(23, 17, 2).astype(np.float32)
    v = _points(24, 17, 2).astype(np.float32)
    key = jax.random.key(6)
    for kernel in (IMQ(1.0, -0.5), IMQ(1.5, -0.3)):
        got = everything(kernel, x, v, key)
        ref = (
            interaction_means(kernel, x, v, block=8),
            interaction_means(kernel, x, v, batch=5, key=key),
            random_batch_sums(kernel, x, v, key, 5),
        )
        for g, r in zip(jax.tree.leaves(got), jax.tree.leaves(ref)):
            assert g.dtype == r.dtype  # float32 kept with traced kernel numbers
            np.testing.assert_allclose(np.asarray(g), np.asarray(r), rtol=1e-6, atol=1e-7)
    assert len(traces) == 1


def test_vmapped_sweep_over_bandwidths():
    hs = np.array([0.4, 0.8, 1.6])
    with jax.enable_x64(True):
        stacked = jax.tree.map(lambda *h: jnp.asarray(h), *[RBF(h) for h in hs])  # float64 leaves
        x = _points(25, 13, 2)
        v = _points(26, 13, 2)
        a, b = jax.jit(jax.vmap(lambda k: kernel_sums(k, x, v, block=4)))(stacked)
        for i, h in enumerate(hs):
            a_ref, b_ref = np_sums("rbf", (h,), x, v, x)
            np.testing.assert_allclose(a[i], a_ref, rtol=1e-10, atol=1e-12)
            np.testing.assert_allclose(b[i], b_ref, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize(
    "make, exc, name",
    [
        (lambda: RBF(math.inf), ValueError, "bandwidth"),
        (lambda: RBF(math.nan), ValueError, "bandwidth"),
        (lambda: RBF("0.5"), TypeError, "bandwidth"),
        (lambda: RBF(True), TypeError, "bandwidth"),
        (lambda: IMQ(scale=math.inf), ValueError, "scale"),
        (lambda: IMQ(scale="1"), TypeError, "scale"),
        (lambda: IMQ(power=-math.inf), ValueError, "power"),
        (lambda: IMQ(power=math.nan), ValueError, "power"),
        (lambda: IMQ(power=False), TypeError, "power"),
        (lambda: log_kde(np.zeros((3, 2)), np.zeros((3, 2)), math.inf), ValueError, "bandwidth"),
        (lambda: log_kde(np.zeros((3, 2)), np.zeros((3, 2)), "0.5"), TypeError, "bandwidth"),
        (lambda: grad_log_kde(np.zeros((3, 2)), np.zeros((3, 2)), True), TypeError, "bandwidth"),
        (lambda: kernel_sums("rbf", np.zeros((3, 2)), np.zeros((3, 2))), TypeError, "kernel"),
        (lambda: kernel_sums(RBF, np.zeros((3, 2)), np.zeros((3, 2))), TypeError, "kernel"),
        (lambda: kernel_sums(RBF(), np.zeros((3, 2)), np.zeros((3, 2)), block=2.0), TypeError, "block"),
        (lambda: interaction_means(IMQ(), np.zeros((3, 2)), np.zeros((3, 2)), batch=True), TypeError, "batch"),
        (lambda: median_distance(np.zeros((3, 2)), max_points=5.0), TypeError, "max_points"),
        (lambda: whiten(np.zeros((3, 2)), ridge=math.inf), ValueError, "ridge"),
    ],
)
def test_non_finite_strings_and_bools_are_refused(make, exc, name):
    with pytest.raises(exc, match=rf"^{name}: expected .*; got "):
        make()
