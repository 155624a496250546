"""Bad input, one row per class: every refusal names the argument in the one format
``name: expected ...; got ...`` (flowpost._validate) with the right exception type, or the
input is accepted and does the right thing.

Most rows are refused before anything is compiled (argument checks, or a trace of the user's
``log_p`` by ``jax.eval_shape``); the target is a tiny standard normal in two dimensions.
The rows cover the classes listed in issue 15 and a sample of inputs that were already
refused clearly, so that they stay so.
"""

# pyright: reportArgumentType=false
# (this module passes arguments of the wrong type on purpose)
from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import flowpost as fp
import flowpost.testing as ft
from flowpost.engine._driver import DRIVER_REDUCTIONS
from flowpost.engine._figures import check_stop_rules


def log_p(theta):
    return -0.5 * jnp.sum(theta**2)


def log_p_data(theta, data):
    return -0.5 * jnp.sum((theta - data) ** 2)


INIT = jnp.linspace(-1.0, 1.0, 16).reshape(8, 2)
KEY = jax.random.key(0)


def langevin():
    return fp.Langevin(step_size=0.1)


def run(target: Any = log_p, stepper: Any = None, init: Any = INIT, **kw: Any):
    kw.setdefault("key", KEY)
    kw.setdefault("steps", 10)
    kw.setdefault("window", 5)
    kw.setdefault("progress", False)
    return fp.run(target, langevin() if stepper is None else stepper, init, **kw)


def sweep(**kw: Any):
    kw.setdefault("key", KEY)
    kw.setdefault("steps", 10)
    kw.setdefault("window", 5)
    kw.setdefault("step_size", [0.1, 0.2])
    return fp.sweep(log_p, langevin(), INIT, **kw)


def python_if(theta):
    return -jnp.sum(theta**2) if theta[0] > 0 else -0.5 * jnp.sum(theta**2)


def numpy_conversion(theta):
    return -0.5 * np.sum(np.asarray(theta) ** 2)


def float_conversion(theta):
    return -0.5 * float(jnp.sum(theta**2))


def divides_by_zero(theta):
    return 1 / 0


