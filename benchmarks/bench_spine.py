"""Spine overhead: fp.run(Langevin, default monitor) against a hand-written jit + lax.scan
loop of the same update, measured in the same process.

Logistic regression on the breast-cancer data (31 weights), N = 4096 particles, 1000 steps.
Target: ratio <= 1.05. Prints the ratio and particle-gradients per second for both.

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
    # alternate the two (A B A B ...) so that a drift in the machine's speed hits both alike;
    # the ratio of the medians of the pairs' ratios, and of the best times, are printed
    pairs = [(base_run(), ours_run()) for _ in range(5)]
    base = min(b for b, _ in pairs)
    ours = min(o for _, o in pairs)
    ratios = sorted(o / b for b, o in pairs)
    grads = N * STEPS
    print(f"hand-written jit+scan: {base:.3f} s  ({grads / base:,.0f} particle-gradients/s)")
    print(f"fp.run + monitor     : {ours:.3f} s  ({grads / ours:,.0f} particle-gradients/s)")
    print(
        f"ratio fp.run / hand-written: best times {ours / base:.3f}, median of pairs {ratios[2]:.3f}  (target <= 1.05)"
    )


if __name__ == "__main__":
    main()
