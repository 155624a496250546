"""Tests of the optax-based inner minimiser (flowpost.numerics.minimise).

References used below (never computed by the code under test):
- numpy.linalg.solve for the minimiser A^{-1} b of 0.5 x^T A x - b^T x;
- scipy.optimize.rosen / rosen_der (the Rosenbrock function and its gradient)
  and scipy.optimize.minimize(method="BFGS") for its minimiser;
- the textbook contraction of gradient descent on an isotropic quadratic
  ("Numerical Optimization" (2006), ch. 3): with step lr and curvature a the
  error is multiplied by exactly (1 - lr a) per step;
- a host-side counter (jax.debug.callback inside the objective) for the number
  of value-and-gradient evaluations.
"""

from __future__ import annotations

import math

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import scipy.optimize

from flowpost.numerics import InnerSolver, SolveReport, minimise


def spd_matrix(d: int, cond: float, seed: int) -> np.ndarray:
    """Random SPD matrix with eigenvalues geometrically spaced in [1, cond]."""
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(d, d)))
    return (q * np.geomspace(1.0, cond, d)) @ q.T


def rosen_jax(x):
    """Rosenbrock function written in jax.numpy (checked against scipy below)."""
    return jnp.sum(100.0 * (x[1:] - x[:-1] ** 2) ** 2 + (1.0 - x[:-1]) ** 2)


# Standard starting point of the scipy.optimize tutorial for the Rosenbrock
# function (common practice).
ROSEN_X0 = np.array([1.3, 0.7, 0.8, 1.9, 1.2])


def test_quadratic_float32_keeps_dtype():
    d = 6
    a = spd_matrix(d, 100.0, seed=2)
    b = np.random.default_rng(3).normal(size=d)
    aj, bj = jnp.asarray(a, jnp.float32), jnp.asarray(b, jnp.float32)
    # float32 gradient rounding is about cond * eps32 * |x| ~ 1e-5 here, so
    # tol = 1e-4 is attainable (derived from float32 eps = 1.2e-7).
    tol = 1e-4
    x, rep = jax.jit(
        lambda x0: minimise(InnerSolver(tol=tol, max_iters=100), lambda x: 0.5 * x @ (aj @ x) - bj @ x, x0)
    )(jnp.zeros(d, jnp.float32))
    assert x.dtype == jnp.float32
    assert rep.residual.dtype == jnp.float32
    assert bool(rep.converged)
    reference = np.linalg.solve(a, b)  # numpy.linalg.solve
    # |x - x*|_2 <= sqrt(d) * tol / lambda_min with lambda_min = 1.
    assert np.linalg.norm(np.asarray(x, float) - reference) <= math.sqrt(d) * tol


def test_rosenbrock_matches_scipy_and_counts_evaluations():
    rng = np.random.default_rng(4)
    calls = []

    def counted(x):
        # host-side counter: runs once per value-and-gradient evaluation
        jax.debug.callback(lambda: calls.append(1))
        return rosen_jax(x)

    with jax.enable_x64(True):
        # The jax objective is scipy's Rosenbrock function (scipy.optimize.rosen,
        # rosen_der as the independent reference for value and gradient).
        for _ in range(3):
            p = rng.normal(size=5)
            assert float(rosen_jax(jnp.asarray(p))) == pytest.approx(scipy.optimize.rosen(p), rel=1e-12)
            np.testing.assert_allclose(
                np.asarray(jax.grad(rosen_jax)(jnp.asarray(p))), scipy.optimize.rosen_der(p), rtol=1e-12
            )
        tol = 1e-8
        x, rep = jax.jit(minimise, static_argnums=(0, 1))(
            InnerSolver(tol=tol, max_iters=300), counted, jnp.asarray(ROSEN_X0)
        )
        jax.block_until_ready(rep)
        jax.effects_barrier()
    x = np.asarray(x)
    assert bool(rep.converged) and int(rep.iters) < 300
    assert np.max(np.abs(scipy.optimize.rosen_der(x))) <= tol * 1.01
    # Known global minimum (1, ..., 1) of the Rosenbrock function (textbook).
    np.testing.assert_allclose(x, np.ones(5), atol=1e-6)
    ref = scipy.optimize.minimize(
        scipy.optimize.rosen, ROSEN_X0, jac=scipy.optimize.rosen_der, method="BFGS", options={"gtol": 1e-10}
    )
    assert ref.success
    np.testing.assert_allclose(x, ref.x, atol=1e-6)
    # grad_evals (read from the optax line-search state) equals the host count,
    # and is at least one per iteration plus the evaluation at x0.
    assert int(rep.grad_evals) == len(calls)
    assert int(rep.grad_evals) >= int(rep.iters) + 1