# (id, call, exception type, the argument the message must start with)
REFUSED: list[tuple[str, Callable[[], Any], type[Exception], str]] = [
    # ----- run's own arguments
    ("steps float", lambda: run(steps=150.9), TypeError, "steps"),
    ("steps numeric string", lambda: run(steps="200"), TypeError, "steps"),
    ("steps nan", lambda: run(steps=float("nan")), TypeError, "steps"),
    ("steps negative", lambda: run(steps=-1), ValueError, "steps"),
    ("steps bool", lambda: run(steps=True), TypeError, "steps"),
    ("steps 0-d float array", lambda: run(steps=jnp.asarray(10.0)), TypeError, "steps"),
    ("steps beyond the int32 step index", lambda: run(steps=2**40), ValueError, "steps"),
    ("window zero", lambda: run(window=0), ValueError, "window"),
    ("checkpoint_every zero", lambda: run(checkpoint_every=0), ValueError, "checkpoint_every"),
    ("time_budget negative", lambda: run(time_budget=-1), ValueError, "time_budget"),
    ("time_budget string", lambda: run(time_budget="10s"), TypeError, "time_budget"),
    ("time_budget nan", lambda: run(time_budget=float("nan")), ValueError, "time_budget"),
    ("on_blowup unknown", lambda: run(on_blowup="retry"), ValueError, "on_blowup"),
    ("progress integer", lambda: run(progress=1), TypeError, "progress"),
    ("step_size numeric string", lambda: run(step_size="0.1"), TypeError, "step_size"),
    ("step_size negative", lambda: run(step_size=-0.1), ValueError, "step_size"),
    ("step_size 1-d array", lambda: run(step_size=jnp.asarray([0.1])), TypeError, "step_size"),
    ("step_size nan 0-d array", lambda: run(step_size=jnp.asarray(jnp.nan)), ValueError, "step_size"),
    ("step_size controller class", lambda: run(step_size=fp.Constant), TypeError, "step_size"),
    ("step_size bare function", lambda: run(step_size=lambda t: 0.1), TypeError, "step_size"),
    ("stepper class", lambda: run(stepper=fp.Langevin), TypeError, "stepper"),
    ("stepper string", lambda: run(stepper="langevin"), TypeError, "stepper"),
    ("monitor class", lambda: run(monitor=fp.Monitor), TypeError, "monitor"),
    ("monitor not a monitor", lambda: run(monitor=object()), TypeError, "monitor"),
    ("key batch", lambda: run(key=jax.random.split(KEY, 3)), TypeError, "key"),
    ("key float array", lambda: run(key=jnp.array([0.0, 1.0])), TypeError, "key"),
    ("key integer seed", lambda: run(key=0), TypeError, "key"),
    ("target None", lambda: run(target=None), TypeError, "target"),
    ("target class", lambda: run(target=fp.Target), TypeError, "target"),
    # ----- init
    ("init no particles", lambda: run(init=jnp.zeros((0, 2))), ValueError, "init"),
    ("init float16", lambda: run(init=INIT.astype(jnp.float16)), TypeError, "init"),
    ("init bfloat16", lambda: run(init=INIT.astype(jnp.bfloat16)), TypeError, "init"),
    ("init bool", lambda: run(init=jnp.zeros((8, 2), bool)), TypeError, "init"),
    ("init strings", lambda: run(init=np.full((8, 2), "a")), TypeError, "init"),
    ("init complex", lambda: run(init=jnp.zeros((8, 2), jnp.complex64)), TypeError, "init"),
    ("init list of lists", lambda: run(init=[[0.0, 1.0]] * 8), ValueError, "init"),
    ("init scalar leaf", lambda: run(init={"a": jnp.zeros(()), "b": jnp.zeros(8)}), ValueError, "init"),
    ("init mismatched N", lambda: run(init={"a": jnp.zeros((8, 2)), "b": jnp.zeros(7)}), ValueError, "init"),
    ("init no leaves", lambda: run(init={}), TypeError, "init"),
    ("init non-finite", lambda: run(init=INIT.at[3, 1].set(jnp.nan)), ValueError, "init"),
    ("init outside support", lambda: run(target=fp.Target(log_p, support=fp.Positive())), ValueError, "init"),
    ("init shape log_p cannot index", lambda: run(lambda t: -t[:, 0].sum(), init=jnp.zeros(8)), ValueError, "init"),
    ("init missing a parameter", lambda: run(lambda t: -(t["b"] ** 2), init={"a": jnp.zeros(8)}), ValueError, "init"),
    # ----- log_p
    ("log_p python if", lambda: run(python_if), TypeError, "log_p"),
    ("log_p np.asarray", lambda: run(numpy_conversion), TypeError, "log_p"),
    ("log_p float()", lambda: run(float_conversion), TypeError, "log_p"),
    ("log_p raises", lambda: run(divides_by_zero), ValueError, "log_p"),
    ("log_p vector", lambda: run(lambda t: t), ValueError, "log_p"),
    ("log_p integer", lambda: run(lambda t: jnp.sum(t).astype(jnp.int32)), TypeError, "log_p"),
    ("log_p returns None", lambda: run(lambda t: None), TypeError, "log_p"),
    ("log_p returns a string", lambda: run(lambda t: "x"), TypeError, "log_p"),
    ("log_p number", lambda: fp.Target(5), TypeError, "log_p"),
    ("log_p class", lambda: fp.Target(fp.Langevin), TypeError, "log_p"),
    ("log_p empty mapping", lambda: fp.Target({}), ValueError, "log_p"),
    ("log_p term not callable", lambda: fp.Target({"lik": "x"}), TypeError, "log_p['lik']"),
    ("log_p named term python if", lambda: run(fp.Target({"lik": python_if})), TypeError, "log_p['lik']"),
    # ----- data
    ("data missing", lambda: fp.Target(log_p_data), TypeError, "data"),
    ("data given to log_p(theta)", lambda: fp.Target(log_p, data=jnp.ones(2)), TypeError, "data"),
    ("data string", lambda: fp.Target(log_p_data, data={"y": "a"}), TypeError, "data"),
    ("data string array", lambda: fp.Target(log_p_data, data=np.array(["a", "b"])), TypeError, "data"),
    ("data list of strings", lambda: fp.Target(log_p_data, data=["a", "b"]), TypeError, "data"),
    ("data object", lambda: fp.Target(log_p_data, data={"y": {1, 2}}), TypeError, "data"),
    ("data NaN", lambda: run(fp.Target(log_p_data, data=jnp.array([jnp.nan, 1.0]))), ValueError, "data"),
    # ----- supports
    ("Interval string bound", lambda: fp.Interval("a", 1), TypeError, "Interval.low"),
    ("Interval -inf", lambda: fp.Interval(-float("inf"), 1.0), ValueError, "Interval.low"),
    ("Interval +inf", lambda: fp.Interval(0.0, float("inf")), ValueError, "Interval.high"),
    ("Interval reversed", lambda: fp.Interval(1.0, 0.0), ValueError, "Interval.high"),
    ("Interval bool", lambda: fp.Interval(False, True), TypeError, "Interval.low"),
    ("support number", lambda: fp.Target(log_p, support=5), TypeError, "support"),
    ("support class", lambda: fp.Target(log_p, support=fp.Positive), TypeError, "support"),
    ("support unknown name", lambda: fp.Target(log_p, support="positve"), ValueError, "support"),
    (
        "support of no parameter",
        lambda: fp.Target(log_p, support={"z": fp.Positive()}).bind(INIT),
        ValueError,
        "support",
    ),
    # ----- steppers
    ("Langevin step string", lambda: fp.Langevin(step_size="0.1"), TypeError, "step_size"),
    ("Langevin step zero", lambda: fp.Langevin(step_size=0), ValueError, "step_size"),
    ("Langevin step inf", lambda: fp.Langevin(step_size=float("inf")), ValueError, "step_size"),
    ("Langevin step bool", lambda: fp.Langevin(step_size=True), TypeError, "step_size"),
    ("MALA tune_gain inf", lambda: fp.MALA(step_size=0.1, tune_gain=float("inf")), ValueError, "tune_gain"),
    ("MALA tune_steps string", lambda: fp.MALA(step_size=0.1, tune_steps="ten"), TypeError, "tune_steps"),
    ("MALA tune_steps float", lambda: fp.MALA(step_size=0.1, tune_steps=1.5), TypeError, "tune_steps"),
    ("MALA target_accept 1", lambda: fp.MALA(step_size=0.1, target_accept=1), ValueError, "target_accept"),
    ("KineticLangevin friction string", lambda: fp.KineticLangevin(step_size=0.1, friction="a"), TypeError, "friction"),
    ("BlobFlow bandwidth auto", lambda: fp.BlobFlow(step_size=0.1, bandwidth="auto"), TypeError, "bandwidth"),
    ("JKO bandwidth auto", lambda: fp.JKO(step_size=0.1, bandwidth="auto"), TypeError, "bandwidth"),
    ("RBF bandwidth auto", lambda: fp.RBF(bandwidth="auto"), TypeError, "bandwidth"),
    ("SVGD kernel class", lambda: fp.SVGD(step_size=0.1, kernel=fp.RBF), TypeError, "kernel"),
    ("SVGD block zero", lambda: fp.SVGD(step_size=0.1, block=0), ValueError, "block"),
    ("EnsembleLangevin block float", lambda: fp.EnsembleLangevin(step_size=0.1, block=0.5), TypeError, "block"),
    ("Split no parts", lambda: fp.Split(()), ValueError, "parts"),
    ("Split part class", lambda: fp.Split((fp.Explicit, fp.HeatFlow())), TypeError, "parts[0]"),
    ("Split order", lambda: fp.Split((fp.Explicit(), fp.HeatFlow()), order="x"), ValueError, "order"),
    ("Explicit fraction string", lambda: fp.Explicit(fraction="a"), TypeError, "Explicit.fraction"),
    ("Friction gamma negative", lambda: fp.Friction(gamma=-1), ValueError, "Friction.gamma"),
    ("ImplicitLangevin solver", lambda: fp.ImplicitLangevin(step_size=0.1, solver=5), TypeError, "solver"),
    ("ImplicitLangevin prox arity", lambda: fp.ImplicitLangevin(step_size=0.1, prox=lambda u: u), TypeError, "prox"),
    ("ExactMap fn arity", lambda: fp.ExactMap(fn=lambda x: x), TypeError, "ExactMap.fn"),
    ("InnerSolver tol negative", lambda: fp.InnerSolver(tol=-1), ValueError, "tol"),
    ("InnerSolver max_iters float", lambda: fp.InnerSolver(max_iters=2.5), TypeError, "max_iters"),
    # ----- controllers
    ("Constant negative", lambda: fp.Constant(-1), ValueError, "step_size"),
    ("Constant string", lambda: fp.Constant("a"), TypeError, "step_size"),
    ("Halving number", lambda: fp.Halving(5), TypeError, "inner"),
    ("Halving class", lambda: fp.Halving(fp.Constant), TypeError, "inner"),
    ("AcceptanceTarget gain inf", lambda: fp.AcceptanceTarget(0.1, gain=float("inf")), ValueError, "tune_gain"),
    ("Schedule number", lambda: fp.Schedule(5), TypeError, "fn"),
    ("Schedule arity", lambda: fp.Schedule(lambda: 0.1), TypeError, "fn"),
    ("Schedule negative step", lambda: fp.Schedule(lambda t: -0.1 + 0 * t), ValueError, "fn"),
    ("Schedule returns a string", lambda: run(step_size=fp.Schedule(lambda t: "a")), TypeError, "fn"),
    # ----- monitor
    ("growth_limit negative", lambda: fp.Monitor(growth_limit=-1), ValueError, "growth_limit"),
    ("growth_limit string", lambda: fp.Monitor(growth_limit="big"), TypeError, "growth_limit"),
    ("plateau list", lambda: fp.Monitor(plateau=["ksd", 5, 0.05]), TypeError, "plateau"),
    ("plateau vector figure", lambda: fp.Monitor(plateau=("centre", 5, 0.05)), ValueError, "plateau"),
    (
        "plateau ksd switched off",
        lambda: fp.Monitor(discrepancy=False, plateau=("ksd", 5, 0.05)),
        ValueError,
        "plateau",
    ),
    ("plateau unknown figure", lambda: run(monitor=fp.Monitor(plateau=("kds", 5, 0.05))), ValueError, "plateau"),
    (
        "plateau rhat, deterministic stepper",
        lambda: run(stepper=fp.SVGD(step_size=0.1), monitor=fp.Monitor(plateau=("rhat", 5, 0.05))),
        ValueError,
        "plateau",
    ),
    (
        "plateau unknown figure, sweep",
        lambda: sweep(monitor=fp.Monitor(plateau=("kds", 5, 0.05))),
        ValueError,
        "plateau",
    ),
    (
        "target_discrepancy without discrepancy",
        lambda: fp.Monitor(discrepancy=False, target_discrepancy=0.1),
        ValueError,
        "target_discrepancy",
    ),
    ("stop_when number", lambda: fp.Monitor(stop_when=5), TypeError, "stop_when"),
    ("stop_when arity", lambda: fp.Monitor(stop_when=lambda: True), TypeError, "stop_when"),
    ("discrepancy_points one", lambda: fp.Monitor(discrepancy_points=1), ValueError, "discrepancy_points"),
    ("trail_particles bool", lambda: fp.Monitor(trail_particles=True), TypeError, "trail_particles"),
    # ----- sweep
    ("sweep float keys", lambda: sweep(key=jnp.zeros((2, 2))), TypeError, "key"),
    ("sweep 2-d batch of keys", lambda: sweep(key=jax.random.split(KEY, (2, 2))), TypeError, "key"),
    ("sweep empty batch of keys", lambda: sweep(key=jax.random.split(KEY, 0), step_size=None), ValueError, "key"),
    ("sweep keys and steps disagree", lambda: sweep(key=jax.random.split(KEY, 3)), ValueError, "key"),
    ("sweep step string", lambda: sweep(step_size=["a", 0.1]), TypeError, "step_size[0]"),
    ("sweep no batch", lambda: sweep(step_size=0.1), TypeError, "step_size / key"),
    ("sweep steps float", lambda: sweep(steps=1.5), TypeError, "steps"),
    ("sweep monitor class", lambda: sweep(monitor=fp.Monitor), TypeError, "monitor"),
    # ----- evolve
    (
        "evolve steps float",
        lambda: fp.evolve(langevin(), fp.Target(log_p).bind(INIT)[0], INIT, KEY, 1.5),
        TypeError,
        "steps",
    ),
    (
        "evolve batch of keys",
        lambda: fp.evolve(langevin(), fp.Target(log_p).bind(INIT)[0], INIT, jax.random.split(KEY), 5),
        TypeError,
        "key",
    ),
    ("evolve unbound target", lambda: fp.evolve(langevin(), fp.Target(log_p), INIT, KEY, 5), ValueError, "target"),
    # ----- test kit
    ("kit scale string", lambda: ft.Region.near(jnp.zeros(2), scale="a"), TypeError, "scale"),
    ("kit num_points zero", lambda: ft.Region.near(jnp.zeros(2), num_points=0), ValueError, "num_points"),
    ("kit key float", lambda: ft.Region.near(jnp.zeros(2), key=jnp.zeros(2)), TypeError, "key"),
    ("kit sampler arity", lambda: ft.Region.drawn(lambda: jnp.zeros(2)), TypeError, "sampler"),
    ("kit around string", lambda: ft.Region.near("abc"), TypeError, "around"),
    ("kit around complex", lambda: ft.Region.near(jnp.zeros(2, jnp.complex64)), TypeError, "around"),
    ("kit data string", lambda: ft.score_agreement(log_p_data, around=jnp.zeros(2), data="a"), TypeError, "data"),
    ("kit data missing", lambda: ft.score_agreement(log_p_data, around=jnp.zeros(2)), TypeError, "data"),
    (
        "kit data given to log_p(theta)",
        lambda: ft.check_health(log_p, around=jnp.zeros(2), data=1.0),
        TypeError,
        "data",
    ),
    ("kit log_p python if", lambda: ft.score_agreement(python_if, around=jnp.zeros(2)), TypeError, "log_p"),
    (
        "kit point lacks a parameter",
        lambda: ft.score_agreement(lambda t: t["b"], around={"a": 0.0}),
        ValueError,
        "region",
    ),
    ("kit log_p class", lambda: ft.score_agreement(fp.Langevin, around=jnp.zeros(2)), TypeError, "log_p"),
    (
        "kit tolerance string",
        lambda: ft.assert_score_matches(log_p, around=jnp.zeros(2), tolerance="a"),
        TypeError,
        "tolerance",
    ),
    ("kit step nan", lambda: ft.score_agreement(log_p, around=jnp.zeros(2), step=float("nan")), ValueError, "step"),
    (
        "kit exchangeable integer",
        lambda: ft.check_health(log_p, around=jnp.zeros(2), exchangeable=1),
        TypeError,
        "exchangeable",
    ),
    ("kit draws strings", lambda: ft.moment_zscores(np.full((5, 1), "a"), mean=[0.0]), TypeError, "draws"),
    ("kit one draw", lambda: ft.moment_zscores(np.zeros((1, 2)), mean=[0.0, 0.0]), ValueError, "draws"),
    ("kit mean string", lambda: ft.moment_zscores(np.zeros((5, 2)), mean="a"), TypeError, "mean"),
    ("kit n_eff zero", lambda: ft.moment_zscores(np.eye(5, 2), mean=[0.0, 0.0], n_eff=0), ValueError, "n_eff"),
    (
        "kit variance_error",
        lambda: ft.moment_zscores(np.eye(5, 2), mean=[0, 0], variance_error="x"),
        ValueError,
        "variance_error",
    ),
    (
        "kit threshold negative",
        lambda: ft.assert_moments_match(np.eye(5, 2), mean=[0, 0], threshold=-1),
        ValueError,
        "threshold",
    ),
    (
        "kit calibrate n_datasets float",
        lambda: ft.calibrate(
            log_p_data, lambda k: jnp.zeros(2), lambda k, t: t, langevin(), INIT, key=KEY, n_datasets=1.5
        ),
        TypeError,
        "n_datasets",
    ),
    (
        "kit calibrate prior_draw None",
        lambda: ft.calibrate(log_p_data, None, lambda k, t: t, langevin(), INIT, key=KEY),
        TypeError,
        "prior_draw",
    ),
    (
        "kit calibrate key seed",
        lambda: ft.calibrate(log_p_data, lambda k: jnp.zeros(2), lambda k, t: t, langevin(), INIT, key=0),
        TypeError,
        "key",
    ),
]


