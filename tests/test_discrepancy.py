"""Tests of flowpost.diagnostics: the kernel Stein discrepancy (KSD).

Source throughout: "Measuring sample quality with kernels" (2017) for the
Stein kernel and the IMQ choice; the expectation of a V-statistic on exact
samples, E[V] = E k_p(x, x) / N + (1 - 1/N) E k_p(x, y) (standard property of
V-statistics), with E k_p(x, y) = 0 for independent x, y ~ p (Stein's identity).
"""

from __future__ import annotations

import math
import re
from functools import partial

import jax
import jax.numpy as jnp
import numpy as np
import pytest
from scipy import integrate, stats

from flowpost.diagnostics import squared_stein_discrepancy, stein_discrepancy, stein_kernel
from flowpost.numerics import IMQ, RBF

# --------------------------------------------------------------------------
# independent reference: Stein kernel by automatic differentiation
# --------------------------------------------------------------------------


def imq_value(c: float, b: float):
    """(c^2 + |x - y|^2)^b, written here independently of flowpost.kernels."""
    return lambda x, y: (c * c + jnp.sum((x - y) ** 2)) ** b


def rbf_value(h: float):
    return lambda x, y: jnp.exp(-jnp.sum((x - y) ** 2) / (2 * h * h))


def autodiff_stein_kernel(k):
    """k_p(x, y) = s_x.s_y k + s_x.grad_y k + s_y.grad_x k + tr grad_x grad_y k,
    the definition in "Measuring sample quality with kernels" (2017), by jax.grad/jacfwd."""
    gx = jax.grad(k, argnums=0)
    gy = jax.grad(k, argnums=1)
    gxy = jax.jacfwd(gx, argnums=1)

    def kp(x, y, sx, sy):
        return jnp.dot(sx, sy) * k(x, y) + jnp.dot(sx, gy(x, y)) + jnp.dot(sy, gx(x, y)) + jnp.trace(gxy(x, y))

    return kp


def brute_force_vstat(k, x, s):
    """(1/N^2) sum_{i,j} k_p(x_i, x_j) over the full N x N matrix (small N only)."""
    kp = autodiff_stein_kernel(k)

    @jax.jit
    def vstat(x, s):
        mat = jax.vmap(lambda xi, si: jax.vmap(lambda xj, sj: kp(xi, xj, si, sj))(x, s))(x, s)
        return jnp.mean(mat)

    return float(vstat(x, s))


CASES = [
    (IMQ(1.0, -0.5), imq_value(1.0, -0.5)),
    (IMQ(0.5, -0.3), imq_value(0.5, -0.3)),
    (IMQ(2.0, -0.9), imq_value(2.0, -0.9)),
    (RBF(0.8), rbf_value(0.8)),
]


def test_closed_form_stein_kernel_matches_autodiff():
    with jax.enable_x64(True):
        rng = np.random.default_rng(0)
        x, y, sx, sy = (jnp.asarray(rng.normal(size=(20, 3))) for _ in range(4))
        y = y.at[0].set(x[0])  # include a diagonal pair (r2 = 0)
        for kernel, k in CASES:
            ref = jax.jit(jax.vmap(autodiff_stein_kernel(k)))(x, y, sx, sy)
            got = stein_kernel(x, y, sx, sy, kernel)
            np.testing.assert_allclose(got, ref, rtol=1e-11, atol=1e-13)


def test_blocked_vstat_matches_brute_force():
    with jax.enable_x64(True):
        rng = np.random.default_rng(1)
        x = jnp.asarray(rng.normal(size=(29, 3)) + 2.0)
        s = jnp.asarray(rng.normal(size=(29, 3)))  # any vectors: the formula does not need a true score
        for kernel, k in CASES[:2]:
            ref = brute_force_vstat(k, x, s)
            # blocks of 1, 4 (does not divide 29), N, > N; one size only for the
            # second kernel to keep compilation time down
            for block in (1, 4, 29, 64) if kernel == IMQ() else (4,):
                got = float(squared_stein_discrepancy(x, s, kernel, block=block))
                assert got == pytest.approx(ref, rel=1e-11)
        # RBF with an explicit bandwidth through `scale`
        got = float(squared_stein_discrepancy(x, s, RBF(), block=8, scale=0.8))
        assert got == pytest.approx(brute_force_vstat(rbf_value(0.8), x, s), rel=1e-11)
        assert float(stein_discrepancy(x, s, block=8)) == pytest.approx(
            math.sqrt(brute_force_vstat(imq_value(1.0, -0.5), x, s)), rel=1e-11
        )


