"""Runs sharded over devices (``fp.run(..., devices=...)``): JAX's own mesh and multi-process runtime.

Two kinds of fresh interpreter, started once per module (a process cannot change its device
count after JAX starts):

* ``SHARDED``: one process with ``XLA_FLAGS=--xla_force_host_platform_device_count=4`` runs
  every library stepper on one device and sharded over the 4, compiles one sharded SVGD step
  at N = 40,000, d = 10 for its memory analysis, and runs the unadjusted-Langevin variance
  check sharded; it prints its figures as JSON and the tests below assert on them.
* ``PROCESS``: two processes (2 forced host devices each, coordinator on 127.0.0.1, gloo CPU
  collectives) run a Langevin run sharded over all 4 devices, write per-process checkpoints,
  are killed (SIGKILL), and two new processes resume from those checkpoints.
"""

import json
import os
import socket
import subprocess
import sys
import textwrap

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import flowpost as fp

pytestmark = pytest.mark.slow  # fresh interpreters with forced devices (collected first)
LONG = pytest.mark.long  # out of the default run: `python -m pytest -m long tests/test_sharding.py`

SHARDED = textwrap.dedent("""
    import json, time
    import jax, jax.numpy as jnp, jax.scipy.stats as jst, numpy as np
    from jax.sharding import AxisType, Mesh, NamedSharding, PartitionSpec
    import flowpost as fp

    assert len(jax.devices()) == 4, jax.devices()
    MEAN, COV = jnp.array([1.0, -1.0]), jnp.array([[1.0, 0.5], [0.5, 1.0]])

    def log_p(x):
        return jst.multivariate_normal.logpdf(x, MEAN, COV)

    STEPPERS = [
        fp.Langevin(step_size=0.05),
        fp.MALA(step_size=0.3),
        fp.SVGD(step_size=0.5),
        fp.BlobFlow(step_size=0.05),
        fp.EnsembleLangevin(step_size=0.05),
        fp.ImplicitLangevin(step_size=0.1),
        fp.JKO(step_size=0.2),
        fp.ForwardBackward(step_size=0.1),
        fp.ProximalLangevin(step_size=0.05, prox=fp.prox.Box(-20.0, 20.0)),
        fp.KineticLangevin(step_size=0.2, friction=1.0),
        fp.SGLD(step_size=0.05),
        fp.SGHMC(step_size=0.2, friction=1.0),
        fp.Split((fp.Explicit(), fp.HeatFlow()), step_size=0.05, order="strang"),
    ]
    WITH_MONITOR = ("Langevin", "SVGD")  # the default monitor (Stein discrepancy) on these two
    x0 = jax.random.normal(jax.random.key(0), (64, 2)) * 0.5 + jnp.array([3.0, 2.0])
    out = {"steppers": {}}
    for s in STEPPERS:
        name = type(s).__name__
        kw = dict(key=jax.random.key(1), steps=50, window=25, progress=False)
        if name not in WITH_MONITOR:
            kw["monitor"] = fp.BareMonitor()
        t0 = time.perf_counter()
        one = fp.run(log_p, s, x0, **kw)
        kw["monitor"] = None if name in WITH_MONITOR else fp.BareMonitor()
        four = fp.run(log_p, s, x0, devices=jax.devices(), **kw)
        a, b = np.asarray(one.unconstrained), np.asarray(four.unconstrained)
        out["steppers"][name] = {
            "status": [one.status, four.status],
            "finite": bool(np.all(np.isfinite(a)) and np.all(np.isfinite(b))),
            "identical": bool(np.array_equal(a, b)),
            "max_rel": float(np.max(np.abs(a - b)) / np.max(np.abs(a))),
            "moved": float(np.max(np.abs(a - np.asarray(x0)))),
            "spec": str(four.state.x.sharding.spec),
            "n_devices": len(four.state.x.sharding.device_set),
            "seconds": time.perf_counter() - t0,
            "ksd": [[r.get("ksd") for r in one.history.windows()], [r.get("ksd") for r in four.history.windows()]],
        }

    # one sharded SVGD step at N = 40,000, d = 10: the compiled program's memory per device
    n, d, block = 40_000, 10, fp.numerics.DEFAULT_BLOCK
    stepper = fp.SVGD(step_size=0.1)
    target, x = fp.Target(lambda x: -0.5 * jnp.sum(x**2)).bind(jax.random.normal(jax.random.key(0), (n, d)))
    mem = {}
    for p in (1, 4):
        mesh = Mesh(np.array(jax.devices()[:p]), (fp.numerics.PARTICLE_AXIS,), axis_types=(AxisType.Auto,))
        rows, rep = NamedSharding(mesh, PartitionSpec(fp.numerics.PARTICLE_AXIS)), NamedSharding(mesh, PartitionSpec())
        with jax.set_mesh(mesh):
            shapes = jax.eval_shape(lambda x: stepper.start(target, x, jax.random.key(1)), x)
            state = jax.tree.map(
                lambda s: jax.ShapeDtypeStruct(s.shape, s.dtype, sharding=rows if s.shape[:1] == (n,) else rep), shapes
            )
            step = jax.jit(lambda t, st, k: stepper.advance(t, st, k, jnp.float32(0.1)))
            compiled = step.lower(target, state, jax.random.key(2)).compile()
        m, text = compiled.memory_analysis(), compiled.as_text()
        mem[p] = {
            "temp": int(m.temp_size_in_bytes),
            "argument": int(m.argument_size_in_bytes),
            "ppermute": text.count("collective-permute"),
            "all_gather": text.count("all-gather"),
        }
    out["memory"] = {"n": n, "d": d, "block": block, **{str(p): v for p, v in mem.items()}}

    # unadjusted Langevin, sharded: N(0, s2) per coordinate, stationary variance s2 / (1 - h / (2 s2))
    s2, h, n, d = 2.0, 0.4, 4096, 4
    start = jnp.sqrt(s2) * jax.random.normal(jax.random.key(5), (n, d))
    ula = fp.run(
        lambda x: -0.5 * jnp.sum(x**2) / s2, fp.Langevin(step_size=h), start, key=jax.random.key(6), steps=40,
        window=40, progress=False, monitor=fp.BareMonitor(), devices=jax.devices(),
    )
    u = np.asarray(ula.unconstrained, np.float64)
    out["ula"] = {"var": float(u.var()), "samples": u.size, "s2": s2, "h": h, "spec": str(ula.state.x.sharding.spec)}
    print(json.dumps(out))
""")

