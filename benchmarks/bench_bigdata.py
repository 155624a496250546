"""Big data: SG-Langevin with control variates against full-data MALA on 1,000,000 rows.

Data: ``make_classification`` from scikit-learn (``n_samples=1_000_000``, ``n_features=5``,
all informative, ``random_state=0``), a logistic regression with prior ``N(0, 5^2)`` on each
weight, the rows ``[x, y]`` stored as a float32 ``.npy`` file read through
:class:`flowpost.RowFile` (never loaded whole by the SG-Langevin run).

Accuracy to reach: every posterior mean within 0.1 posterior sd and every sd within 10%
of the reference, the Laplace approximation by Newton's method in numpy ("Pattern
Recognition and Machine Learning" (2006), sec. 4.4; at n = 10^6 it is exact to far below
these tolerances). Both runs start over-dispersed (mode + 3 sd noise) and are read after
every window of 10 steps from the monitor's ensemble mean and sd; the first window that
meets the accuracy is the one counted.

Counted: data-item gradients (one item's log-likelihood gradient at one particle): MALA
``N n`` per step; SG-Langevin ``N b + b`` per step (batch and control-variate reference
terms) plus the anchor (the inner solver's evaluations times ``n``, plus ``n``). The
full-data start check both runs make is left out of both counts. Wall time excludes
compilation (a warm-up run of one window compiles each program first). Target: SG-Langevin
needs at least 10x fewer item gradients.

Memory: a child process runs the SG-Langevin pipeline (anchor and run) on the file and
reports its peak resident memory; a second child runs the same code on a 10,000-row file
(the same particles and the same window of ``chunk = 8192`` rows per full pass, so the same
working buffers). The difference is the memory that grows with the data, to be compared
with the data's size on disk (the target: below it). A control child loads the rows into
memory instead, and its growth shows what the measure sees when the file is loaded. The peak itself is dominated by the
JAX runtime, compilation and the full passes' ``O(N chunk)`` buffers, not by the data.

Run: ``python benchmarks/bench_bigdata.py`` (about 10 minutes on two CPU cores, most of it
full-data MALA);
``--rows 200000`` for a quicker look.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import textwrap
import time

import jax
import jax.numpy as jnp
import jax.scipy.stats as jst
import numpy as np

import flowpost as fp
from flowpost.engine import atomic_write

P = 5  # features
BATCH = 1000
WINDOW = 10


def make_rows(n: int, seed: int = 0) -> np.ndarray:
    from sklearn.datasets import make_classification

    x, y = make_classification(
        n_samples=n, n_features=P, n_informative=P, n_redundant=0, n_repeated=0, random_state=seed
    )
    return np.column_stack([x, y]).astype(np.float32)


def save_rows(path: str, rows: np.ndarray) -> None:
    atomic_write(path, lambda fh: np.save(fh, rows))


def laplace(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mode and covariance of the posterior's Laplace approximation (Newton / IRLS in numpy)."""
    x, y = rows[:, :-1].astype(np.float64), rows[:, -1].astype(np.float64)
    w = np.zeros(P)
    for _ in range(30):
        mu = 1.0 / (1.0 + np.exp(-(x @ w)))
        hess = x.T @ (x * (mu * (1 - mu))[:, None]) + np.eye(P) / 25.0
        w = w + np.linalg.solve(hess, x.T @ (y - mu) - w / 25.0)
    mu = 1.0 / (1.0 + np.exp(-(x @ w)))
    hess = x.T @ (x * (mu * (1 - mu))[:, None]) + np.eye(P) / 25.0
    return w, np.linalg.inv(hess)


def item(theta, row):
    z = jnp.dot(row[:-1], theta["w"])
    return row[-1] * z - jnp.logaddexp(0.0, z)


def prior(theta):
    return jnp.sum(jst.norm.logpdf(theta["w"], 0.0, 5.0))


def first_accurate(result, mode, sd) -> int | None:
    """Index of the first window whose ensemble mean and sd meet the accuracy, or None."""
    for i, rec in enumerate(result.history.windows()):
        centre, spread = np.asarray(rec["centre"]), np.asarray(rec["spread"])
        if np.all(np.abs(centre - mode) < 0.1 * sd) and np.all(np.abs(spread / sd - 1) < 0.1):
            return i
    return None


CHILD = textwrap.dedent(
    """
    import json, sys
    import jax, jax.numpy as jnp
    import flowpost as fp
    sys.path.insert(0, {bench_dir!r})
    from bench_bigdata import BATCH, P, item, prior
    import numpy as np
    data = fp.RowFile(sys.argv[1]) if sys.argv[3] == "file" else jnp.asarray(np.load(sys.argv[1]))
    target = fp.ItemSum(item, data, log_prior=prior, batch=BATCH).anchor(
        {{"w": jnp.zeros(P, jnp.float32)}})
    init = {{"w": 0.01 * jax.random.normal(jax.random.key(0), (1000, P))}}
    r = fp.run(target, fp.SGLD(step_size=float(sys.argv[2])), init, key=jax.random.key(1), steps=100,
               monitor=fp.Monitor(discrepancy=False), progress=False)
    # VmHWM: this process's own peak (ru_maxrss would carry the parent's peak over fork + exec)
    peak = next(int(line.split()[1]) for line in open("/proc/self/status") if line.startswith("VmHWM:"))
    print(json.dumps({{"peak_kib": peak, "status": r.status}}))
    """
)


