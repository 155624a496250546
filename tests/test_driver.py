"""The run loop: reproducibility, checkpoints, stop rules, nothing lost on blow-up or
interrupt, and the result file."""

import json

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp


def log_p(theta):
    return jst.norm.logpdf(theta["m"], 1.0, 2.0) + jnp.sum(jst.norm.logpdf(theta["v"]))


def _init(n=64):
    return {"m": jnp.zeros(n), "v": jnp.zeros((n, 2))}


def test_same_key_same_particles_and_window_length_does_not_matter():
    a = fp.run(log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(4), steps=250, progress=False)
    b = fp.run(log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(4), steps=250, progress=False)
    c = fp.run(log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(4), steps=250, window=30, progress=False)
    d = fp.run(log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(5), steps=250, progress=False)
    np.testing.assert_array_equal(a.unconstrained, b.unconstrained)
    np.testing.assert_allclose(a.unconstrained, c.unconstrained, rtol=1e-6, atol=1e-6)
    assert not np.allclose(a.unconstrained, d.unconstrained)
    assert a.steps == 250 and a.status == "done" and len(a.history) == 3  # windows of 100, 100, 50


def test_checkpoint_then_resume_equals_uninterrupted(tmp_path):
    ck = tmp_path / "ck.npz"
    full = fp.run(
        log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(8), steps=600, window=100, progress=False
    )
    first = fp.run(
        log_p,
        fp.Langevin(step_size=0.05),
        _init(),
        key=jax.random.key(8),
        steps=300,
        window=100,
        progress=False,
        checkpoint=ck,
        checkpoint_every=1,
    )
    assert first.steps == 300 and ck.exists()
    # the key given here is ignored in favour of the checkpoint's own key stream
    rest = fp.run(
        log_p,
        fp.Langevin(step_size=0.05),
        _init(),
        key=jax.random.key(999),
        steps=600,
        window=100,
        progress=False,
        resume=ck,
    )
    assert rest.steps == 600
    np.testing.assert_array_equal(rest.unconstrained, full.unconstrained)
    assert [r["step"] for r in rest.history] == [r["step"] for r in full.history]
    with pytest.raises(ValueError, match=r"resume: .*differs in .*stepper\.step_size"):
        fp.run(log_p, fp.Langevin(step_size=0.1), _init(), key=jax.random.key(8), steps=600, resume=ck, progress=False)


def test_blow_up_returns_last_good_ensemble_with_reason():
    """h = 3 on N(0, 1) exceeds the stability limit 2 / L = 2 of the explicit step (the AR(1)
    factor |1 - h| = 2 > 1), so the ensemble diverges; the run keeps the last finite window."""
    target = lambda x: jnp.sum(jst.norm.logpdf(x))
    r = fp.run(
        target,
        fp.Langevin(step_size=3.0),
        jnp.zeros((32, 2)),
        key=jax.random.key(0),
        steps=5000,
        window=25,
        progress=False,
    )
    assert r.status == "blow-up"
    assert "implicit" in r.reason and "step" in r.reason
    assert np.all(np.isfinite(r.unconstrained))
    assert 0 < r.steps < 5000
    assert any(rec.get("event") == "rollback" for rec in r.history)


def test_halving_the_step_finishes():
    target = lambda x: jnp.sum(jst.norm.logpdf(x))
    r = fp.run(
        target,
        fp.Langevin(step_size=3.0),
        jnp.zeros((32, 2)),
        key=jax.random.key(0),
        steps=400,
        window=25,
        progress=False,
        on_blowup="halve",
    )
    assert r.status == "done" and r.steps == 400
    assert np.all(np.isfinite(r.unconstrained))
    assert r.report["step_size"] < 2.0 and r.report["halvings"] >= 1 and r.events


class _InterruptingMonitor(fp.Monitor):
    def __init__(self, after):
        super().__init__()
        self.after, self.calls = after, 0

    def read(self, *args, **kw):
        self.calls += 1
        if self.calls > self.after:
            raise KeyboardInterrupt
        return super().read(*args, **kw)