INDEPENDENT = ["Langevin", "MALA", "ImplicitLangevin", "ProximalLangevin", "KineticLangevin", "SGLD", "SGHMC", "Split"]
#: interacting through kernel sums (SVGD, BlobFlow, JKO's kernel density), ensemble covariances
#: (EnsembleLangevin, ForwardBackward): the order of the additions over shards differs
INTERACTING = ["SVGD", "BlobFlow", "EnsembleLangevin", "JKO", "ForwardBackward"]


def _start(script: str, args: list[str], devices: int) -> subprocess.Popen:
    """A fresh interpreter running ``script`` on ``devices`` forced host devices."""
    env = {**os.environ, "JAX_PLATFORMS": "cpu", "XLA_FLAGS": f"--xla_force_host_platform_device_count={devices}"}
    root = os.path.dirname(os.path.dirname(os.path.abspath(fp.__file__)))  # this checkout's flowpost
    env["PYTHONPATH"] = os.pathsep.join([root, *filter(None, [os.environ.get("PYTHONPATH")])])
    return subprocess.Popen(
        [sys.executable, "-c", script, *args],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )


@pytest.fixture(scope="module")
def sharded_child():
    """The ``SHARDED`` process, started by the first test that asks (the two-process test, so
    that the two overlap)."""
    child = _start(SHARDED, [], 4)
    yield child
    if child.poll() is None:
        child.kill()
        child.communicate()


@pytest.fixture(scope="module")
def sharded(sharded_child):
    child = sharded_child
    out, err = child.communicate(timeout=400)
    assert child.returncode == 0, err[-4000:]
    return json.loads(out.strip().splitlines()[-1])


