"""The one stepper protocol: traced hyperparameters, step-size controllers, batched runs,
checkpoint identity, splittings of parts.

Compilations are counted with JAX's own monitoring events (the backend-compile event carries
the compiled function's name), so "one compilation of the window" is measured, not assumed.
"""

import os
import subprocess
import sys
import textwrap

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np
import pytest

import flowpost as fp

_COMPILES: list[str] = []


def _listener(event, duration, **kw):
    if event == "/jax/core/compile/backend_compile_duration":
        _COMPILES.append(str(kw.get("fun_name", "")))


jax.monitoring.register_event_duration_secs_listener(_listener)


class _Count:
    """Compilations (by function name) made inside the ``with`` block."""

    def __enter__(self):
        self.start = len(_COMPILES)
        return self

    def __exit__(self, *exc):
        self.names = _COMPILES[self.start :]

    def of(self, name: str) -> int:
        return sum(1 for n in self.names if n == f"jit({name})")


def _fresh_normal():
    """A new log-density function each call: a new target structure, so its first run must
    compile afresh (earlier tests in the same process cannot have cached it)."""

    def log_p(x):
        return jnp.sum(jst.norm.logpdf(x))

    return log_p


def test_five_step_sizes_compile_the_window_once():
    log_p = _fresh_normal()
    x0 = jnp.zeros((64, 2))
    with _Count() as first:
        fp.run(log_p, fp.Langevin(step_size=0.01), x0, key=jax.random.key(0), steps=20, window=10, progress=False)
    with _Count() as later:
        for h in (0.02, 0.05, 0.1, 0.3):
            fp.run(log_p, fp.Langevin(step_size=h), x0, key=jax.random.key(0), steps=20, window=10, progress=False)
        # a step size given to run instead of the stepper: the same compiled window
        fp.run(log_p, fp.Langevin(), x0, key=jax.random.key(0), steps=20, window=10, progress=False, step_size=0.2)
    assert first.of("window_body") == 1
    assert later.names == []  # nothing at all is compiled again


def test_halving_after_a_blow_up_compiles_the_window_once():
    """h = 3 on N(0, 1) is beyond the explicit step's stability limit 2 / L = 2; halving the
    step after the roll-back is a new traced value, not a new program."""
    log_p = _fresh_normal()
    with _Count() as c:
        r = fp.run(
            log_p,
            fp.Langevin(step_size=3.0),
            jnp.zeros((32, 2)),
            key=jax.random.key(0),
            steps=200,
            window=25,
            progress=False,
            on_blowup="halve",
        )
    assert r.status == "done" and r.report["halvings"] >= 1
    assert r.report["step_size"] < 2.0
    assert c.of("window_body") == 1


def test_acceptance_tuning_compiles_the_window_once():
    """MALA's step adapts inside the compiled window (the controller's state is in the
    carry): one compilation for the run, none for a second run with other tuning numbers."""
    log_p = _fresh_normal()
    x0 = jax.random.normal(jax.random.key(3), (256, 2))
    with _Count() as c:
        r = fp.run(
            log_p,
            fp.MALA(step_size=0.01, tune_steps=300),
            x0,
            key=jax.random.key(0),
            steps=400,
            window=50,
            progress=False,
        )
    assert c.of("window_body") == 1
    assert r.report["tuned_step_size"] != 0.01
    with _Count() as again:
        fp.run(
            log_p,
            fp.MALA(step_size=0.5, tune_steps=200, target_accept=0.7),
            x0,
            key=jax.random.key(0),
            steps=400,
            window=50,
            progress=False,
        )
    assert again.names == []


