"""Runs that cannot be right say so (issue 15, the silent-wrong-run part).

Each row is one class of silent failure, and asserts either the exception type and a message
naming the argument (``name: expected ...; got ...``), or the recorded finding in
``Result.warnings`` (a ``"warning"`` event of the history, counted in ``Result.reason``), or the
correct behaviour against an outside reference. The policy is in flowpost/engine/_health.py
(findings), flowpost/engine/_monitor.py (``log_p = +inf``) and DEVELOPERS.md.

Kept cheap: 1- and 2-d targets, at most a few hundred particles and steps, a light monitor
(no discrepancy, no trails) where the figure checked does not need them.
"""

import statistics

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost.engine._health import LOW_ACCEPTANCE, score_findings, spread_findings, window_findings
from flowpost.steppers import LIBRARY_STEPPERS

LIGHT = {"discrepancy": False, "trail_particles": 0}
X0 = jax.random.normal(jax.random.key(0), (32, 2))


def std_normal(x):
    return jnp.sum(jst.norm.logpdf(x))


def kinds(result):
    return [e["kind"] for e in result.history.events() if e["event"] == "warning"]


# ----------------------------------------------------------------------------- refused at the start
def _rounded(x):
    return -0.5 * jnp.sum(jnp.round(x) ** 2)


def _int_cast(x):
    return -0.5 * jnp.sum(x**2).astype(jnp.int32).astype(x.dtype)


def _ignores_b(theta):
    return jnp.sum(jst.norm.logpdf(theta["a"]))


REFUSED = [
    # (id, log_p, stepper, init, exception, words the message must hold)
    ("round-in-log_p", _rounded, fp.Langevin(step_size=0.1), X0, ValueError, ["log_p: expected", "exactly 0"]),
    ("int-cast-in-log_p", _int_cast, fp.MALA(step_size=0.1), X0, ValueError, ["log_p: expected", "integer cast"]),
    (
        "svgd-zero-spread",
        std_normal,
        fp.SVGD(step_size=0.1),
        jnp.ones((16, 2)),
        ValueError,
        ["init: expected", "differ in every coordinate", "SVGD"],
    ),
    (
        "blob-one-flat-coordinate",
        std_normal,
        fp.BlobFlow(step_size=0.1),
        X0.at[:, 1].set(0.5),
        ValueError,
        ["init: expected", "theta[1]"],
    ),
    (
        "ensemble-langevin-zero-spread",
        std_normal,
        fp.EnsembleLangevin(step_size=0.1),
        jnp.ones((16, 2)),
        ValueError,
        ["init: expected", "rank 0"],
    ),
    (
        "ensemble-langevin-N-le-d",
        std_normal,
        fp.EnsembleLangevin(step_size=0.1),
        X0[:3, :1] * jnp.ones((3, 3)) + jnp.eye(3),
        ValueError,
        ["init: expected more particles than dimensions", "N=3", "d=3"],
    ),
    (
        "ensemble-langevin-on-a-line",
        std_normal,
        fp.EnsembleLangevin(step_size=0.1),
        X0[:, :1] * jnp.array([[1.0, 2.0]]),
        ValueError,
        ["init: expected", "rank 1"],
    ),
    (
        "jko-N-le-d",
        std_normal,
        fp.JKO(step_size=0.1),
        X0[:2, :] + jnp.eye(2),
        ValueError,
        ["init: expected more particles", "JKO"],
    ),
]


@pytest.mark.parametrize(
    ("log_p", "stepper", "init", "exc", "words"), [r[1:] for r in REFUSED], ids=[r[0] for r in REFUSED]
)
def test_refused_before_the_run(log_p, stepper, init, exc, words):
    with pytest.raises(exc) as info:
        fp.run(log_p, stepper, init, key=jax.random.key(1), steps=10, progress=False)
    for w in words:
        assert w in str(info.value), (w, str(info.value))


def _narrow(x):  # N(0, 0.01), L = 100
    return -0.5 * jnp.sum(x**2) / 0.01


def test_a_start_at_one_point_is_not_judged():
    """The zero-score check does not judge coordinates where the particles coincide: a start
    at the mode has score 0 at every particle, and a noisy stepper leaves a point."""
    target, x = fp.Target(_narrow).bind(jnp.zeros((16, 1)))
    logp, score = target.value_and_score(x)
    assert not np.any(np.asarray(score))  # the score is 0 at every particle
    assert score_findings(target, np.asarray(x), np.asarray(logp), np.asarray(score)) == []
    assert spread_findings(fp.Langevin(), target, np.asarray(x)) == []