def test_tiny_iteration_cap_sets_capped():
    tol = 1e-8
    with jax.enable_x64(True):
        x, rep = jax.jit(minimise, static_argnums=(0, 1))(
            InnerSolver(tol=tol, max_iters=3), rosen_jax, jnp.asarray(ROSEN_X0)
        )
    assert int(rep.iters) == 3
    assert bool(rep.capped) and not bool(rep.converged)
    # Residual = max-abs gradient at the returned point (scipy.optimize.rosen_der).
    r_ref = np.max(np.abs(scipy.optimize.rosen_der(np.asarray(x))))
    assert float(rep.residual) == pytest.approx(r_ref, rel=1e-10)
    assert float(rep.residual) > tol


def test_first_order_method_counts_one_eval_per_iteration():
    a = jnp.asarray([1.0, 2.0, 4.0])
    solver = InnerSolver(method="adam", learning_rate=0.05, tol=1e-4, max_iters=2000)
    x, rep = jax.jit(lambda x0: minimise(solver, lambda x: 0.5 * jnp.sum(a * (x - 1.0) ** 2), x0))(jnp.zeros(3))
    assert bool(rep.converged)
    assert int(rep.grad_evals) == int(rep.iters) + 1
    # minimiser is x = 1 (closed form); |x - 1| <= max|grad| / min(a) = tol.
    np.testing.assert_allclose(np.asarray(x), np.ones(3), atol=1e-4)


def test_quadratic_matches_linear_solve_vmapped_over_right_hand_sides():
    # 0.5 x^T A x - b^T x with A SPD, condition number 100, for 100 vectors b
    # (one problem per row under jax.vmap); reference numpy.linalg.solve.
    d, n, tol = 10, 100, 1e-10
    a = spd_matrix(d, 100.0, seed=5)  # eigenvalues in [1, 100]
    b = np.random.default_rng(6).normal(size=(n, d))
    b[:4] = 0.0  # x0 = 0 is already the solution: zero iterations for these rows
    with jax.enable_x64(True):
        aj = jnp.asarray(a)
        solver = InnerSolver(tol=tol, max_iters=300)

        def solve(bi):
            return minimise(solver, lambda x: 0.5 * x @ (aj @ x) - bi @ x, jnp.zeros(d))

        x, rep = jax.jit(jax.vmap(solve))(jnp.asarray(b))
    x = np.asarray(x)
    assert x.shape == (n, d) and rep.iters.shape == (n,)
    reference = np.linalg.solve(a, b.T).T  # numpy.linalg.solve, row by row
    assert np.all(np.asarray(rep.converged)) and not np.any(np.asarray(rep.capped))
    # The reported residual is the max-abs gradient A x - b: recompute it with numpy.
    grad_np = np.max(np.abs(x @ a - b), axis=1)
    assert np.max(grad_np) <= tol * 1.01 + 1e-13
    np.testing.assert_allclose(np.asarray(rep.residual), grad_np, rtol=1e-3, atol=1e-13)
    # Error bound for a strongly convex quadratic (lambda_min = 1):
    # |x - x*|_2 <= |grad|_2 / lambda_min <= sqrt(d) * max|grad|.
    assert np.max(np.linalg.norm(x - reference, axis=1)) <= math.sqrt(d) * tol * 1.01 + 1e-12
    iters = np.asarray(rep.iters)
    evals = np.asarray(rep.grad_evals)
    np.testing.assert_array_equal(iters[:4], 0)
    np.testing.assert_array_equal(evals[:4], 1)
    assert np.all(iters[4:] >= 1)
    assert len(np.unique(iters[4:])) > 1  # counts are per row, not the batch maximum
    assert np.all(evals >= iters + 1)