def test_controllers_schedule_and_flow_time():
    """A scheduled step h_t = 0.1 / (1 + t / 10): the flow time is the sum of the steps taken
    (computed here with numpy), and the windows' step sizes follow the schedule."""
    log_p = _fresh_normal()
    sched = fp.Schedule(lambda t: 0.1 / (1.0 + t / 10.0))
    r = fp.run(
        log_p,
        fp.Langevin(),
        jnp.zeros((16, 1)),
        key=jax.random.key(0),
        steps=60,
        window=20,
        progress=False,
        step_size=sched,
    )
    t = np.arange(60)
    h = 0.1 / (1.0 + t / 10.0)
    np.testing.assert_allclose(r.history.column("flow_time"), np.cumsum(h)[[19, 39, 59]], rtol=1e-5)
    np.testing.assert_allclose(
        r.history.column("step_size"), [h[:20].mean(), h[20:40].mean(), h[40:].mean()], rtol=1e-5
    )
    with pytest.raises(TypeError, match="step_size"):
        fp.run(
            log_p,
            fp.Langevin(),
            jnp.zeros((16, 1)),
            key=jax.random.key(0),
            steps=1,
            progress=False,
            step_size=lambda t: 0.1,
        )
    with pytest.raises(TypeError, match=r"step_size: expected a stepper that reports \['accept'\]"):
        fp.run(
            log_p,
            fp.Langevin(),
            jnp.zeros((16, 1)),
            key=jax.random.key(0),
            steps=1,
            progress=False,
            step_size=fp.AcceptanceTarget(0.1),
        )


def test_vmapped_step_sizes_match_the_ula_variance():
    """Eight step sizes of unadjusted Langevin on N(0, 1) in one batched computation. Each
    member's stationary variance is 1 / (1 - h/2) ("Exponential convergence of Langevin
    distributions and their discrete approximations", Bernoulli 1996: the chain is the AR(1)
    process x' = (1 - h) x + sqrt(2h) xi). The ensemble of N independent chains at step 300
    has converged (the initial variance error decays like (1 - h)^(2t), below 1e-4 of the
    target for every h here) and its sample variance has standard error v sqrt(2 / (N - 1));
    each member must be within 5 of them. The batch costs one compilation."""
    hs = [0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.8]
    n = 20000
    log_p = _fresh_normal()
    keys = jax.random.split(jax.random.key(11), len(hs))
    with _Count() as c:
        results = fp.sweep(
            log_p,
            fp.Langevin(),
            jnp.zeros((n, 1)),
            key=keys,
            step_size=hs,
            steps=300,
            window=100,
            monitor=fp.BareMonitor(),
        )
    assert c.of("batch_body") == 1 and c.of("window_body") == 0
    assert len(results) == len(hs)
    for h, r in zip(hs, results):
        v = 1.0 / (1.0 - h / 2.0)
        se = v * np.sqrt(2.0 / (n - 1))
        got = float(np.var(r.unconstrained, ddof=1))
        assert abs(got - v) < 5 * se, (h, got, v, se)
        assert r.report["step_size"] == pytest.approx(h)


@pytest.mark.slow
def test_sweep_shares_a_key_and_matches_single_runs():
    """A sweep member is the same computation as a single run with that step size and key
    (up to float rounding between the batched and unbatched programs)."""
    log_p = _fresh_normal()
    x0 = jax.random.normal(jax.random.key(2), (50, 2))
    batch = fp.sweep(
        log_p, fp.KineticLangevin(friction=1.5), x0, key=jax.random.key(5), step_size=[0.1, 0.3], steps=40, window=20
    )
    for h, r in zip((0.1, 0.3), batch):
        one = fp.run(
            log_p,
            fp.KineticLangevin(step_size=h, friction=1.5),
            x0,
            key=jax.random.key(5),
            steps=40,
            window=20,
            progress=False,
        )
        np.testing.assert_allclose(r.unconstrained, one.unconstrained, rtol=1e-5, atol=1e-5)
        assert [rec["step"] for rec in r.history] == [rec["step"] for rec in one.history]
    with pytest.raises(TypeError, match="batch"):
        fp.sweep(log_p, fp.Langevin(step_size=0.1), x0, key=jax.random.key(0), steps=10)
    with pytest.raises(ValueError, match="key: expected a batch of 2 keys"):
        fp.sweep(log_p, fp.Langevin(), x0, key=jax.random.split(jax.random.key(0), 3), step_size=[0.1, 0.2], steps=10)


def _run_x(stepper, log_p, x0, key, steps=30):
    return fp.run(
        log_p, stepper, x0, key=key, steps=steps, window=10, progress=False, monitor=fp.BareMonitor()
    ).unconstrained