@pytest.mark.parametrize(("call", "kind", "name"), [r[1:] for r in REFUSED], ids=[r[0] for r in REFUSED])
def test_refused_naming_the_argument(call, kind, name):
    with pytest.raises(kind, match="^" + re.escape(name) + ": expected "):
        call()


@pytest.mark.parametrize(
    ("call", "cause", "hint"),
    [
        (lambda: run(python_if), jax.errors.TracerBoolConversionError, "jnp.where"),
        (lambda: run(numpy_conversion), jax.errors.TracerArrayConversionError, "np.asarray"),
        (lambda: run(float_conversion), jax.errors.ConcretizationTypeError, "jax.lax.cond"),
        (lambda: run(divides_by_zero), ZeroDivisionError, "ZeroDivisionError"),
    ],
    ids=["python if", "np.asarray", "float()", "raises"],
)
def test_errors_inside_log_p_keep_the_cause_and_say_what_to_write(call, cause, hint):
    with pytest.raises((TypeError, ValueError), match=r"^log_p: expected ") as info:
        call()
    assert isinstance(info.value.__cause__, cause)
    assert hint in str(info.value)
    if cause is not ZeroDivisionError:  # JAX's own text and link travel with the message
        assert f"See https://docs.jax.dev/en/latest/errors.html#jax.errors.{cause.__name__}" in str(info.value)