def test_vmap_iteration_counts_match_gradient_descent_theory():
    # f_i(x) = 0.5 a_i |x - c_i|^2 with plain gradient descent (optax.sgd, step lr)
    # from x0 = 0: max|grad| after k steps is a_i |1 - lr a_i|^k max|c_i| exactly
    # (textbook contraction, "Numerical Optimization" (2006), ch. 3), so the
    # number of iterations to reach tol is known in closed form for every row.
    n, d, lr, tol = 100, 3, 0.5, 1e-8
    rng = np.random.default_rng(7)
    curv = rng.uniform(0.1, 3.0, size=n)
    c = rng.normal(size=(n, d))
    m = np.max(np.abs(c), axis=1)
    rho = np.abs(1.0 - lr * curv)
    k_real = np.log(tol / (curv * m)) / np.log(rho)
    expected = np.ceil(k_real).astype(int)
    # skip rows whose exact count sits on an integer boundary (rounding could flip it)
    clear = np.abs(k_real - np.round(k_real)) > 1e-6
    assert clear.sum() > 90
    with jax.enable_x64(True):
        solver = InnerSolver(method="sgd", learning_rate=lr, tol=tol, max_iters=2000)

        def solve(ai, ci):
            return minimise(solver, lambda x: 0.5 * ai * jnp.sum((x - ci) ** 2), jnp.zeros(d))

        x, rep = jax.jit(jax.vmap(solve))(jnp.asarray(curv), jnp.asarray(c))
    iters = np.asarray(rep.iters)
    assert expected.max() > 5 * max(expected.min(), 1)  # the rows genuinely differ
    np.testing.assert_array_equal(iters[clear], expected[clear])
    np.testing.assert_array_equal(np.asarray(rep.grad_evals), iters + 1)
    np.testing.assert_allclose(np.asarray(x), c, atol=tol / curv.min() * 1.01)


def test_pytree_input_and_structure():
    target = {"a": jnp.asarray([1.0, -2.0]), "b": jnp.asarray([[0.5, 3.0, -1.0]])}

    def fun(p):
        return sum(jnp.sum((p[k] - target[k]) ** 2) for k in target)

    x0 = jax.tree.map(jnp.zeros_like, target)
    x, rep = jax.jit(minimise, static_argnums=(0, 1))(InnerSolver(tol=1e-5), fun, x0)
    assert jax.tree.structure(x) == jax.tree.structure(target)
    for k in target:  # closed-form minimiser: x = target
        assert x[k].shape == target[k].shape and x[k].dtype == jnp.float32
        np.testing.assert_allclose(np.asarray(x[k]), np.asarray(target[k]), atol=1e-5)
    assert isinstance(rep, SolveReport) and bool(rep.converged)


def test_nonfinite_objective_stops_immediately():
    # log of a negative number is NaN (IEEE 754) while its gradient 1/x is finite:
    # the loop must stop on the non-finite value rather than run to the cap.
    # (the stopping rule is shared by all methods; sgd keeps the compile cheap)
    solver = InnerSolver(method="sgd", learning_rate=0.1)
    x, rep = jax.jit(minimise, static_argnums=(0, 1))(solver, _log_sum, -jnp.ones(2))
    assert int(rep.iters) == 0 and int(rep.grad_evals) == 1
    assert not bool(rep.converged) and not bool(rep.capped)
    np.testing.assert_array_equal(np.asarray(x), -np.ones(2))


def _log_sum(x):
    return jnp.sum(jnp.log(x))


def test_config_is_hashable_and_normalised():
    s1 = InnerSolver(tol=1e-5, max_iters=np.int64(20))
    s2 = InnerSolver(tol=1e-5, max_iters=20)
    assert s1 == s2 and hash(s1) == hash(s2)
    assert InnerSolver(method="adam", learning_rate=0.1).uses_linesearch is False
    assert InnerSolver().uses_linesearch is True


