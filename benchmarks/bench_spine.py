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
    t = time.perf_counter()
    loop(x0, key).block_until_ready()
    return time.perf_counter() - t


def with_flowpost(data, x0, key):
    target = fp.Target(logistic_log_p, data=data)
    stepper = fp.Langevin(step_size=H)
    fp.run(target, stepper, x0, key=key, steps=STEPS, window=100, progress=False)  # compile
    t = time.perf_counter()
    fp.run(target, stepper, x0, key=key, steps=STEPS, window=100, progress=False)
    return time.perf_counter() - t


def main():
    data = breast_cancer_data()
    x0 = 0.1 * jax.random.normal(jax.random.key(0), (N, data[0].shape[1]))
    key = jax.random.key(1)
    base = min(hand_written(data, x0, key) for _ in range(3))
    ours = min(with_flowpost(data, x0, key) for _ in range(3))
    grads = N * STEPS
    print(f"hand-written jit+scan: {base:.3f} s  ({grads / base:,.0f} particle-gradients/s)")
    print(f"fp.run + monitor     : {ours:.3f} s  ({grads / ours:,.0f} particle-gradients/s)")
    print(f"ratio fp.run / hand-written = {ours / base:.3f}  (target <= 1.05)")


if __name__ == "__main__":
    main()