def test_plateau_refusal_lists_the_known_figures():
    with pytest.raises(ValueError, match=r"^plateau: expected .*'mean_logp'.*'ksd'.*; got 'kds'"):
        run(monitor=fp.Monitor(plateau=("kds", 5, 0.05)))


def test_plateau_on_a_stepper_stat_is_accepted():
    mala = fp.MALA(step_size=0.1)
    check_stop_rules(fp.Monitor(plateau=("accept", 2, 0.1)), mala, {**mala.reductions, **DRIVER_REDUCTIONS})
    check_stop_rules(fp.Monitor(plateau=("rhat", 2, 0.1)), mala, {**mala.reductions, **DRIVER_REDUCTIONS})


def test_kit_says_log_p_is_nan_not_a_score_mismatch():
    with pytest.raises(AssertionError, match=r"^log_p: expected a finite value .*NaN at 16") as info:
        ft.assert_score_matches(lambda t: jnp.nan * jnp.sum(t), around=jnp.zeros(2))
    assert "disagrees" not in str(info.value)
    # -inf outside the support: the same, not a mismatch
    with pytest.raises(AssertionError, match=r"^log_p: expected a finite value .*-inf"):
        ft.score_agreement(lambda t: jnp.sum(jnp.log(jnp.maximum(t, 0.0))), around=-jnp.ones(2))


