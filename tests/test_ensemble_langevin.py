"""Affine-invariant interacting Langevin (EnsembleLangevin).

Source of the properties checked: "Affine invariant interacting Langevin dynamics for
Bayesian inference" (SIAM J. Appl. Dyn. Syst., 2020): the dynamics are affine invariant, so
their speed does not depend on the conditioning of the target.
"""

from functools import partial

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost import EnsembleLangevin


def _banana(x, data):
    """A non-Gaussian target seen through the affine map y = A x + b: pi_A(y) = pi(A^-1 (y - b))."""
    u = jnp.linalg.solve(data["A"], x - data["b"])
    return jst.norm.logpdf(u[0]) + jst.norm.logpdf(u[1], 0.5 * u[0] ** 2, 0.5)


def test_affine_equivariance_exact():
    """Exact algebraic property (paper above): run on pi_A from A X0 + b with the same keys and
    the result is A X + b. In float64 the two runs agree to rounding error (1e-9 relative).
    A block size smaller than N exercises the blocked noise."""
    with jax.enable_x64(True):
        a = jnp.array([[2.0, 0.5], [-0.3, 0.7]])
        b = jnp.array([1.0, -2.0])
        ident = {"A": jnp.eye(2), "b": jnp.zeros(2)}
        moved = {"A": a, "b": b}
        x0 = jax.random.normal(jax.random.key(0), (300, 2), dtype=jnp.float64)
        stepper = EnsembleLangevin(step_size=0.05, block=128)
        r1 = fp.run(fp.Target(_banana, data=ident), stepper, x0, key=jax.random.key(5), steps=100, progress=False)
        r2 = fp.run(
            fp.Target(_banana, data=moved), stepper, x0 @ a.T + b, key=jax.random.key(5), steps=100, progress=False
        )
        x, y = np.asarray(r1.unconstrained), np.asarray(r2.unconstrained)
        assert x.dtype == np.float64
        expected = x @ np.asarray(a).T + np.asarray(b)
        assert np.max(np.abs(y - expected)) < 1e-9 * np.max(np.abs(expected))
        # the flow moved the particles (the check is not of a standing ensemble)
        assert np.max(np.abs(x - np.asarray(x0))) > 1.0


def _whitened_cov_error(x, root_inv, centre):
    """|| Sigma^-1/2 C Sigma^-1/2 - I ||_F for the ensemble covariance C (1/N)."""
    z = (x - centre) @ root_inv.T
    c = z.T @ z / x.shape[0]
    return jnp.linalg.norm(c - jnp.eye(x.shape[1]))


def _gaussian_log_p(x, data):
    return jst.multivariate_normal.logpdf(x, data["mean"], data["sigma"])


_STEPPER = EnsembleLangevin(step_size=0.02)


@partial(jax.jit, static_argnames=("steps",))
def _trajectory(stepper, target, x0, key, root_inv, h, steps):
    """Whitened covariance error after each of ``steps`` steps of length ``h`` (one compiled
    scan)."""
    mean = target.data["mean"]

    def body(st, t):
        st, _ = stepper.advance(target, st, jax.random.fold_in(key, t), h)
        return st, _whitened_cov_error(st.x, root_inv, mean)

    return jax.lax.scan(body, stepper.start(target, x0, key), jnp.arange(steps))[1]