@pytest.mark.slow
def test_split_of_parts_reproduces_the_named_steppers_bit_for_bit():
    """The named splitting steppers are recipes over parts: the hand-built Split gives the
    identical ensemble for the same key."""
    log_p = lambda x: jnp.sum(jst.norm.logpdf(x, 0.5, 2.0))
    x0 = jax.random.normal(jax.random.key(0), (200, 3))
    k = jax.random.key(4)
    pairs = [
        (
            fp.KineticLangevin(step_size=0.2, friction=0.7),
            fp.Split((fp.Kick(), fp.Drift(), fp.Friction(0.7)), step_size=0.2, order="strang"),
        ),
        (fp.ForwardBackward(step_size=0.1), fp.Split((fp.Explicit(), fp.GaussianEntropy()), step_size=0.1)),
        (fp.Langevin(step_size=0.05), fp.Split((fp.Explicit(), fp.HeatFlow()), step_size=0.05)),
    ]
    for named, split in pairs:
        np.testing.assert_array_equal(_run_x(named, log_p, x0, k), _run_x(split, log_p, x0, k))


def test_langevin_is_the_written_out_update():
    """Langevin against the update written out by hand with the documented key stream
    (step t: k_t = fold_in(key, t); the heat-flow part, the second of the splitting, draws its
    noise with fold_in(k_t, 1)): x <- x + h s(x) + sqrt(2h) xi, s(x) = -(x - 0.5) / 4."""
    h, key = 0.05, jax.random.key(4)
    x = jax.random.normal(jax.random.key(0), (100, 2))
    got = _run_x(fp.Langevin(step_size=h), lambda u: jnp.sum(jst.norm.logpdf(u, 0.5, 2.0)), x, key, steps=20)
    for t in range(20):
        kt = jax.random.fold_in(key, t)
        x = x + h * (-(x - 0.5) / 4.0)
        x = x + jnp.sqrt(2 * h) * jax.random.normal(jax.random.fold_in(kt, 1), x.shape)
    np.testing.assert_allclose(got, np.asarray(x), rtol=1e-6, atol=1e-6)


def test_steppers_are_pytrees_with_traced_numbers():
    kl = fp.KineticLangevin(step_size=0.1, friction=2.5)
    assert sorted(jax.tree_util.tree_leaves(kl)) == [0.1, 2.5]
    leaves, _ = jax.tree_util.tree_flatten(fp.Split((fp.Kick(), fp.Friction(3.0)), order="strang"))
    assert 3.0 in leaves
    assert "strang" not in leaves  # structure is static
    # a traced friction: one compiled function serves every value
    traces = []

    @jax.jit
    def step(stepper, target, u, key):
        traces.append(1)
        st = stepper.start(target, u, key)
        return stepper.advance(target, st, key, jnp.asarray(0.1))[0].x

    target, u = fp.Target(lambda v: -0.5 * jnp.sum(v**2)).bind(jnp.ones((4, 2)))
    for g in (0.5, 1.0, 2.0):
        step(fp.KineticLangevin(friction=g), target, u, jax.random.key(0))
    assert len(traces) == 1


def test_constructors_refuse_inf_nan_and_coercions():
    for make, name in [
        (lambda: fp.MALA(tune_gain=float("inf")), "tune_gain"),
        (lambda: fp.BlobFlow(bandwidth_factor=float("inf")), "bandwidth_factor"),
        (lambda: fp.Monitor(growth_limit=float("nan")), "growth_limit"),
        (lambda: fp.Langevin(step_size="0.1"), "step_size"),
        (lambda: fp.KineticLangevin(friction=float("nan")), "friction"),
        (lambda: fp.Friction(gamma=True), "gamma"),
        (lambda: fp.Monitor(trail_thin=2.0), "trail_thin"),
        (lambda: fp.MALA(tune_steps=10.5), "tune_steps"),
    ]:
        with pytest.raises((TypeError, ValueError), match=rf"{name}: expected"):
            make()
    log_p = _fresh_normal()
    for bad, kind in [(150.9, TypeError), ("200", TypeError), (-1, ValueError)]:
        with pytest.raises(kind, match="steps: expected an integer"):
            fp.run(
                log_p, fp.Langevin(step_size=0.1), jnp.zeros((4, 1)), key=jax.random.key(0), steps=bad, progress=False
            )
    with pytest.raises(TypeError, match="stepper: expected a stepper instance"):
        fp.run(log_p, fp.Langevin, jnp.zeros((4, 1)), key=jax.random.key(0), steps=1, progress=False)


