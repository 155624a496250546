"""Spine overhead: fp.run(Langevin, default monitor) against a hand-written jit + lax.scan
loop of the same update, measured in the same process.

Logistic regression on the breast-cancer data (31 weights), N = 4096 particles, 1000 steps.
Target: the median over seven interleaved pairs of the time ratio <= 1.05. Prints it, the
ratio of the best times, and particle-gradients per second for both.

    python benchmarks/bench_spine.py
"""

import sys
import time
from pathlib import Path

import jax
import jax.numpy as jnp

sys.path.insert(0, str(Path(__file__).parent))
from common import breast_cancer_data, logistic_log_p

import flowpost as fp

N, STEPS, H = 4096, 1000, 1e-4
PAIRS = 7


def hand_written(data, x0, key):
    """The hand-written loop, compiled; returns a function timing one run of it."""
    score = jax.vmap(jax.grad(logistic_log_p), in_axes=(0, None))

    @jax.jit
    def loop(x, key):
        def body(x, t):
            k = jax.random.fold_in(key, t)
            noise = jax.random.normal(k, x.shape, x.dtype)
            return x + H * score(x, data) + jnp.sqrt(2 * H) * noise, None

        x, _ = jax.lax.scan(body, x, jnp.arange(STEPS))
        return x

    loop(x0, key).block_until_ready()  # compile

    def timed():
        t = time.perf_counter()
        loop(x0, key).block_until_ready()
        return time.perf_counter() - t

    return timed


def with_flowpost(data, x0, key):
    """fp.run with the default monitor, compiled; returns a function timing one run."""
    target = fp.Target(logistic_log_p, data=data)
    stepper = fp.Langevin(step_size=H)
    fp.run(target, stepper, x0, key=key, steps=STEPS, window=100, progress=False)  # compile

    def timed():
        t = time.perf_counter()
        r = fp.run(target, stepper, x0, key=key, steps=STEPS, window=100, progress=False)
        r.unconstrained.sum()
        return time.perf_counter() - t

    return timed


def main():
    data = breast_cancer_data()
    x0 = 0.1 * jax.random.normal(jax.random.key(0), (N, data[0].shape[1]))
    key = jax.random.key(1)
    base_run, ours_run = hand_written(data, x0, key), with_flowpost(data, x0, key)
    # alternate the two in A B B A order, so that a drift in the machine's speed hits both
    # alike; the headline is the median of the pairs' ratios (robust to a slow moment on a
    # shared machine), the ratio of the best times is printed beside it
    pairs = []
    for i in range(PAIRS):
        if i % 2:
            o = ours_run()
            pairs.append((base_run(), o))
        else:
            pairs.append((base_run(), ours_run()))
    base = min(b for b, _ in pairs)
    ours = min(o for _, o in pairs)
    ratios = sorted(o / b for b, o in pairs)
    grads = N * STEPS
    print(f"hand-written jit+scan: {base:.3f} s  ({grads / base:,.0f} particle-gradients/s)")
    print(f"fp.run + monitor     : {ours:.3f} s  ({grads / ours:,.0f} particle-gradients/s)")
    print("pair ratios:", " ".join(f"{r:.3f}" for r in ratios))
    print(
        f"ratio fp.run / hand-written: median of pairs {ratios[PAIRS // 2]:.3f} (target <= 1.05); "
        f"best times {ours / base:.3f}"
    )


if __name__ == "__main__":
    main()
