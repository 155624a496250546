"""Target: flattening, supports with their log-Jacobians, and the errors for bad input."""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost.model import Interval, Positive, Simplex


def _model(theta):
    return jst.norm.logpdf(theta["a"]) + jnp.sum(jst.norm.logpdf(theta["w"]))


def _init(n=8):
    return {"a": jnp.zeros(n), "w": jnp.zeros((n, 3))}


def test_bind_shapes_and_round_trip():
    t = fp.Target(
        lambda th: jst.norm.logpdf(th["s"]) + jnp.sum(th["p"]) + th["r"],
        support={"s": fp.Positive(), "p": fp.Simplex(), "r": fp.Interval(-1, 2)},
    )
    init = {"s": jnp.full(5, 2.0), "p": jnp.tile(jnp.array([0.2, 0.3, 0.5]), (5, 1)), "r": jnp.full(5, 0.5)}
    bound, x = t.bind(init)
    assert x.shape == (5, 1 + 2 + 1)  # the simplex of 3 entries has 2 free coordinates
    back = bound.constrain(x)
    for k in init:
        np.testing.assert_allclose(back[k], init[k], rtol=1e-5)
    assert bound.layout.element_names() == ["p[0]", "p[1]", "p[2]", "r", "s"]


@pytest.mark.parametrize("support,shape", [(Positive(), ()), (Interval(-2.0, 3.0), ()), (Simplex(), (4,))])
def test_log_jacobian_matches_autodiff_determinant(support, shape):
    """The closed-form log|det dT/du| equals the log-determinant of the Jacobian that autodiff
    computes from the forward map (jnp.linalg.slogdet of jax.jacfwd): the change-of-variables
    formula, independent of the closed forms in flowpost.support."""
    with jax.enable_x64(True):
        key = jax.random.key(3)
        size = support.free_size(shape)
        for u in jax.random.normal(key, (5, size), jnp.float64):
            if shape == (4,):
                # Simplex: the density lives on the first K-1 entries of x
                fwd = lambda v: support.forward(v, shape)[:-1]
            else:
                fwd = lambda v: support.forward(v, shape).reshape(-1)
            jac = jax.jacfwd(fwd)(u)
            _, logdet = jnp.linalg.slogdet(jac)
            np.testing.assert_allclose(support.log_jacobian(u), logdet, rtol=1e-10, atol=1e-10)
            np.testing.assert_allclose(support.inverse(support.forward(u, shape)), u, rtol=1e-8, atol=1e-10)


def test_non_scalar_log_density_is_named():
    with pytest.raises(ValueError, match=r"^log_p: expected a scalar.*got shape \(3,\)"):
        fp.run(
            lambda th: th["w"] * 2.0,
            fp.Langevin(step_size=0.1),
            _init(),
            key=jax.random.key(0),
            steps=1,
            progress=False,
        )


def test_non_finite_start_names_particles_and_parameters():
    t = fp.Target(lambda th: jst.norm.logpdf(th["a"]) + jnp.sum(jnp.log(th["w"])))
    init = {"a": jnp.zeros(6), "w": jnp.ones((6, 3)).at[2, 1].set(-1.0).at[4, 0].set(0.0)}
    with pytest.raises(ValueError, match=r"init: .*2 of 6 .*particles.*w"):
        fp.run(t, fp.Langevin(step_size=0.1), init, key=jax.random.key(0), steps=1, progress=False)


def test_init_that_does_not_match_log_p():
    with pytest.raises(ValueError, match=r"^init: expected particles with the parameters .*KeyError"):
        fp.run(
            _model,
            fp.Langevin(step_size=0.1),
            {"a": jnp.zeros(4), "v": jnp.zeros((4, 3))},
            key=jax.random.key(0),
            steps=1,
            progress=False,
        )
    with pytest.raises(ValueError, match=r"^init: expected every leaf to share the leading particle axis"):
        fp.run(
            _model,
            fp.Langevin(step_size=0.1),
            {"a": jnp.zeros(4), "w": jnp.zeros((5, 3))},
            key=jax.random.key(0),
            steps=1,
            progress=False,
        )
    with pytest.raises(
        ValueError, match=r"^init: expected every leaf to have a leading particle axis.*'a' of shape \(\)"
    ):
        fp.run(
            _model,
            fp.Langevin(step_size=0.1),
            {"a": jnp.zeros(()), "w": jnp.zeros((5, 3))},
            key=jax.random.key(0),
            steps=1,
            progress=False,
        )


def test_non_differentiable_log_p_is_named():
    def bad(theta):
        return jnp.asarray(float(np.sum(np.asarray(theta))))  # leaves JAX: cannot be traced

    with pytest.raises((TypeError, ValueError), match=r"log_p"):
        fp.run(bad, fp.Langevin(step_size=0.1), jnp.zeros((4, 2)), key=jax.random.key(0), steps=1, progress=False)

    def integer_valued(theta):
        return jnp.sum(theta > 0).astype(jnp.int32)

    with pytest.raises(TypeError, match=r"^log_p: expected a floating-point scalar"):
        fp.run(
            integer_valued,
            fp.Langevin(step_size=0.1),
            jnp.zeros((4, 2)),
            key=jax.random.key(0),
            steps=1,
            progress=False,
        )


def test_support_errors_name_the_argument():
    with pytest.raises(ValueError, match=r"^support: expected names among the parameters.*got \['sigmaa'\]"):
        fp.Target(_model, support={"sigmaa": fp.Positive()}).bind(_init())
    with pytest.raises(ValueError, match=r"^init: expected particles inside the support of 'a'.*got 8 of 8"):
        fp.Target(_model, support={"a": fp.Positive()}).bind(_init())
    with pytest.raises(ValueError, match=r"Interval.high: expected a number greater than low = 1"):
        fp.Interval(1.0, 0.0)
    with pytest.raises(TypeError, match=r"Interval.low: expected a finite number"):
        fp.Interval("a", 1.0)
    with pytest.raises(ValueError, match=r"Interval.high: expected a finite number .*half-line"):
        fp.Interval(0.0, float("inf"))


def test_bad_stepper_and_key_are_named():
    with pytest.raises(TypeError, match=r"stepper"):
        fp.run(_model, object(), _init(), key=jax.random.key(0), steps=1, progress=False)
    with pytest.raises(TypeError, match=r"key"):
        fp.run(_model, fp.Langevin(step_size=0.1), _init(), key=0, steps=1, progress=False)
    for bad in (-1.0, 0.0, float("inf"), float("nan")):
        with pytest.raises(ValueError, match=r"step_size: expected a positive finite number"):
            fp.Langevin(step_size=bad)


def test_data_is_traced_not_baked_in():
    """A Target is a pytree whose leaves are the data: new data of the same shape reuse the
    compiled function (jit's cache does not grow)."""

    def lp(th, data):
        return jnp.sum(jst.norm.logpdf(data, th, 1.0))

    f = jax.jit(lambda t, x: t.log_density(x))
    x = jnp.zeros((3, 1))
    b1, _ = fp.Target(lp, data=jnp.ones(5)).bind(x)
    b2, _ = fp.Target(lp, data=2 * jnp.ones(5)).bind(x)
    v1, v2 = f(b1, x), f(b2, x)
    assert f._cache_size() == 1
    np.testing.assert_allclose(v1 - v2, np.full(3, 5 * 1.5), rtol=1e-6)  # sum of (4-1)/2 per datum