def _steps_to_reach(cond, seed, n=500, steps=150, tol=0.3):
    """Steps until the whitened covariance error of the ensemble drops below ``tol`` on a 2-D
    Gaussian of condition number ``cond`` (rotated by 30 degrees), from an over-dispersed and
    off-centre start N(mean + Sigma^1/2 (2, -2), 9 Sigma) (the same law in whitened
    coordinates whatever ``cond``) and the given seed."""
    t = np.deg2rad(30.0)
    rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    root = rot @ np.diag([1.0, 1.0 / np.sqrt(cond)])  # Sigma = root root^T
    data = {"mean": jnp.asarray([1.0, -1.0], jnp.float32), "sigma": jnp.asarray(root @ root.T, jnp.float32)}
    z0 = jax.random.normal(jax.random.key(seed), (n, 2))
    x0 = data["mean"] + (3.0 * z0 + jnp.array([2.0, -2.0])) @ jnp.asarray(root, jnp.float32).T
    target, x0 = fp.Target(_gaussian_log_p, data=data).bind(x0)
    err = np.asarray(
        _trajectory(
            _STEPPER,
            target,
            x0,
            jax.random.key(100 + seed),
            jnp.asarray(np.linalg.inv(root), jnp.float32),
            jnp.asarray(_STEPPER.step_size, jnp.float32),
            steps,
        )
    )
    below = np.nonzero(err < tol)[0]
    assert below.size, f"never reached the tolerance; final error {err[-1]:.3g}"
    return int(below[0]) + 1, err


def test_speed_independent_of_conditioning():
    """Affine invariance (paper above) makes the whitened covariance error evolve the same way
    whatever the target's condition number: steps to reach a fixed error (0.3 in Frobenius norm,
    from about 12.7 at the start) on Gaussians with condition numbers 1 and 10^4 agree within 20%.
    Each pair of runs uses the same start (in whitened coordinates) and keys, so in exact
    arithmetic the paths coincide; what is checked is that float32 arithmetic on the
    ill-conditioned target (score and ensemble covariance spanning four orders of magnitude)
    keeps that. Two seeds. The stationary error is about 0.1 (Euler bias: variance about
    1 + h/2 per whitened direction; Monte-Carlo noise of N = 500: about sqrt(3/N) = 0.08),
    below 0.3."""
    for seed in (1, 2):
        n1, _ = _steps_to_reach(1.0, seed=seed)
        n2, err2 = _steps_to_reach(1e4, seed=seed)
        assert abs(n1 - n2) <= 0.2 * max(n1, n2), (seed, n1, n2)
        assert n1 > 20  # the start really was far from the target
        # and it stays converged (no instability on the ill-conditioned target)
        assert np.max(err2[-50:]) < 0.3, err2[-50:]


def test_unpreconditioned_langevin_is_slow_on_ill_conditioned_target():
    """Contrast that shows the previous check can fail: unadjusted Langevin must use
    h < 2 / L = 2e-4 on the condition-10^4 target (stability bound of the explicit step,
    "Exponential convergence of Langevin distributions and their discrete approximations"
    (1996)); at h = 1e-4 over the same 150 steps its flow time (0.015) is far too short to
    contract the wide direction, so the whitened error stays large."""
    t = np.deg2rad(30.0)
    rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    root = rot @ np.diag([1.0, 1e-2])
    sigma = root @ root.T

    def log_p(x):
        return jst.multivariate_normal.logpdf(x, jnp.array([1.0, -1.0]), jnp.asarray(sigma, jnp.float32))

    x0 = 3.0 * jax.random.normal(jax.random.key(2), (1000, 2)) @ jnp.asarray(root, jnp.float32).T
    r = fp.run(log_p, fp.Langevin(step_size=1e-4), x0, key=jax.random.key(3), steps=150, progress=False)
    err = _whitened_cov_error(
        jnp.asarray(r.unconstrained), jnp.asarray(np.linalg.inv(root), jnp.float32), jnp.array([1.0, -1.0])
    )
    assert float(err) > 3.0