def test_numbers_given_as_arrays_are_numbers():
    # a 0-d JAX / NumPy float is a number: stored as a Python float, never a raw array
    assert type(fp.Langevin(step_size=jnp.asarray(0.1)).step_size) is float
    assert type(fp.Constant(np.float32(0.25)).h) is float
    assert fp.Constant(np.float32(0.25)).h == 0.25
    assert type(fp.KineticLangevin(step_size=0.1, friction=jnp.asarray(2.0)).friction) is float
    assert fp.Interval(np.float32(-1), jnp.asarray(2.0)) == fp.Interval(-1.0, 2.0)


def test_integer_init_takes_the_default_float():
    _, x = fp.Target(log_p).bind(jnp.arange(8 * 2).reshape(8, 2))
    assert x.dtype == jnp.float32
    np.testing.assert_array_equal(np.asarray(x), np.arange(16.0).reshape(8, 2))


def test_array_step_size_survives_halving():
    """A 0-d JAX step size with on_blowup='halve' on a stiff target (Langevin is stable for
    h < 2 sigma^2 = 0.02, "Exponential convergence of Langevin distributions and their
    discrete approximations" (1996)): the run halves the step and returns a result instead
    of failing at the first halving; an old-style uint32 key is accepted too."""
    stiff = fp.Target(lambda t: -0.5 * jnp.sum(t**2) / 0.01)
    result = fp.run(
        stiff,
        fp.Langevin(step_size=0.1),
        0.1 * INIT,
        key=jax.random.PRNGKey(1),
        steps=40,
        window=10,
        step_size=jnp.asarray(0.5),
        on_blowup="halve",
        monitor=fp.BareMonitor(),
        progress=False,
    )
    assert any("halved the step" in e for e in result.events)
    assert result.report["halvings"] >= 1
