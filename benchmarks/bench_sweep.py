"""Step-size sweep: ten members batched in one ``fp.sweep`` against ten sequential ``fp.run``
calls, wall time with compilation included, measured in the same process.

Model: the kiln-cooling demo posterior (3 parameters, 24 readings), EnsembleLangevin,
N = 400 particles, 2000 steps, step sizes 0.005 .. 0.05, the default monitor in both. Each
measurement builds a fresh target (a new log-density closure), so each pays its own
compilation: the sequential runs compile once (the step size is traced) and then reuse the
window; the sweep compiles its batched window once.

Target: batched / sequential <= 0.5.

    python benchmarks/bench_sweep.py
"""
import sys
import time
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import flowpost as fp  # noqa: E402
from flowpost.demo import cooling_log_p, kiln_log  # noqa: E402

N, STEPS = 400, 2000
STEP_SIZES = list(np.linspace(0.005, 0.05, 10))


def _target():
    t, temp = kiln_log()

    def log_p(theta, data):  # a fresh closure: a new target structure, compiled afresh
        return cooling_log_p(theta, data)

    return fp.Target(log_p, data=(jnp.asarray(t), jnp.asarray(temp)),
                     support={"k": fp.Positive(), "sigma": fp.Positive()})


def _init():
    jitter = 1e-2 * jax.random.normal(jax.random.key(1), (3, N))
    return {"k": 0.3 * jnp.exp(jitter[0]), "room": 20.0 + 10 * jitter[1], "sigma": 10.0 * jnp.exp(jitter[2])}


def sequential() -> float:
    target, init = _target(), _init()
    t = time.perf_counter()
    for h in STEP_SIZES:
        r = fp.run(target, fp.EnsembleLangevin(step_size=float(h)), init, key=jax.random.key(0), steps=STEPS,
                   progress=False)
        np.asarray(r.unconstrained)
    return time.perf_counter() - t


def batched() -> float:
    target, init = _target(), _init()
    t = time.perf_counter()
    rs = fp.sweep(target, fp.EnsembleLangevin(), init, key=jax.random.key(0), step_size=[float(h) for h in STEP_SIZES],
                  steps=STEPS)
    [np.asarray(r.unconstrained) for r in rs]
    return time.perf_counter() - t


def main():
    seq = min(sequential() for _ in range(2))
    bat = min(batched() for _ in range(2))
    print(f"ten sequential fp.run calls : {seq:.2f} s (compilation included)")
    print(f"one fp.sweep of ten members : {bat:.2f} s (compilation included)")
    print(f"ratio batched / sequential = {bat / seq:.3f}  (target <= 0.5)")


if __name__ == "__main__":
    main()
