"""Benchmark: the library's blocked SVGD step against a hand-written fused full-matrix step.

Run:  python benchmarks/bench_svgd.py  [--n 2000 --d 50 --steps 10 --repeats 7 --mem-n 20000]

1. Time. ``SVGD.advance`` (blocked pairwise sums from :mod:`flowpost.kernels`) and a
   hand-written update that builds the full ``N x N`` kernel matrix, each inside one ``jit``-ted
   ``lax.scan`` over ``--steps`` steps, same process, same target (standard normal in ``d``
   dimensions), same bandwidth rule. Reported: seconds per step of each and the ratio
   library / hand-written (target <= 1.3), for the median-heuristic RBF kernel (the default;
   both compute the median over the same 1000-point subset) and for a fixed bandwidth (kernel
   sums only).
2. Memory. Each variant runs one step at ``N = --mem-n`` in a fresh subprocess; reported is
   the growth of the peak resident set size (``ru_maxrss``) over the step, compilation
   included.

The update (both variants), with ``k(x, y) = exp(-|x - y|^2 / (2 b^2))``:

    phi_i = (1/N) sum_j [ k_ji s_j + (x_i - x_j) k_ji / b^2 ],     x_i <- x_i + h phi_i.
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
import time

import jax
import jax.numpy as jnp

HI = jax.lax.Precision.HIGHEST


def _setup(n: int, d: int):
    import flowpost as fp

    target, _ = fp.Target(lambda u: -0.5 * jnp.sum(u * u)).bind(jnp.zeros((2, d)))
    x = jax.random.normal(jax.random.key(0), (n, d))
    return target, x


def _subset_median(x, max_points=1000):
    """Median pairwise distance over the evenly spaced subset of at most ``max_points`` rows
    (the same rule as flowpost.kernels.median_distance), written out with the full matrix."""
    n = x.shape[0]
    m = min(n, max_points)
    xs = x[(jnp.arange(m) * n) // m]
    sq = jnp.sum(xs * xs, axis=1)
    r2 = jnp.maximum(sq[:, None] + sq[None, :] - 2.0 * jnp.matmul(xs, xs.T, precision=HI), 0.0)
    off = r2.reshape(-1)[1:].reshape(m - 1, m + 1)[:, :-1]
    return jnp.sqrt(jnp.median(off))


def full_matrix_step(target, x, h, bandwidth=None):
    """One SVGD step with the full kernel matrix (hand-written, for comparison)."""
    n = x.shape[0]
    s = target.score(x)
    if bandwidth is None:
        b = _subset_median(x) / math.sqrt(2.0 * math.log(n + 1.0))
    else:
        b = jnp.asarray(bandwidth, x.dtype)
    xc = x - jnp.mean(x, axis=0)
    sq = jnp.sum(xc * xc, axis=1)
    r2 = jnp.maximum(sq[:, None] + sq[None, :] - 2.0 * jnp.matmul(xc, xc.T, precision=HI), 0.0)
    k = jnp.exp(-r2 / (2.0 * b * b))
    rep = (xc * jnp.sum(k, axis=0)[:, None] - jnp.matmul(k.T, xc, precision=HI)) / (b * b)
    phi = (jnp.matmul(k.T, s, precision=HI) + rep) / n
    return x + h * phi


def _library_loop(stepper, target, steps):
    @jax.jit
    def loop(state):
        def body(st, t):
            key = jax.random.fold_in(jax.random.key(1), t)
            return stepper.advance(target, st, key, jnp.asarray(stepper.step_size))[0], None

        return jax.lax.scan(body, state, jnp.arange(steps))[0]

    return loop


def _full_loop(target, steps, h, bandwidth):
    @jax.jit
    def loop(x):
        def body(x, t):
            return full_matrix_step(target, x, h, bandwidth), None

        return jax.lax.scan(body, x, jnp.arange(steps))[0]

    return loop


def _best_times(fns_args, repeats):
    """Best wall time of each (fn, arg) over ``repeats`` rounds, the variants interleaved within
    each round so that a busy machine slows them alike."""
    for fn, arg in fns_args:
        jax.block_until_ready(fn(arg))  # compile
    best = [float("inf")] * len(fns_args)
    for _ in range(repeats):
        for i, (fn, arg) in enumerate(fns_args):
            t = time.perf_counter()
            jax.block_until_ready(fn(arg))
            best[i] = min(best[i], time.perf_counter() - t)
    return best


def time_comparison(n, d, steps, repeats, bandwidth):
    from flowpost.numerics import RBF
    from flowpost.steppers import SVGD

    h = 0.1
    target, x = _setup(n, d)
    stepper = SVGD(step_size=h, kernel=RBF(bandwidth=bandwidth))
    state = stepper.start(target, x, jax.random.key(0))
    lib = _library_loop(stepper, target, steps)
    full = _full_loop(target, steps, h, bandwidth)
    # same update: one step of each from the same ensemble agrees
    one_lib = jax.jit(lambda s: stepper.advance(target, s, jax.random.key(1), jnp.asarray(h))[0].x)(state)
    one_full = jax.jit(lambda x: full_matrix_step(target, x, h, bandwidth))(x)
    diff = float(jnp.max(jnp.abs(one_lib - one_full)))
    t_lib, t_full = (t / steps for t in _best_times([(lib, state), (full, x)], repeats))
    return {
        "library_s_per_step": t_lib,
        "full_matrix_s_per_step": t_full,
        "ratio": t_lib / t_full,
        "max_abs_difference_one_step": diff,
    }


_MEM_CHILD = """
import json, resource, sys, jax, jax.numpy as jnp
sys.path.insert(0, {here!r})
from bench_svgd import _setup, full_matrix_step
from flowpost.steppers import SVGD
n, d, variant = {n}, {d}, {variant!r}
target, x = _setup(n, d)
stepper = SVGD(step_size=0.1)
state = stepper.start(target, x, jax.random.key(0))
jax.block_until_ready(state)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
if variant == "library":
    out = jax.jit(lambda s: stepper.advance(target, s, jax.random.key(1), jnp.asarray(0.1))[0].x)(state)