@pytest.mark.parametrize(
    ("log_p", "kind", "words"),
    [(_ignores_b, "zero-score", "exactly 0 at all 32 starting particles in b"), (std_normal, None, "")],
    ids=["parameter-not-read", "smooth"],
)
def test_a_partly_flat_score_is_a_start_finding(log_p, kind, words):
    """One flat coordinate may be meant (a flat region with walls): recorded, not refused."""
    target, x = fp.Target(log_p).bind({"a": X0[:, 0], "b": X0[:, 1]} if log_p is _ignores_b else X0)
    logp, score = target.value_and_score(x)
    found = score_findings(target, np.asarray(x), np.asarray(logp), np.asarray(score))
    assert [f.kind for f in found] == ([] if kind is None else [kind])
    assert all(words in f.message for f in found)


# ----------------------------------------------------------------------------- recorded findings
def _stiff(x):  # N(0, 1e-6): a MALA step of 10 is rejected always
    return -0.5 * jnp.sum(x**2) * 1e6


def _far_normal(x):  # N(1e8, 1) per coordinate: in float32 the spacing of numbers at 1e8 is 8
    return jnp.sum(jst.norm.logpdf(x, 1e8, 1.0))


WARNED = [
    # (id, log_p, stepper, init, expected kinds, words of the first warning of the first kind)
    (
        "mala-every-proposal-rejected",
        _stiff,
        fp.MALA(step_size=10.0),
        X0 * 1e-3,
        ["stuck"],
        "every proposal was rejected",
    ),
    (
        "float32-at-1e8",
        _far_normal,
        fp.Langevin(step_size=0.1),
        1e8 + jax.random.normal(jax.random.key(0), (32, 1)),
        ["stuck", "collapsed"],
        "no particle moved",
    ),
    (
        "float32-start-few-values",
        _far_normal,
        fp.Langevin(step_size=0.5),
        1e8 + 10.0 * jax.random.normal(jax.random.key(0), (32, 1)),
        ["collapsed", "stuck"],  # at the start (spread 11.5 <= 4 eps 1e8 = 48), then no move: noise < spacing/2
        "collapsed coordinates at the start",
    ),
    (
        "constant-score",
        lambda x: -jnp.sum(jnp.abs(x)),
        fp.Langevin(step_size=0.01),
        X0**2 + 5.0,
        ["constant-score"],
        "linear",
    ),
]


@pytest.mark.parametrize(
    ("log_p", "stepper", "init", "expected", "words"), [r[1:] for r in WARNED], ids=[r[0] for r in WARNED]
)
def test_recorded_findings(log_p, stepper, init, expected, words):
    r = fp.run(log_p, stepper, init, key=jax.random.key(1), steps=40, window=20, monitor=fp.Monitor(**LIGHT),
               progress=False)  # fmt: skip
    assert r.status == "done"
    assert sorted(kinds(r)) == sorted(expected), r.warnings
    assert words in r.warnings[0], r.warnings
    assert f"{len(expected)} warning(s)" in r.reason and "warning: " in r.summary()
    assert "warnings=" in repr(r)


def test_findings_survive_save_and_load(tmp_path):
    r = fp.run(_stiff, fp.MALA(step_size=10.0), X0 * 1e-3, key=jax.random.key(1), steps=40, window=20,
               monitor=fp.Monitor(**LIGHT), progress=False)  # fmt: skip
    r.save(tmp_path / "r.npz")
    back = fp.load(tmp_path / "r.npz")
    assert back.warnings == r.warnings and len(back.warnings) == 1 and back.reason == r.reason


def test_a_sweep_records_each_members_findings():
    """fp.sweep shares the policy: a member whose every proposal is rejected says so, the
    member with a good step does not; and a start refused by run is refused by sweep."""
    stuck, fine = fp.sweep(_stiff, fp.MALA(step_size=10.0), X0 * 1e-3, key=jax.random.key(1), step_size=[10.0, 5e-7],
                           steps=20, window=20, monitor=fp.Monitor(**LIGHT))  # fmt: skip
    assert kinds(stuck) == ["stuck"] and "warning(s)" in stuck.reason
    assert fine.warnings == [] and fine.status == "done"
    with pytest.raises(ValueError, match="init: expected particles that differ"):
        fp.sweep(std_normal, fp.SVGD(), jnp.ones((8, 2)), key=jax.random.key(1), step_size=[0.1, 0.2], steps=5)


