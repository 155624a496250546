"""Weak scaling of sharded runs: SVGD and the monitor's Stein discrepancy over 1, 2 and 4 devices.

Each device holds ``n`` = 1024 particles of a correlated Gaussian in d = 10, so the ensemble
has N = P n particles on P devices (weak scaling). Each device count runs in its own process
(``XLA_FLAGS=--xla_force_host_platform_device_count=P`` on the CPU; on a machine with
accelerators set ``BENCH_SCALING_PLATFORM`` to its platform and the visible devices are used).
Measured, best of three after a compiling run, in the same run of this script:

* SVGD: ``fp.run(..., devices=jax.devices()[:P])`` for 20 steps in one window (``BareMonitor``):
  time per step per particle pair (``t / (steps N^2)``); the kernel sums pass the source
  shards round a ring (ring passing in ``flowpost.numerics``, pairwise sums);
* the monitor's Stein discrepancy over all N particles (``Monitor(discrepancy_points=N)``
  computes this figure), on sharded positions and scores: time per evaluation per pair.

Bytes communicated per step and device (float32, from the algorithm, not measured):

* SVGD: the ring moves the visiting shard (positions and scores, ``n (d + d)`` numbers)
  ``P - 1`` times, and the median-heuristic bandwidth reads its ``m = min(N, 1000)`` points
  from every shard (an all-gather of ``(P - 1) / P m d`` numbers); the mean shift is an
  all-reduce of ``d`` numbers;
* the Stein discrepancy: an all-gather of positions and scores, ``(P - 1) n 2d`` numbers, and
  an all-reduce of one number.

The ratios are against the 1-device run. The 64-device model printed beside them: a device's
work per step grows as ``P n^2`` pairs while the pairs per step grow as ``P^2 n^2``, so ideal
time per pair falls as ``1 / P``; each of the ``P - 1`` ring visits moves ``n 2d`` numbers
while computing an ``n x n`` block, so the ratio of communication to work per visit does not
depend on ``P`` (it is ``8 d`` bytes per ``n`` pairs) and the ring scales while one visit's
transfer hides behind one block. Forced host devices share this machine's cores: with fewer
cores than devices no speed-up can show here, only the overhead of sharding.

    python benchmarks/bench_scaling.py
"""

import json
import os
import subprocess
import sys
import time

PER_DEVICE, D, STEPS, REPEATS = 1024, 10, 20, 3
DEVICE_COUNTS = (1, 2, 4)
MEDIAN_POINTS = 1000  # flowpost.numerics.DEFAULT_MEDIAN_POINTS


def child(p: int) -> dict:
    import jax
    import jax.numpy as jnp
    import numpy as np
    from jax.sharding import NamedSharding, PartitionSpec

    import flowpost as fp
    from flowpost.diagnostics import stein_discrepancy

    devices = jax.devices()[:p]
    assert len(devices) == p, jax.devices()
    n = PER_DEVICE * p
    rho = 0.5 ** np.abs(np.subtract.outer(np.arange(D), np.arange(D)))  # AR(1)-like correlation
    prec = jnp.asarray(np.linalg.inv(rho), jnp.float32)

    def log_p(x):
        return -0.5 * x @ prec @ x

    x0 = jax.random.normal(jax.random.key(0), (n, D))
    kw = dict(key=jax.random.key(1), steps=STEPS, window=STEPS, progress=False, monitor=fp.BareMonitor())
    stepper = fp.SVGD(step_size=0.1)
    fp.run(log_p, stepper, x0, devices=devices, **kw)  # compile
    svgd = []
    for _ in range(REPEATS):
        t = time.perf_counter()
        r = fp.run(log_p, stepper, x0, devices=devices, **kw)
        svgd.append(time.perf_counter() - t)
    assert r.status == "done", r.reason
    alone = []  # control: the same N unsharded on one device (separates sharding from N's own effect)
    if p == DEVICE_COUNTS[-1]:
        fp.run(log_p, stepper, x0, **kw)
        for _ in range(2):
            t = time.perf_counter()
            fp.run(log_p, stepper, x0, **kw)
            alone.append(time.perf_counter() - t)

    mesh = jax.sharding.Mesh(np.array(devices), (fp.numerics.PARTICLE_AXIS,), axis_types=(jax.sharding.AxisType.Auto,))
    rows = NamedSharding(mesh, PartitionSpec(fp.numerics.PARTICLE_AXIS))
    with jax.set_mesh(mesh):
        x = jax.device_put(np.asarray(r.unconstrained), rows)
        s = jax.device_put(np.asarray(jax.vmap(jax.grad(log_p))(jnp.asarray(r.unconstrained))), rows)
        ksd = jax.jit(stein_discrepancy)
        ksd(x, s).block_until_ready()  # compile
        mon = []
        for _ in range(REPEATS):
            t = time.perf_counter()
            ksd(x, s).block_until_ready()
            mon.append(time.perf_counter() - t)
    out = {"p": p, "n": n, "svgd_step": min(svgd) / STEPS, "ksd": min(mon)}
    if alone:
        out["svgd_step_one_device"] = min(alone) / STEPS
    return out