PROCESS = textwrap.dedent("""
    import os, sys, time
    import jax
    port, pid, phase, folder = sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4]
    jax.config.update("jax_cpu_collectives_implementation", "gloo")
    jax.distributed.initialize(f"127.0.0.1:{port}", num_processes=2, process_id=pid)
    import jax.numpy as jnp, numpy as np
    import flowpost as fp

    assert jax.process_count() == 2 and len(jax.devices()) == 4 and len(jax.local_devices()) == 2

    def log_p(x):
        return -0.5 * jnp.sum((x - 1.0) ** 2 / 0.5)

    x0 = jax.random.normal(jax.random.key(0), (64, 3))  # the same init on every process
    ck = os.path.join(folder, "run.npz")
    kw = dict(key=jax.random.key(1), window=10, progress=False, devices=jax.devices(), checkpoint=ck)
    if phase == "first":
        r = fp.run(log_p, fp.Langevin(step_size=0.05), x0, steps=30, checkpoint_every=1, **kw)
        print("checkpointed", r.steps, flush=True)
        time.sleep(300)  # killed here by the test
    else:  # started early: compile the window (no checkpoint), then wait for the killed run's files
        warm = {**kw, "checkpoint": None}
        fp.run(log_p, fp.Langevin(step_size=0.05), x0, steps=10, **warm)
        print("ready", flush=True)
        assert sys.stdin.readline().strip() == "go"
        r = fp.run(log_p, fp.Langevin(step_size=0.05), x0, steps=60, resume=ck, **kw)
        if pid == 0:
            np.save(os.path.join(folder, "final.npy"), r.unconstrained)
        print("done", r.steps, r.status, r.unconstrained.shape[0], flush=True)
""")


def _line(child: subprocess.Popen) -> str:
    """The child's next line of output that is not one of gloo's own."""
    lines = iter(child.stdout.readline, "") if child.stdout else iter(())
    return next((x.strip() for x in lines if not x.startswith("[Gloo]")), "")


def _said(child: subprocess.Popen) -> str:
    """A failed child's exit status and the end of its error output (it is killed first)."""
    child.kill()
    _, err = child.communicate()
    return f"exit {child.returncode}: {err[-3000:]}"


def _free_ports(k: int) -> list[str]:
    """``k`` distinct free ports: the sockets are held open together while the OS picks them
    (binding one at a time can hand the same port out twice once the first is closed)."""
    socks = [socket.socket() for _ in range(k)]
    try:
        for s in socks:
            s.bind(("127.0.0.1", 0))
        return [str(s.getsockname()[1]) for s in socks]
    finally:
        for s in socks:
            s.close()


@LONG
def test_two_processes_checkpoint_are_killed_and_resume_as_one_process(tmp_path, sharded_child):
    """Two processes (2 devices each, one mesh of 4) run 30 Langevin steps, each writing its
    own checkpoint (``run.process-K-of-2.npz``: its shard and the replicated leaves), and are
    killed (SIGKILL); two new processes (started meanwhile, waiting) resume from those files
    to step 60. Process 0's result (all 64 particles, gathered) is bit-identical to a
    one-process, one-device run of 60 steps computed here. (``sharded_child`` is only
    started here, to run meanwhile.)"""
    first_port, second_port = _free_ports(2)
    first = [_start(PROCESS, [first_port, str(i), "first", str(tmp_path)], 2) for i in range(2)]
    second = [_start(PROCESS, [second_port, str(i), "second", str(tmp_path)], 2) for i in range(2)]  # they wait
    try:
        for child in first:
            assert _line(child) == "checkpointed 30", _said(child)
    finally:
        for child in first:
            child.kill()  # SIGKILL: no clean shutdown
            child.communicate()
    assert sorted(os.listdir(tmp_path)) == ["run.process-0-of-2.npz", "run.process-1-of-2.npz"]
    for child in second:
        assert _line(child) == "ready", _said(child)
    for child in second:  # both told before either is waited for: they run together
        if child.stdin:
            child.stdin.write("go\n")
            child.stdin.flush()
    outs = [child.communicate(timeout=120) for child in second]
    for child, (out, err) in zip(second, outs):
        assert child.returncode == 0, err[-4000:]
        assert out.split()[-4:] == ["done", "60", "done", "64"], out

    def log_p(x):
        return -0.5 * jnp.sum((x - 1.0) ** 2 / 0.5)

    x0 = jax.random.normal(jax.random.key(0), (64, 3))
    alone = fp.run(log_p, fp.Langevin(step_size=0.05), x0, key=jax.random.key(1), steps=60, window=10, progress=False)
    np.testing.assert_array_equal(np.load(tmp_path / "final.npy"), alone.unconstrained)


def test_the_lists_cover_every_library_stepper():
    assert sorted(INDEPENDENT + INTERACTING) == sorted(fp.steppers.LIBRARY_STEPPERS)