def test_a_healthy_run_has_no_findings():
    """Control: the checks can fail, and do not fire on a plain run."""
    r = fp.run(
        _stiff,
        fp.MALA(step_size=5e-7),
        X0 * 1e-3,
        key=jax.random.key(1),
        steps=40,
        window=20,
        monitor=fp.Monitor(**LIGHT),
        progress=False,
    )  # fmt: skip  (the stuck row's program, a good step)
    assert r.status == "done" and r.warnings == [] and "warning" not in r.reason


@pytest.mark.parametrize(
    ("accept", "moved", "kind"),
    [(0.0, False, "stuck"), (LOW_ACCEPTANCE / 2, True, "rejecting"), (0.5, True, None)],
    ids=["no-move", "low-acceptance", "fine"],
)
def test_window_findings_of_an_adjusted_stepper(accept, moved, kind):
    target, _ = fp.Target(std_normal).bind(X0)
    centre, spread = np.array([0.1, 0.2]), np.array([1.0, 1.0])
    before = (centre + (0.01 if moved else 0.0), spread)
    rec = {"step": 100, "n_nonfinite": 0, "centre": centre, "spread": spread, "accept": accept}
    found = window_findings(target, before, rec, n=32, eps=float(np.finfo(np.float32).eps), dtype_name="float32")
    assert [f.kind for f in found] == ([] if kind is None else [kind])


# ----------------------------------------------------------------------------- log_p = +inf mid-run
def _posinf_beyond(x):
    """N(0, 1) with log_p = +inf beyond 1.2 (its score stays finite there: the gradient of a
    constant branch of jnp.where is 0), so only the value tells."""
    return jst.norm.logpdf(x[0]) + jnp.where(x[0] > 1.2, jnp.inf, 0.0)


CHEAP_SOLVER = fp.InnerSolver(method="sgd", learning_rate=0.05, max_iters=20)
POSINF_STEPPERS = {
    "Langevin": fp.Langevin(step_size=0.1),
    "MALA": fp.MALA(step_size=0.5),
    "SVGD": fp.SVGD(step_size=0.5),
    "BlobFlow": fp.BlobFlow(step_size=0.1),
    "EnsembleLangevin": fp.EnsembleLangevin(step_size=0.1),
    # a plain first-order inner solver compiles in a fraction of L-BFGS's time; the policy does not depend on it
    "ImplicitLangevin": fp.ImplicitLangevin(step_size=0.2, solver=CHEAP_SOLVER),
    "JKO": fp.JKO(step_size=0.2, solver=CHEAP_SOLVER),
    "ForwardBackward": fp.ForwardBackward(step_size=0.2),
    "ProximalLangevin": fp.ProximalLangevin(step_size=0.1, prox=fp.prox.Box(-20.0, 20.0)),
    "KineticLangevin": fp.KineticLangevin(step_size=0.2, friction=1.0),
    "SGLD": fp.SGLD(step_size=0.1),  # on a plain target its score estimate is the exact score
    "SGHMC": fp.SGHMC(step_size=0.2, friction=1.0),
    "Split": fp.Split((fp.Explicit(), fp.HeatFlow()), step_size=0.1, order="strang"),
}


def test_posinf_covers_every_library_stepper():
    assert sorted(POSINF_STEPPERS) == sorted(LIBRARY_STEPPERS)


@pytest.mark.parametrize("name", sorted(POSINF_STEPPERS))
def test_posinf_reached_mid_run_ends_the_run_the_same_way_for_every_stepper(name):
    """Policy (flowpost/engine/_monitor.py): +inf is a defect of log_p; the run returns the
    last good window as a blow-up naming log_p, and does not halve the step."""
    init = jnp.linspace(-0.5, 1.0, 16)[:, None]  # log_p finite at the start, +inf a few steps away
    r = fp.run(_posinf_beyond, POSINF_STEPPERS[name], init, key=jax.random.key(1), steps=200, window=10,
               monitor=fp.Monitor(**LIGHT), on_blowup="halve", progress=False)  # fmt: skip
    assert r.status == "blow-up", (r.status, r.reason)
    assert r.reason.startswith("log_p: expected a log-density that is finite or -inf; got log_p = +inf"), r.reason
    assert "smaller step_size" not in r.reason and r.events == []  # no halving: a smaller step is no remedy
    assert np.all(np.asarray(_posinf_beyond(r.unconstrained.T)) < np.inf)  # the last good ensemble