def svgd_bytes(p: int, n: int) -> float:
    """Per device and step: the ring's P - 1 visits of n (d + d) numbers, the median's gather
    of its (P - 1) / P m d numbers and the mean shift's d numbers (float32)."""
    if p == 1:
        return 0.0
    m = min(p * n, MEDIAN_POINTS)
    return 4.0 * ((p - 1) * n * 2 * D + (p - 1) / p * m * D + D)


def ksd_bytes(p: int, n: int) -> float:
    """Per device and evaluation: the all-gather of positions and scores and one all-reduce."""
    return 0.0 if p == 1 else 4.0 * ((p - 1) * n * 2 * D + 1)


def main():
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        print(json.dumps(child(int(sys.argv[2]))))
        return
    platform = os.environ.get("BENCH_SCALING_PLATFORM", "cpu")
    rows = []
    for p in DEVICE_COUNTS:
        env = {**os.environ, "JAX_PLATFORMS": platform}
        if platform == "cpu":
            env["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={p}"
        out = subprocess.run(
            [sys.executable, __file__, "--child", str(p)], capture_output=True, text=True, env=env, check=False
        )
        if out.returncode:
            sys.exit(f"{p} device(s): the child failed:\n{out.stderr[-3000:]}")
        rows.append(json.loads(out.stdout.strip().splitlines()[-1]))
    base = rows[0]
    n = PER_DEVICE
    print(f"weak scaling, {n} particles per device, d = {D}, float32, platform {platform}, {os.cpu_count()} CPU cores")
    print(
        f"{'P':>3} {'N':>6} | {'SVGD s/step':>11} {'s/step/pair':>11} {'ratio':>6} {'ideal':>6} {'bytes/step':>11}"
        f" | {'KSD s':>8} {'s/pair':>9} {'ratio':>6} {'bytes':>9}"
    )
    for r in rows:
        p, big = r["p"], r["n"]
        pair, kpair = r["svgd_step"] / big**2, r["ksd"] / big**2
        base_pair = base["svgd_step"] / base["n"] ** 2
        print(
            f"{p:>3} {big:>6} | {r['svgd_step']:>11.4f} {pair:>11.3e} {pair / base_pair:>6.3f}"
            f" {1 / p:>6.3f} {svgd_bytes(p, n):>11.0f} | {r['ksd']:>8.4f} {kpair:>9.2e}"
            f" {kpair / (base['ksd'] / base['n'] ** 2):>6.3f} {ksd_bytes(p, n):>9.0f}"
        )
    last = rows[-1]
    print(
        f"control, N = {last['n']} on one device unsharded: {last['svgd_step_one_device']:.4f} s/step; sharded over"
        f" {last['p']} / unsharded = {last['svgd_step'] / last['svgd_step_one_device']:.3f} (the per-pair ratio above"
        f" also holds the amortising of the O(N) work per step over more pairs)"
    )
    p = 64
    print(
        f"model at P = {p} (N = {p * n}): per device {p} x the 1-device pairs per step, time per pair ratio 1/{p} ="
        f" {1 / p:.4f} when each visit's transfer hides behind its block; bytes per device per step: SVGD"
        f" {svgd_bytes(p, n):.3g} ({p - 1} visits of {4 * n * 2 * D} B, i.e. {8 * D} B per {n} pairs of work),"
        f" Stein discrepancy {ksd_bytes(p, n):.3g} (the gathered ensemble: {4 * p * n * 2 * D / 2**20:.1f} MiB per"
        f" device, the limit of the all-gather path)"
    )


if __name__ == "__main__":
    main()