def test_interrupt_returns_what_was_computed():
    r = fp.run(
        log_p,
        fp.Langevin(step_size=0.05),
        _init(),
        key=jax.random.key(1),
        steps=1000,
        window=50,
        monitor=_InterruptingMonitor(after=3),
        progress=False,
    )
    assert r.status == "interrupted" and r.steps == 150
    ref = fp.run(
        log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(1), steps=150, window=50, progress=False
    )
    np.testing.assert_array_equal(r.unconstrained, ref.unconstrained)


def test_time_budget_stops():
    r = fp.run(
        log_p,
        fp.Langevin(step_size=0.05),
        _init(),
        key=jax.random.key(1),
        steps=10**7,
        window=50,
        time_budget=0.0,
        progress=False,
    )
    assert r.status == "stopped" and "time budget" in r.reason and r.steps == 50


def test_plain_array_init_and_progress_bar(capsys):
    r = fp.run(
        lambda x: -0.5 * jnp.sum(x**2),
        fp.Langevin(step_size=0.1),
        jnp.ones((16, 3)),
        key=jax.random.key(0),
        steps=20,
        window=10,
        progress=True,
    )
    assert r.particles.shape == (16, 3)
    assert "step" in capsys.readouterr().err


def test_summary_save_load_round_trip(tmp_path):
    t = fp.Target(
        lambda th: jst.gamma.logpdf(th["s"], 3.0) + jnp.sum(jst.norm.logpdf(th["w"])), support={"s": fp.Positive()}
    )
    r = fp.run(
        t,
        fp.Langevin(step_size=0.05),
        {"s": jnp.ones(50), "w": jnp.zeros((50, 2))},
        key=jax.random.key(0),
        steps=100,
        progress=False,
    )
    text = r.summary()
    for label in ("s", "w[0]", "w[1]", "5%", "95%", "status: done"):
        assert label in text
    path = tmp_path / "fit.npz"
    r.save(path)
    again = fp.load(path)
    np.testing.assert_array_equal(again.particles["s"], r.particles["s"])
    np.testing.assert_array_equal(again.particles["w"], r.particles["w"])
    assert again.summary() == text
    np.testing.assert_allclose(again.history.column("mean_logp"), r.history.column("mean_logp"))
    assert again.history.as_arrays()["centre"].shape == (1, 3)


def test_load_rejects_foreign_and_truncated_files(tmp_path):
    other = tmp_path / "other.npz"
    np.savez(other, a=np.arange(3))
    with pytest.raises(ValueError, match=r"path: .* not a readable flowpost result"):
        fp.load(other)
    r = fp.run(
        lambda x: -0.5 * jnp.sum(x**2),
        fp.Langevin(step_size=0.1),
        jnp.ones((8, 1)),
        key=jax.random.key(0),
        steps=10,
        progress=False,
    )
    good = tmp_path / "good.npz"
    r.save(good)
    cut = tmp_path / "cut.npz"
    cut.write_bytes(good.read_bytes()[:200])
    with pytest.raises(ValueError, match="not a readable flowpost result"):
        fp.load(cut)
    pickled = tmp_path / "pickled.npz"
    np.savez(pickled, meta=np.array([{"format": "flowpost-result"}], dtype=object))
    with pytest.raises(ValueError, match="not a readable flowpost result"):
        fp.load(pickled)
    fake = tmp_path / "fake.npz"
    np.savez(fake, meta=np.array(json.dumps({"format": "something-else"})))
    with pytest.raises(ValueError, match="not a readable flowpost result"):
        fp.load(fake)


def test_evolve_matches_run():
    """The pure, vmappable evolve() uses run()'s key stream."""
    from flowpost.engine import evolve

    r = fp.run(log_p, fp.Langevin(step_size=0.05), _init(), key=jax.random.key(6), steps=120, window=40, progress=False)
    bound, x0 = fp.Target(log_p).bind(_init())
    st = jax.jit(evolve, static_argnums=(0, 4))(fp.Langevin(step_size=0.05), bound, x0, jax.random.key(6), 120)
    np.testing.assert_allclose(np.asarray(st.x), r.unconstrained, rtol=1e-5, atol=1e-5)