@pytest.mark.parametrize(
    "kwargs, exc, word",
    [
        ({"method": "newton"}, ValueError, "method"),
        ({"tol": -1.0}, ValueError, "tol"),
        ({"max_iters": -1}, ValueError, "max_iters"),
        ({"max_iters": 2.5}, TypeError, "max_iters"),
        ({"method": "adam"}, ValueError, "learning_rate"),
        ({"method": "sgd", "learning_rate": 0.0}, ValueError, "learning_rate"),
        ({"memory_size": 0}, ValueError, "memory_size"),
    ],
)
def test_bad_config_raises(kwargs, exc, word):
    with pytest.raises(exc, match=word):
        InnerSolver(**kwargs)


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="fun: expected a function returning a real floating-point scalar"):
        minimise(InnerSolver(), lambda x: x**2, jnp.ones(3))
    with pytest.raises(TypeError, match="x0: expected floating-point leaves"):
        minimise(InnerSolver(), lambda x: jnp.sum(x), jnp.ones(3, jnp.int32))
    with pytest.raises(TypeError, match="solver: expected an InnerSolver"):
        minimise({"tol": 1e-6}, lambda x: jnp.sum(x**2), jnp.ones(3))
    with pytest.raises(ValueError, match="x0: expected a pytree with at least one array leaf"):
        minimise(InnerSolver(), lambda x: 0.0, {})


def test_float32_stall_stops_early_and_is_reported_capped():
    """In float32 a tolerance below the rounding floor cannot be met: the line search fails
    step after step. The loop stops after STALL_PATIENCE iterations without progress (not at
    max_iters = 500, which would cost up to 500 x 20 line-search evaluations) and reports the
    solve as capped, with the residual above tol."""
    from flowpost.numerics._inner import STALL_PATIENCE

    a = jnp.array([1e4, 1.0, 3.0], jnp.float32)

    def f(x):
        return 0.5 * jnp.sum(a * (x - 1.2345678) ** 2) + 1e-3 * jnp.sum(jnp.cos(x)) + 1000.0

    solver = InnerSolver(tol=1e-9, max_iters=500)
    x, rep = jax.jit(lambda x0: minimise(solver, f, x0))(jnp.zeros(3, jnp.float32))
    assert bool(rep.capped) and not bool(rep.converged)
    assert float(rep.residual) > 1e-9
    assert int(rep.iters) < 100 and int(rep.grad_evals) < 500
    assert x.dtype == jnp.float32
    # where it stopped, the gradient is at float32's resolution of this objective
    # (|f| ~ 1e3, eps ~ 1.2e-7, curvature up to 1e4: sqrt(2 eps |f| L) ~ 0.5)
    assert float(rep.residual) < 0.5
    assert STALL_PATIENCE >= 2


# --------------------------------------------------------------------------
# the solver as a pytree: numbers traced, structure static
# --------------------------------------------------------------------------


def test_solver_is_a_pytree_with_numbers_as_leaves():
    solver = InnerSolver(method="lbfgs", tol=1e-5, max_iters=77, memory_size=7, linesearch_steps=13)
    leaves = jax.tree_util.tree_leaves(solver)
    assert leaves == [1e-5, 77]  # learning_rate=None is an empty subtree
    # structural fields are not leaves (compare by identity of value: 7 and 13 are absent)
    assert 7 not in leaves and 13 not in leaves and "lbfgs" not in leaves
    with_lr = InnerSolver(method="adam", learning_rate=0.25, tol=1e-5)
    assert jax.tree_util.tree_leaves(with_lr) == [1e-5, 50, 0.25]
    # a structural field changes the tree structure, a number does not
    tree = jax.tree_util.tree_structure
    assert tree(InnerSolver(tol=1e-5)) == tree(InnerSolver(tol=1e-3, max_iters=9))
    assert tree(InnerSolver(memory_size=5)) != tree(InnerSolver(memory_size=6))
    assert tree(InnerSolver(method="adam", learning_rate=0.1)) != tree(InnerSolver(method="sgd", learning_rate=0.1))
    # round trip through flatten / unflatten keeps the configuration
    leaves, treedef = jax.tree_util.tree_flatten(with_lr)
    assert jax.tree_util.tree_unflatten(treedef, leaves) == with_lr


def _quadratic_3(x):
    return 0.5 * jnp.sum(jnp.asarray([1.0, 2.0, 4.0]) * (x - 1.0) ** 2)