SCRIPT = textwrap.dedent('''
    import sys
    import jax, jax.numpy as jnp, numpy as np
    import flowpost as fp

    def gaussian_prox(u, h):
        """Closed-form proximal map of -log N(0, I): argmin_y |y|^2/2 + |y - u|^2/(2h)."""
        return u / (1.0 + h)

    mode, path, out = sys.argv[1], sys.argv[2], sys.argv[3]
    log_p = lambda x: -0.5 * jnp.sum(x ** 2)
    x0 = jax.random.normal(jax.random.key(0), (64, 2))
    stepper = fp.ImplicitLangevin(step_size=0.3, prox=gaussian_prox)
    kw = dict(key=jax.random.key(7), window=50, progress=False)
    if mode == "first":  # the uninterrupted run, then the first half with checkpoints
        np.save(out, fp.run(log_p, stepper, x0, steps=400, **kw).unconstrained)
        fp.run(log_p, stepper, x0, steps=200, checkpoint=path, checkpoint_every=1, **kw)
    else:  # resume in a fresh process; then checkpoints of another stepper or shape, refused
        np.save(out, fp.run(log_p, stepper, x0, steps=400, resume=path, **kw).unconstrained)
        for other, init in ((fp.ImplicitLangevin(step_size=0.2, prox=gaussian_prox), x0), (stepper, x0[:32])):
            try:
                fp.run(log_p, other, init, steps=400, resume=path, **kw)
                print("ACCEPTED")
            except ValueError as err:
                print(err)
''')


@pytest.mark.slow
def test_user_prox_run_resumes_in_a_fresh_process(tmp_path):
    """A run with a user prox (a module-level function, identified by its qualified name)
    checkpoints, and a fresh process resumes it to the same end, bit for bit. A checkpoint of
    another stepper or another ensemble shape is refused, naming what differs."""
    script = tmp_path / "fit.py"
    script.write_text(SCRIPT)
    ck = str(tmp_path / "run.npz")
    env = {**os.environ, "JAX_PLATFORMS": "cpu"}

    def call(mode):
        out = str(tmp_path / f"{mode}.npy")
        p = subprocess.run(
            [sys.executable, str(script), mode, ck, out], capture_output=True, text=True, env=env, timeout=300
        )
        assert p.returncode == 0, p.stderr
        return p.stdout, out

    _, full = call("first")
    said, resumed = call("resume")  # one fresh process: the resume, then the two refusals
    np.testing.assert_array_equal(np.load(resumed), np.load(full))
    other_stepper, other_shape = said.strip().splitlines()
    assert 'stepper.step_size: checkpoint "0.3", this run "0.2"' in other_stepper
    assert other_shape.startswith("resume: expected a checkpoint") and "state:" in other_shape


def test_fingerprints_name_callables_not_addresses():
    def prox_a(u, h):
        return u

    fa = fp.engine.fingerprint(fp.ImplicitLangevin(prox=prox_a))
    text = repr(fa)
    assert "0x" not in text and "prox_a" in text
    assert fp.engine.fingerprint(fp.KineticLangevin(friction=2.0)) != fp.engine.fingerprint(
        fp.KineticLangevin(friction=3.0)
    )


def test_lazy_public_names_match_all():
    # __all__ is spelt out for type checkers; it must name exactly what __getattr__ resolves
    import flowpost.testing as kit

    assert set(fp.__all__) == set(fp._WHERE) | fp._SUBMODULES
    assert set(kit.__all__) == set(kit._WHERE)
    for module in (fp, kit):
        for name in module.__all__:
            assert getattr(module, name) is not None