@partial(jax.jit, static_argnums=(1, 2))
def _vstats_jit(mean, n, reps, key):
    def one(k):
        x = mean + jax.random.normal(k, (n, mean.shape[0]), jnp.float32)
        return squared_stein_discrepancy(x, -x, block=400)

    return jax.vmap(one)(jax.random.split(key, reps))


def _vstats(mean: np.ndarray, n: int, reps: int, seed: int) -> np.ndarray:
    """V-statistics of `reps` independent N-samples of N(mean, I), score of N(0, I) (-x)."""
    v = _vstats_jit(jnp.asarray(mean, jnp.float32), n, reps, jax.random.key(seed))
    return np.asarray(v, float)


REPS = 24
SIZES = (100, 400, 1600)


def test_vstat_decays_like_one_over_n_for_exact_samples():
    # For x_i ~ N(0, I_2) (score -x) and IMQ(c=1, beta=-1/2):
    # k_p(x, x) = |x|^2 + d (module docstring), so E[V] = E k_p(x, x) / N = 2d / N = 4 / N
    # exactly (V-statistic bias + Stein's identity, "Measuring sample quality with
    # kernels" (2017)).  Tolerances come from the spread over the REPS replicates:
    # each mean within 4 standard errors of 4/N, and the least-squares slope of
    # log mean(V) against log N within 4 standard errors (delta method:
    # se(log m) = se(m) / m) of -1.
    log_n, log_m, se_log = [], [], []
    for n in SIZES:
        v = _vstats(np.zeros(2), n, REPS, seed=n)
        m, se = v.mean(), v.std(ddof=1) / math.sqrt(REPS)
        assert abs(m - 4.0 / n) < 4 * se, (n, m, se)
        log_n.append(math.log(n))
        log_m.append(math.log(m))
        se_log.append(se / m)
    log_n, log_m, se_log = map(np.asarray, (log_n, log_m, se_log))
    centred = log_n - log_n.mean()
    slope = float(centred @ log_m / (centred @ centred))
    se_slope = float(math.sqrt(np.sum(centred**2 * se_log**2)) / (centred @ centred))
    assert se_slope < 0.1  # the check must be able to fail: the spread is small enough
    assert abs(slope + 1.0) < 4 * se_slope, (slope, se_slope)


def population_ksd2_shifted(mu2: float, d: int = 2, c: float = 1.0, b: float = -0.5) -> float:
    """Population KSD^2 of q = N(mu, I) against p = N(0, I), IMQ kernel.

    With s(x) = -x: (s_y - s_x).(x - y) = r2, and for x, y ~ q independent,
    z = x - y ~ N(0, 2I), E[x.y | z] = |mu|^2 + d/2 - r2/4, r2 = |z|^2, r2 / 2 ~ chi2_d.
    One-dimensional integral by scipy.integrate.quad over the chi-square law
    (at mu = 0 it returns 0 to 1e-15: Stein's identity).
    """

    def integrand(r2):
        u = c * c + r2
        kp = (
            u**b * (mu2 + d / 2 - r2 / 4)
            + 2 * b * u ** (b - 1) * r2
            - 2 * d * b * u ** (b - 1)
            - 4 * b * (b - 1) * r2 * u ** (b - 2)
        )
        return kp * stats.chi2.pdf(r2 / 2, d) / 2

    return integrate.quad(integrand, 0, np.inf)[0]


def test_vstat_stays_away_from_zero_for_a_shifted_ensemble():
    # Samples of N((1, 0), I) scored against N(0, I).  Reference: population KSD^2
    # (scipy quadrature, about 0.546) and E[V] = (1 - 1/N) KSD^2 + E k_p(x, x) / N with
    # E k_p(x, x) = E|x|^2 + d = |mu|^2 + 2d = 5.  Checks: the mean over REPS replicates
    # within 4 standard errors of E[V]; every single replicate above half the
    # population value (bounded away from zero; the replicate spread is at most
    # 0.11 at N = 100, so this bound sits more than 2 sd below E[V]).
    assert abs(population_ksd2_shifted(0.0)) < 1e-12  # sanity of the reference (Stein identity)
    pop = population_ksd2_shifted(1.0)
    for n in SIZES:
        v = _vstats(np.array([1.0, 0.0]), n, REPS, seed=10 + n)
        expected = (1 - 1 / n) * pop + 5.0 / n
        se = v.std(ddof=1) / math.sqrt(REPS)
        assert abs(v.mean() - expected) < 4 * se, (n, v.mean(), expected, se)
        assert v.min() > 0.5 * pop, (n, v.min())