else:
    out = jax.jit(lambda x: full_matrix_step(target, x, 0.1))(x)
jax.block_until_ready(out)
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({{"growth_mib": (after - before) / 1024, "peak_mib": after / 1024}}))
"""


def memory(variant, n, d):
    import os

    here = os.path.dirname(os.path.abspath(__file__))
    code = _MEM_CHILD.format(here=here, n=n, d=d, variant=variant)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=1800)
    if out.returncode != 0:
        return {"error": out.stderr.strip().splitlines()[-1] if out.stderr else f"exit {out.returncode}"}
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--n", type=int, default=2000)
    p.add_argument("--d", type=int, default=50)
    p.add_argument("--steps", type=int, default=10)
    p.add_argument("--repeats", type=int, default=7)
    p.add_argument("--mem-n", type=int, default=20_000)
    p.add_argument("--skip-memory", action="store_true")
    a = p.parse_args(argv)
    print(
        f"jax {jax.__version__} on {jax.devices()[0].platform}; N = {a.n}, d = {a.d}, "
        f"{a.steps} steps per timed loop, best of {a.repeats}"
    )
    for label, bw in (("median-heuristic RBF", None), ("fixed-bandwidth RBF", 1.0)):
        r = time_comparison(a.n, a.d, a.steps, a.repeats, bw)
        print(
            f"[time] {label:22s} library {r['library_s_per_step'] * 1e3:9.2f} ms/step | "
            f"full matrix {r['full_matrix_s_per_step'] * 1e3:9.2f} ms/step | ratio {r['ratio']:.2f} "
            f"(target <= 1.3) | max |difference| after one step {r['max_abs_difference_one_step']:.1e}"
        )
    if not a.skip_memory:
        for variant in ("library", "full"):
            m = memory(variant, a.mem_n, a.d)
            if "error" in m:
                print(f"[memory] {variant:8s} N = {a.mem_n}, d = {a.d}: failed ({m['error']})")
            else:
                print(
                    f"[memory] {variant:8s} N = {a.mem_n}, d = {a.d}: peak RSS growth over one step "
                    f"{m['growth_mib']:8.0f} MiB (peak {m['peak_mib']:.0f} MiB)"
                )


if __name__ == "__main__":
    main()