def peak_memory(path: str, h: float, mode: str = "file") -> dict:
    code = CHILD.format(bench_dir=os.path.dirname(os.path.abspath(__file__)))
    out = subprocess.run([sys.executable, "-c", code, path, repr(h), mode], capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description="SG-Langevin with control variates against full-data MALA")
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--particles", type=int, default=1000)
    ap.add_argument("--mala-steps", type=int, default=40)
    ap.add_argument("--sgld-steps", type=int, default=300)
    args = ap.parse_args()
    n, n_part = args.rows, args.particles

    with tempfile.TemporaryDirectory() as tmp:
        rows = make_rows(n)
        path = os.path.join(tmp, "rows.npy")
        save_rows(path, rows)
        small = os.path.join(tmp, "small.npy")
        save_rows(small, rows[:10_000])
        mode, cov = laplace(rows)
        sd = np.sqrt(np.diag(cov))
        lam_min = float(np.linalg.eigvalsh(cov).min())
        rng = np.random.default_rng(1)
        start = {"w": jnp.asarray(mode + 3.0 * sd * rng.standard_normal((n_part, P)), jnp.float32)}
        mon = fp.Monitor(discrepancy=False)
        print(f"data: {n} rows x {P + 1} columns float32 = {rows.nbytes / 2**20:.1f} MiB; N = {n_part} particles")

        # --- SG-Langevin with control variates, data on disk
        t0 = time.perf_counter()
        target = fp.ItemSum(item, fp.RowFile(path), log_prior=prior, batch=BATCH).anchor(
            {"w": jnp.zeros(P, jnp.float32)}
        )
        t_anchor = time.perf_counter() - t0
        anchor_items = (int(target.anchor_report.grad_evals) + 1) * n
        h_sg = 0.1 * lam_min
        sgld = fp.SGLD(step_size=h_sg)
        fp.run(target, sgld, start, key=jax.random.key(0), steps=WINDOW, window=WINDOW, monitor=mon, progress=False)
        t0 = time.perf_counter()
        r_sg = fp.run(
            target, sgld, start, key=jax.random.key(2), steps=args.sgld_steps, window=WINDOW, monitor=mon,
            progress=False,
        )  # fmt: skip
        t_sg = time.perf_counter() - t0

        # --- full-data MALA, data in memory: the exact full-data score of an ItemSum (chunked
        # passes, O(N chunk) memory; a plain Target over all rows would hold (N, n) arrays)
        full = fp.ItemSum(item, jnp.asarray(rows), log_prior=prior, batch=BATCH)
        mala = fp.MALA(step_size=0.5 * lam_min)
        fp.run(full, mala, start, key=jax.random.key(0), steps=WINDOW, window=WINDOW, monitor=mon, progress=False)
        t0 = time.perf_counter()
        r_ma = fp.run(
            full, mala, start, key=jax.random.key(3), steps=args.mala_steps, window=WINDOW, monitor=mon,
            progress=False,
        )  # fmt: skip
        t_ma = time.perf_counter() - t0

        i_sg, i_ma = first_accurate(r_sg, mode, sd), first_accurate(r_ma, mode, sd)
        steps_sg = None if i_sg is None else (i_sg + 1) * WINDOW
        steps_ma = None if i_ma is None else (i_ma + 1) * WINDOW
        print(f"SG-Langevin + CV (b={BATCH}): accurate after {steps_sg} steps; anchor {t_anchor:.1f} s")
        accept = float(np.mean(r_ma.history.column("accept")))
        print(f"full-data MALA: accurate after {steps_ma} steps; mean acceptance {accept:.2f}")
        if steps_sg is None or steps_ma is None:
            print("one of the runs did not reach the accuracy: raise --sgld-steps / --mala-steps")
            return
        items_sg = steps_sg * (n_part * BATCH + BATCH) + anchor_items
        items_ma = steps_ma * n_part * n
        wall_sg = t_anchor + t_sg * steps_sg / args.sgld_steps
        wall_ma = t_ma * steps_ma / args.mala_steps
        ratio = items_ma / items_sg
        print(f"item gradients: SG-Langevin {items_sg:.3g}, MALA {items_ma:.3g}; MALA / SG {ratio:.1f} (target >= 10)")
        print(f"wall time to the accuracy: SG {wall_sg:.1f} s, MALA {wall_ma:.1f} s; MALA / SG {wall_ma / wall_sg:.1f}")

        sg_w, ma_w = np.asarray(r_sg.particles["w"]), np.asarray(r_ma.particles["w"])
        dmean = np.abs(sg_w.mean(0) - ma_w.mean(0)) / ma_w.std(0)
        dsd = np.abs(sg_w.std(0) / ma_w.std(0) - 1)
        print(f"final agreement SG vs MALA: max |mean diff| / sd = {dmean.max():.3f} (<= 0.1), "
              f"max |sd ratio - 1| = {dsd.max():.3f} (<= 0.10)")  # fmt: skip

        big, base, loaded = peak_memory(path, h_sg), peak_memory(small, h_sg), peak_memory(path, h_sg, "memory")
        grown = (big["peak_kib"] - base["peak_kib"]) * 1024
        big_mib, base_mib = big["peak_kib"] / 1024, base["peak_kib"] / 1024
        print(f"peak resident memory: {big_mib:.0f} MiB on {n} rows, {base_mib:.0f} MiB on "
              f"10,000 rows; growth {grown / 2**20:.1f} MiB vs data {rows.nbytes / 2**20:.1f} MiB, ratio "
              f"{grown / rows.nbytes:.2f} (target < 1)")  # fmt: skip
        control = (loaded["peak_kib"] - base["peak_kib"]) * 1024
        print(f"control, the rows loaded into memory instead: growth {control / 2**20:.1f} MiB, ratio "
              f"{control / rows.nbytes:.2f} (the measure sees a loaded file)")  # fmt: skip


if __name__ == "__main__":
    main()