def test_gaussian_stationary_moments():
    """On a Gaussian target the Euler step of the preconditioned flow with C ~ Sigma is, in
    whitened coordinates, with C = v Sigma at stationarity, the AR(1) chain
    z' = (1 - h v') z + sqrt(2 h v) xi, v' = v - (d+1)/N (the finite-N term), whose stationary
    variance v solves v' (2 - h v') = 2, i.e. v = (1 - sqrt(1 - 2h)) / h + (d+1)/N (same algebra
    as the unadjusted-Langevin bias formula of "Exponential convergence of Langevin distributions
    and their discrete approximations" (1996), made self-consistent); the mean is unbiased. With
    h = 0.1, N = 1000 that is 1.0587. The particles are not independent (they share C),
    so the Monte-Carlo band is taken generously as 5 x the iid standard errors of N = 1000
    draws (mean: 1/sqrt(N) ~ 0.032; variance: sqrt(2/N) v ~ 0.047)."""
    h, n = 0.1, 1000
    sigma = np.array([[2.0, 0.9], [0.9, 1.0]])
    mean = np.array([0.5, -0.5])

    def log_p(x):
        return jst.multivariate_normal.logpdf(x, jnp.asarray(mean, jnp.float32), jnp.asarray(sigma, jnp.float32))

    x0 = jax.random.normal(jax.random.key(7), (n, 2))
    r = fp.run(log_p, EnsembleLangevin(step_size=h), x0, key=jax.random.key(8), steps=150, progress=False)
    root_inv = np.linalg.inv(np.linalg.cholesky(sigma))
    z = (r.unconstrained - mean) @ root_inv.T
    v = (1.0 - np.sqrt(1.0 - 2.0 * h)) / h + 3.0 / n
    assert np.all(np.abs(z.mean(axis=0)) < 5 / np.sqrt(n))
    cz = np.cov(z.T)
    assert np.all(np.abs(np.diag(cz) - v) < 5 * v * np.sqrt(2 / n)), np.diag(cz)
    assert abs(cz[0, 1]) < 5 * v / np.sqrt(n)


def test_finite_n_correction_keeps_product_measure_invariant():
    """The (d+1)/N (x_i - m) drift is what makes pi x ... x pi invariant for the dynamics with
    the ensemble-covariance diffusion (the divergence of C(X) in particle i's coordinates; paper
    above). With N = 5 particles in d = 1 the term is large (0.4 (x_i - m)). Started exactly at
    pi^N = N(0, 1)^5, M = 2000 independent ensembles run 300 steps of h = 0.02; the second
    moment E[x^2] must stay 1. Tolerance: 4.5 Monte-Carlo standard errors (computed from the M
    independent per-ensemble averages) plus 2h = 0.04 for the O(h) bias of the Euler step
    (h/2 ~ 0.01 for a Gaussian with fixed C). Without the term the ensembles contract
    (E[x^2] about 0.6 in this setting), with the opposite sign they would spread."""
    n, m, h, steps = 5, 2000, 0.02, 300

    def log_p(x):
        return jnp.sum(jst.norm.logpdf(x))

    target, _ = fp.Target(log_p).bind(jnp.zeros((n, 1)))
    stepper = EnsembleLangevin(step_size=h)

    @jax.jit
    def run_all(x0s, keys):
        def one(x0, key):
            def body(st, t):
                return stepper.advance(target, st, jax.random.fold_in(key, t), jnp.asarray(h, x0.dtype))[0], None

            return jax.lax.scan(body, stepper.start(target, x0, key), jnp.arange(steps))[0].x

        return jax.vmap(one)(x0s, keys)

    x0s = jax.random.normal(jax.random.key(0), (m, n, 1))
    x = np.asarray(run_all(x0s, jax.random.split(jax.random.key(1), m)))
    per_ensemble = np.mean(x[..., 0] ** 2, axis=1)
    se = np.std(per_ensemble, ddof=1) / np.sqrt(m)
    assert abs(per_ensemble.mean() - 1.0) < 4.5 * se + 2 * h, (per_ensemble.mean(), se)


def test_bad_arguments():
    with pytest.raises(ValueError, match="step_size"):
        EnsembleLangevin(step_size=-1.0)
    with pytest.raises(ValueError, match="block"):
        EnsembleLangevin(step_size=0.1, block=0)
    with pytest.raises(TypeError, match="block: expected an integer"):
        EnsembleLangevin(block=2.5)
    with pytest.raises(ValueError, match="step_size: expected"):
        EnsembleLangevin(step_size=float("inf"))
    assert EnsembleLangevin.stochastic is True
    assert jax.tree_util.tree_leaves(EnsembleLangevin(step_size=0.3, block=7)) == [0.3]