def test_solver_as_jit_argument_compiles_once_for_new_numbers():
    traces = []

    @jax.jit
    def solve(solver, x0):
        traces.append(1)  # runs once per trace, not per call
        return minimise(solver, _quadratic_3, x0)

    x0 = jnp.zeros(3)
    results = {}
    for tol, max_iters in ((1e-3, 40), (1e-6, 60), (1e-4, 2)):
        solver = InnerSolver(tol=tol, max_iters=max_iters)
        results[(tol, max_iters)] = (solve(solver, x0), minimise(solver, _quadratic_3, x0))
    assert len(traces) == 1
    for (_tol, max_iters), ((x, rep), (x_ref, rep_ref)) in results.items():
        # traced numbers give the same solve as the concrete (unjitted) solver
        assert int(rep.iters) == int(rep_ref.iters) and bool(rep.converged) == bool(rep_ref.converged)
        np.testing.assert_allclose(np.asarray(x), np.asarray(x_ref), rtol=1e-6, atol=1e-7)
        assert int(rep.iters) <= max_iters
    assert int(results[(1e-4, 2)][0][1].iters) == 2  # the traced cap is honoured
    assert bool(results[(1e-6, 60)][0][1].converged)

    # a traced learning rate: first-order methods and L-BFGS with a fixed rate
    for method in ("sgd", "lbfgs"):
        traces.clear()
        outs = [solve(InnerSolver(method=method, learning_rate=lr, tol=1e-5, max_iters=300), x0) for lr in (0.1, 0.2)]
        assert len(traces) == 1, method
        for (x, rep), lr in zip(outs, (0.1, 0.2)):
            ref_x, ref_rep = minimise(
                InnerSolver(method=method, learning_rate=lr, tol=1e-5, max_iters=300), _quadratic_3, x0
            )
            assert int(rep.iters) == int(ref_rep.iters)
            np.testing.assert_allclose(np.asarray(x), np.asarray(ref_x), rtol=1e-6, atol=1e-7)
        assert int(outs[0][1].iters) != int(outs[1][1].iters)  # the rate really changed


def test_vmapped_sweep_over_solver_numbers():
    # plain gradient descent on 0.5 a (x - 1)^2 from 0: |grad| after k steps is
    # a |1 - lr a|^k exactly, so the count to reach tol is ceil(log(tol / a) / log|1 - lr a|)
    # ("Numerical Optimization" (2006), ch. 3).
    a, lrs, tols = 2.0, np.array([0.1, 0.2, 0.3]), np.array([1e-3, 1e-5, 1e-7])
    with jax.enable_x64(True):
        solvers = [InnerSolver(method="sgd", learning_rate=lr, tol=t, max_iters=500) for lr, t in zip(lrs, tols)]
        stacked = jax.tree.map(lambda *v: jnp.asarray(v), *solvers)
        fun = lambda x: 0.5 * a * jnp.sum((x - 1.0) ** 2)
        x, rep = jax.jit(jax.vmap(lambda s: minimise(s, fun, jnp.zeros(1))))(stacked)
    np.testing.assert_allclose(np.asarray(x)[:, 0], 1.0, atol=np.max(tols) / a * 1.01)  # |x - 1| = |grad| / a
    k_real = np.log(tols / a) / np.log(np.abs(1.0 - lrs * a))
    assert np.all(np.abs(k_real - np.round(k_real)) > 1e-6)  # not on an integer boundary
    np.testing.assert_array_equal(np.asarray(rep.iters), np.ceil(k_real).astype(int))
    assert np.all(np.asarray(rep.converged))


@pytest.mark.parametrize(
    "kwargs, exc, name",
    [
        ({"tol": math.inf}, ValueError, "tol"),
        ({"tol": math.nan}, ValueError, "tol"),
        ({"tol": "1e-5"}, TypeError, "tol"),
        ({"tol": True}, TypeError, "tol"),
        ({"max_iters": True}, TypeError, "max_iters"),
        ({"max_iters": 50.0}, TypeError, "max_iters"),
        ({"max_iters": "50"}, TypeError, "max_iters"),
        ({"method": "sgd", "learning_rate": math.inf}, ValueError, "learning_rate"),
        ({"method": "sgd", "learning_rate": math.nan}, ValueError, "learning_rate"),
        ({"method": "sgd", "learning_rate": "0.1"}, TypeError, "learning_rate"),
        ({"method": "sgd", "learning_rate": False}, TypeError, "learning_rate"),
        ({"memory_size": True}, TypeError, "memory_size"),
        ({"linesearch_steps": 2.0}, TypeError, "linesearch_steps"),
        ({"method": 3}, TypeError, "method"),
    ],
)
def test_non_finite_strings_and_bools_are_refused(kwargs, exc, name):
    with pytest.raises(exc, match=rf"^{name}: expected .*; got "):
        InnerSolver(**kwargs)