def test_subset_option():
    # A uniform random subset of an exact sample is an exact sample of size m, so
    # E[V_m] = 4 / m (same derivation as above); the full ensemble would give 4 / N.
    # Tolerance: 4 standard errors over the keys.
    n, m, reps = 1600, 100, 64
    x = jax.random.normal(jax.random.key(7), (n, 2), jnp.float32)
    keys = jax.random.split(jax.random.key(8), reps)
    v = np.asarray(jax.vmap(lambda k: squared_stein_discrepancy(x, -x, subset=m, key=k))(keys), float)
    se = v.std(ddof=1) / math.sqrt(reps)
    assert abs(v.mean() - 4.0 / m) < 4 * se, (v.mean(), se)
    assert len(np.unique(v)) == reps  # different keys pick different subsets
    # subset >= N means all particles
    full = squared_stein_discrepancy(x, -x)
    assert float(squared_stein_discrepancy(x, -x, subset=n)) == float(full)


def test_dtype_and_errors():
    x = jax.random.normal(jax.random.key(9), (50, 3), jnp.float32)
    assert stein_discrepancy(x, -x).dtype == jnp.float32
    with pytest.raises(ValueError, match="scores"):
        stein_discrepancy(x, -x[:, :2])
    with pytest.raises(ValueError, match="key"):
        stein_discrepancy(x, -x, subset=10)
    with pytest.raises(ValueError, match="subset"):
        stein_discrepancy(x, -x, subset=0)
    with pytest.raises(ValueError, match="x"):
        stein_discrepancy(x[0], -x[0])
    with pytest.raises(TypeError, match="kernel"):
        stein_discrepancy(x, -x, "imq")


def test_no_n_by_n_buffer():
    # Compiled (not run) for N = 8192: the largest array must be one (block, N)
    # block (N^2 / 16 for block 512), never N x N (256 MiB in float32).
    n, block = 8192, 512
    spec = jax.ShapeDtypeStruct((n, 10), jnp.float32)
    compiled = jax.jit(lambda x: squared_stein_discrepancy(x, -x, block=block)).lower(spec).compile()
    best = 1
    for mt in re.finditer(r"\b(?:f|s|u|pred|bf)\d*\[([\d,]*)\]", compiled.as_text()):
        dims = [int(t) for t in mt.group(1).split(",") if t]
        best = max(best, int(np.prod(dims)) if dims else 1)
    assert best <= block * n, best
    assert compiled.memory_analysis().temp_size_in_bytes < n * n


def test_kernel_is_a_traced_argument_of_the_discrepancy():
    # The kernel is a pytree: a new IMQ scale / power or RBF bandwidth does not recompile.
    traces = []

    @jax.jit
    def vstat(kernel, x, s):
        traces.append(1)  # runs once per trace
        return squared_stein_discrepancy(x, s, kernel, block=8)

    with jax.enable_x64(True):
        rng = np.random.default_rng(11)
        x = jnp.asarray(rng.normal(size=(21, 2)))
        s = jnp.asarray(rng.normal(size=(21, 2)))
        for kernel, k in CASES[:3]:  # three IMQ kernels, one compiled program
            got = float(vstat(kernel, x, s))
            assert got == pytest.approx(brute_force_vstat(k, x, s), rel=1e-11)
        assert len(traces) == 1
        traces.clear()
        for h in (0.8, 1.3):
            got = float(vstat(RBF(h), x, s))
            assert got == pytest.approx(brute_force_vstat(rbf_value(h), x, s), rel=1e-11)
        assert len(traces) == 1


def test_stein_kernel_refuses_a_non_kernel_by_name():
    x = jnp.zeros((4, 2))
    with pytest.raises(TypeError, match="kernel"):
        stein_kernel(x, x, x, x, "imq")