@LONG
def test_every_stepper_runs_sharded_over_four_devices(sharded):
    got = sharded["steppers"]
    assert sorted(got) == sorted(fp.steppers.LIBRARY_STEPPERS)
    for name, r in got.items():
        assert r["status"] == ["done", "done"] and r["finite"], (name, r)
        assert r["n_devices"] == 4 and r["spec"] == "P('particles',)", (name, r)
        assert r["moved"] > 0.1, (name, r)  # the particles moved: a comparison of starts would pass trivially


@LONG
def test_independent_steppers_are_bit_identical_to_one_device(sharded):
    """The key stream is per particle (threefry, partitionable): no step of an independent
    stepper reads another shard, so the particles are the same bits."""
    for name in INDEPENDENT:
        assert sharded["steppers"][name]["identical"], (name, sharded["steppers"][name]["max_rel"])


@LONG
def test_interacting_steppers_agree_to_float_rounding(sharded):
    """50 float32 steps: the sums over other shards change only the order of the additions
    (float32 eps 1.2e-7 per addition, a few hundred additions and 50 steps), 1e-5 relative to
    the largest coordinate (the bound the issue states)."""
    for name in INTERACTING:
        r = sharded["steppers"][name]
        assert r["max_rel"] < 1e-5, (name, r["max_rel"])


@LONG
def test_the_monitors_stein_discrepancy_agrees(sharded):
    """The monitor's discrepancy (all 64 particles, whitened) computed on the sharded ensemble
    equals the one-device figure to float32 rounding, window by window."""
    for name in ("Langevin", "SVGD"):
        one, four = sharded["steppers"][name]["ksd"]
        assert len(one) == len(four) == 2 and all(v is not None and v > 0 for v in one + four), (name, one, four)
        np.testing.assert_allclose(four, one, rtol=1e-5, err_msg=name)


@LONG
def test_sharded_svgd_step_memory_per_device(sharded):
    """N = 40,000, d = 10, P = 4, block b = 512: a device holds its N / P = 10,000 particles
    and one b x N / P kernel block (20.5 MB in float32) at a time, never an N x N / P slab
    (1.6 GB) nor the gathered ensemble: its temporaries stay within 3 such blocks (the kernel
    values and their derivatives), about half of the one-device step's (one b x N block, 4
    times larger), its arguments are a quarter of the one-device ones (its own positions, scores
    and log-densities), and the kernel sums
    travel by collective-permute (ring passing), with no all-gather."""
    m = sharded["memory"]
    n, d, b, p = m["n"], m["d"], m["block"], 4
    block_bytes = min(b, n // p) * (n // p) * 4
    four, one = m["4"], m["1"]
    assert four["temp"] < 3 * block_bytes, (four, block_bytes)
    assert four["temp"] < 0.05 * n * (n // p) * 4, four  # far from an N x N / P slab
    assert four["temp"] < 0.6 * one["temp"], (four, one)
    assert four["argument"] <= one["argument"] // p + 1024, (four, one)
    assert four["argument"] <= (n // p) * (2 * d + 1) * 4 + 1024, four  # its positions, log-densities, scores
    assert four["ppermute"] >= 1 and four["all_gather"] == 0, four
    assert one["ppermute"] == 0


@LONG
def test_unadjusted_langevin_variance_holds_sharded(sharded):
    """ULA on N(0, s2): x' = (1 - h / s2) x + sqrt(2 h) xi has the stationary variance
    2 h / (1 - (1 - h / s2)^2) = s2 / (1 - h / (2 s2)) ("Exponential convergence of Langevin
    distributions and their discrete approximations", 1996). After 40 steps the start's
    variance is forgotten (factor (1 - h / s2)^80 = 2e-8). The sample variance of n
    independent normal draws has standard error var * sqrt(2 / (n - 1)); the check allows 5
    of them (0.27 here, against a gap of 2.2 between the ULA and the exact variance: s2 = 2
    would fail)."""
    u = sharded["ula"]
    s2, h = u["s2"], u["h"]
    expected = s2 / (1 - h / (2 * s2))
    se = expected * np.sqrt(2 / (u["samples"] - 1))
    assert u["spec"] == "P('particles',)"
    assert abs(u["var"] - expected) < 5 * se, (u, expected, se)
    assert abs(u["var"] - s2) > 5 * se, (u, s2, se)  # the check tells ULA's bias from the exact variance
