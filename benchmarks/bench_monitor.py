"""Monitor overhead at its defaults: fp.run with the full default Monitor (discrepancy,
moments and drift, R-hat/ESS trails) against the monitor off (BareMonitor: finiteness only),
same process, same problem as bench_spine.py (breast-cancer logistic regression, N = 4096
particles, 1000 steps of Langevin in windows of 100). Target: ratio <= 1.05.

    python benchmarks/bench_monitor.py
"""

import sys
import time
from pathlib import Path

import jax

sys.path.insert(0, str(Path(__file__).parent))
from common import breast_cancer_data, logistic_log_p

import flowpost as fp

N, STEPS, H = 4096, 1000, 1e-4


def timed(target, x0, key, monitor_factory):
    fp.run(
        target,
        fp.Langevin(step_size=H),
        x0,
        key=key,
        steps=STEPS,
        window=100,
        progress=False,
        monitor=monitor_factory(),
    )  # compile
    t = time.perf_counter()
    fp.run(
        target,
        fp.Langevin(step_size=H),
        x0,
        key=key,
        steps=STEPS,
        window=100,
        progress=False,
        monitor=monitor_factory(),
    )
    return time.perf_counter() - t


def main():
    data = breast_cancer_data()
    target = fp.Target(logistic_log_p, data=data)
    x0 = 0.1 * jax.random.normal(jax.random.key(0), (N, data[0].shape[1]))
    key = jax.random.key(1)
    off, full = [], []
    for _ in range(3):  # interleaved, best of three
        off.append(timed(target, x0, key, fp.BareMonitor))
        full.append(timed(target, x0, key, fp.Monitor))
    print(f"monitor off (BareMonitor): {min(off):.3f} s")
    print(f"default Monitor          : {min(full):.3f} s")
    print(f"ratio full / off = {min(full) / min(off):.3f}  (target <= 1.05)")


if __name__ == "__main__":
    main()
