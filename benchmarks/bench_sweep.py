"""Step-size sweep: ten members batched in one ``fp.sweep`` against ten sequential ``fp.run``
calls, wall time with compilation included, measured in the same process.

Model: the kiln-cooling demo posterior (3 parameters, 24 readings) and MALA, ten step sizes
from 1e-4 to 1e-2 (a sweep is how one picks MALA's step), the default monitor in both (the
sweep computes every member's device figures in one vmapped call per window). Each
measurement builds a fresh target (a new log-density closure), so each pays its own
compilation: the sequential runs compile once (the step size is traced) and then reuse the
window; the sweep compiles its batched window once.

Two settings:

- ``pilot`` (the target): 8 chains per step size, 20,000 steps, the usual pilot sweep before
  a long run. Per-step costs that do not grow with the ensemble (loop iterations, dispatch,
  the monitor's per-window work) dominate, and the batch pays them once for all members.
  Target: batched / sequential <= 0.5.
- ``large`` (for information): 400 particles per step size, 2,000 steps. Each step is then
  compute-bound on two CPU cores, so ten members cost nearly ten times one; the batch saves
  only the per-run costs. No target.

    python benchmarks/bench_sweep.py
"""

import sys
import time
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
import flowpost as fp
from flowpost.demo import cooling_log_p, kiln_log

STEP_SIZES = [float(h) for h in np.geomspace(1e-4, 1e-2, 10)]
SETTINGS = {"pilot": (8, 20000), "large": (400, 2000)}


def _target():
    t, temp = kiln_log()

    def log_p(theta, data):  # a fresh closure: a new target structure, compiled afresh
        return cooling_log_p(theta, data)

    return fp.Target(
        log_p, data=(jnp.asarray(t), jnp.asarray(temp)), support={"k": fp.Positive(), "sigma": fp.Positive()}
    )


def _init(n):
    jitter = 1e-2 * jax.random.normal(jax.random.key(1), (3, n))
    return {"k": 0.3 * jnp.exp(jitter[0]), "room": 20.0 + 10 * jitter[1], "sigma": 10.0 * jnp.exp(jitter[2])}


def sequential(n, steps) -> float:
    target, init = _target(), _init(n)
    t = time.perf_counter()
    for h in STEP_SIZES:
        r = fp.run(target, fp.MALA(step_size=h), init, key=jax.random.key(0), steps=steps, progress=False)
        np.asarray(r.unconstrained)
    return time.perf_counter() - t


def batched(n, steps) -> float:
    target, init = _target(), _init(n)
    t = time.perf_counter()
    rs = fp.sweep(target, fp.MALA(), init, key=jax.random.key(0), step_size=STEP_SIZES, steps=steps)
    [np.asarray(r.unconstrained) for r in rs]
    return time.perf_counter() - t


def main():
    for name, (n, steps) in SETTINGS.items():
        # interleaved (S B S B), so that a drift in the machine's speed hits both alike
        pairs = [(sequential(n, steps), batched(n, steps)) for _ in range(2)]
        seq, bat = min(s for s, _ in pairs), min(b for _, b in pairs)
        goal = "  (target <= 0.5)" if name == "pilot" else "  (no target: compute-bound steps)"
        print(
            f"[{name}: N = {n}, {steps} steps] ten sequential fp.run: {seq:.2f} s; one fp.sweep: {bat:.2f} s; "
            f"ratio batched / sequential = {bat / seq:.3f}{goal}"
        )


if __name__ == "__main__":
    main()
