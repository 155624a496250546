"""The shared convergence monitor: its figures, stop rules, roll-back and pictures."""

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp
from flowpost.engine import BareMonitor


def gauss(x):
    return jnp.sum(jst.norm.logpdf(x, 2.0, 1.5))


def test_plateau_stops_langevin_before_budget_near_target():
    """Plateau on the discrepancy stops Langevin on N(2, 1.5^2 I) (d = 2) well before its step
    budget. At the stop the ensemble is within tolerance of the target: ULA at h = 0.02 has
    stationary variance v / (1 - h/(2v)) (+0.4%; "Exponential convergence of Langevin
    distributions and their discrete approximations", 1996), below the Monte-Carlo error of
    N = 4000 particles; tolerance 5 standard errors (sd/sqrt(N) for the mean,
    v sqrt(2/N) for the variance)."""
    n, budget = 4000, 20_000
    mon = fp.Monitor(plateau=("ksd", 4, 0.1))
    r = fp.run(
        gauss,
        fp.Langevin(step_size=0.02),
        jnp.full((n, 2), -6.0),
        key=jax.random.key(3),
        steps=budget,
        window=100,
        monitor=mon,
        progress=False,
    )
    assert r.status == "stopped" and "plateau" in r.reason
    assert r.steps < budget / 4
    x = r.unconstrained
    v = 1.5**2 / (1 - 0.02 / (2 * 1.5**2))
    assert np.all(np.abs(x.mean(0) - 2.0) < 5 * np.sqrt(v / n))
    assert np.all(np.abs(x.var(0, ddof=1) - v) < 5 * v * np.sqrt(2 / n))
    ksd = r.history.column("ksd")
    assert ksd[-1] < ksd[0] / 10  # the discrepancy fell by an order of magnitude on the way in


def test_target_discrepancy_and_user_rule_say_which_rule_stopped():
    mon = fp.Monitor(target_discrepancy=0.5)
    r = fp.run(
        gauss,
        fp.Langevin(step_size=0.05),
        jnp.full((400, 2), -3.0),
        key=jax.random.key(0),
        steps=10_000,
        monitor=mon,
        progress=False,
    )
    assert r.status == "stopped" and "target discrepancy" in r.reason
    assert r.history.last["ksd"] <= 0.5

    mon = fp.Monitor(stop_when=lambda h: "enough windows" if len(h) >= 3 else None)
    r = fp.run(
        gauss,
        fp.Langevin(step_size=0.05),
        jnp.zeros((100, 2)),
        key=jax.random.key(0),
        steps=10_000,
        window=50,
        monitor=mon,
        progress=False,
    )
    assert r.status == "stopped" and r.reason == "enough windows" and r.steps == 150


def test_rhat_and_ess_recorded_for_stochastic_steppers():
    """After burn-in, independent Langevin chains of one distribution give R-hat close to 1
    (below 1.05 on 64 short trails; the 1.01 threshold of the 2021 R-hat paper is tested on
    long chains in test_mixing.py) and a positive ESS."""
    r = fp.run(
        gauss,
        fp.Langevin(step_size=0.1),
        jax.random.normal(jax.random.key(1), (256, 2)) + 2.0,
        key=jax.random.key(2),
        steps=3000,
        window=100,
        progress=False,
    )
    last = r.history.last
    assert 1.0 - 0.05 < last["rhat"] < 1.05
    assert last["ess"] > 64


def test_rhat_flags_an_unmixed_start():
    """Two clusters of particles started 20 sd apart, a few steps in: the trails disagree."""
    x0 = jnp.concatenate([jnp.full((32, 1), -30.0), jnp.full((32, 1), 30.0)])
    r = fp.run(
        lambda x: jnp.sum(jst.norm.logpdf(x)),
        fp.Langevin(step_size=1e-4),
        x0,
        key=jax.random.key(0),
        steps=200,
        window=100,
        progress=False,
        monitor=fp.Monitor(trail_thin=1),
    )
    assert r.history.last["rhat"] > 1.1


def test_blow_up_rolls_back_with_reason_and_halving_finishes():
    """An explicit step on a stiff target: curvature 10^4 in one direction makes h = 10^-3
    unstable (|1 - h L| = 9 > 1)."""
    stiff = lambda x: -0.5 * (1e4 * x[0] ** 2 + x[1] ** 2)
    x0 = 0.01 * jax.random.normal(jax.random.key(0), (64, 2))
    r = fp.run(stiff, fp.Langevin(step_size=1e-3), x0, key=jax.random.key(1), steps=2000, window=20, progress=False)
    assert r.status == "blow-up" and "smaller step" in r.reason
    assert np.all(np.isfinite(r.unconstrained))
    ev = [rec for rec in r.history if rec.get("event") == "rollback"]
    assert len(ev) == 1 and ev[0]["back_to"] == r.steps
    r2 = fp.run(
        stiff,
        fp.Langevin(step_size=1e-3),
        x0,
        key=jax.random.key(1),
        steps=2000,
        window=20,
        progress=False,
        on_blowup="halve",
    )
    assert r2.status == "done" and np.all(np.isfinite(r2.unconstrained))
    assert r2.report["step_size"] < 2e-4  # stable only below 2 / L = 2e-4 (the controller's halved step)
    assert sum(rec.get("event") == "rollback" for rec in r2.history) >= 3


def test_history_arrays_table_and_plot(tmp_path):
    pytest.importorskip("matplotlib")
    import matplotlib

    matplotlib.use("Agg")
    t = fp.Target(lambda th: jst.norm.logpdf(th["a"]) + jst.gamma.logpdf(th["b"], 3.0), support={"b": fp.Positive()})
    r = fp.run(
        t,
        fp.Langevin(step_size=0.05),
        {"a": jnp.zeros(200), "b": jnp.ones(200)},
        key=jax.random.key(0),
        steps=500,
        progress=False,
    )
    arrs = r.history.as_arrays()
    assert arrs["ksd"].shape == (5,) and arrs["centre"].shape == (5, 2)
    assert "ksd" in r.history.table() and "mean_logp" in r.history.table()
    fig = r.plot(params=["a", "b"])
    assert len(fig.axes) >= 4
    fig.savefig(tmp_path / "run.png")
    assert (tmp_path / "run.png").stat().st_size > 1000
    with pytest.raises(ValueError, match="params"):
        r.plot(params=["zz"])


def test_bare_monitor_only_checks_finiteness():
    r = fp.run(
        gauss,
        fp.Langevin(step_size=0.05),
        jnp.zeros((50, 2)),
        key=jax.random.key(0),
        steps=200,
        monitor=BareMonitor(),
        progress=False,
    )
    assert "ksd" not in r.history.last and r.history.last["n_nonfinite"] == 0