# ----------------------------------------------------------------------------- halving at the edge
def test_halving_reports_the_step_bias_left():
    """Langevin on N(0, s2), s = 0.1 (L = 1/s2 = 100), started at h L = 2.5: the first window
    blows up, one halving leaves h L = 1.25, stable but biased. The closed-form stationary
    variance of the unadjusted chain x' = (1 - h/s2) x + sqrt(2h) xi is s2 / (1 - h/(2 s2))
    ("Exponential convergence of Langevin distributions and their discrete approximations",
    1996): 2.67 s2 here, which the run must match and which the recorded step-bias finding
    bounds from below (> 1/(1 - 2^-1) = 2)."""
    s2, n = 0.01, 512
    init = 0.1 * jax.random.normal(jax.random.key(0), (n, 1))
    r = fp.run(_narrow, fp.Langevin(step_size=2.5 * s2), init, key=jax.random.key(2),
               steps=300, window=100, monitor=fp.Monitor(**LIGHT), on_blowup="halve", progress=False)  # fmt: skip
    assert r.status == "done" and r.report["halvings"] == 1
    assert "step-bias" in kinds(r) and "factor 2" in r.warnings[-1], r.warnings
    h = r.report["step_size"]
    exact = s2 / (1 - h / (2 * s2))
    var = float(np.var(r.unconstrained[:, 0], ddof=1))
    # 5 Monte-Carlo standard errors of a variance from n independent Gaussian draws: se = v sqrt(2/(n-1))
    assert abs(var - exact) < 5 * exact * np.sqrt(2 / (n - 1)), (var, exact)
    assert var / s2 > 2.0  # the bound the finding states


# ----------------------------------------------------------------------------- summaries in float64
def test_summary_of_a_float32_point_mass_far_from_zero():
    """A point mass at 1e8 in float32: the sd is exactly 0 (float32 summation gave 80.6)."""
    x = jnp.full((1000, 1), 1e8, jnp.float32)
    target, u = fp.Target(std_normal).bind(x)
    res = fp.Result(target=target, state=fp.ParticleState(x=u), status="done", reason="test")
    row = res.summary().splitlines()[3].split()
    assert float(row[1]) == 1e8 and float(row[2]) == 0.0, row


def test_summary_of_a_float32_ensemble_matches_exact_arithmetic():
    # outside reference: Python's statistics module on the same numbers as Python floats (exact rounding)
    vals = 1e8 + 8.0 * np.arange(-3, 4, dtype=np.float64)
    x = jnp.asarray(np.repeat(vals, 50)[:, None], jnp.float32)  # exactly representable in float32
    target, u = fp.Target(std_normal).bind(x)
    row = fp.Result(target=target, state=fp.ParticleState(x=u)).summary().splitlines()[3].split()
    ref = statistics.stdev(float(v) for v in np.asarray(x[:, 0], np.float64))
    assert abs(float(row[2]) - ref) <= 1e-4 * ref, (row, ref)  # the table prints 5 significant digits


# ----------------------------------------------------------------------------- the test kit's score check
@pytest.mark.parametrize(
    ("log_p", "words"),
    [(_rounded, "exactly 0"), (_int_cast, "exactly 0"), (lambda t: jnp.sum(t) + jnp.round(t[0]), "same non-zero")],
    ids=["round", "int-cast", "linear"],
)
def test_the_kit_flags_a_flat_score(log_p, words):
    with pytest.raises(AssertionError) as info:
        fp.testing.assert_score_matches(log_p, around=jnp.zeros(2), scale=1.0, num_points=8)
    assert str(info.value).startswith("log_p: expected a score that varies") and words in str(info.value)


def test_the_kit_passes_a_smooth_score():
    report = fp.testing.assert_score_matches(std_normal, around=jnp.zeros(2), scale=1.0, num_points=8)
    assert report.flatness == ""
