"""Stiff Gaussian benchmark: explicit vs implicit steppers on a 50-D Gaussian, condition number 1e3.

Target: ``N(0, Sigma)`` in ``d = 50`` with ``Sigma = Q diag(lam) Q^T``, eigenvalues ``lam``
log-spaced in ``[1e-3, 1]`` (condition number ``10^3``) and ``Q`` a fixed random rotation, written
as ``log pi(x) = sum_k log N((W x)_k; 0, 1)`` with the whitening ``W = diag(lam)^(-1/2) Q^T``
(``jax.scipy.stats.norm``). Start: ``N`` particles from ``N(0, 4 I)`` (over-dispersed).

Error: the relative covariance error in whitened coordinates,

    err = || W C W^T - I ||_F / sqrt(d),

the root-mean-square relative error of the ensemble covariance ``C`` over an orthonormal basis
of directions, each direction counting equally however narrow. For ``N`` exact independent
samples its expected square is ``(d + 1) / N`` (Wishart second moments), a floor of 0.16 at
``N = 2000``; the level to reach is ``LEVEL = 0.25``.

For each stepper and step size on a small grid the run stops at the first window (every
``window`` steps) whose error is below ``LEVEL``, or when the budget is spent (score evaluations
per particle, inner ones included, or wall-clock seconds). Reported per run: whether the level
was reached, the flow time ``t = steps * h``, score evaluations per particle (the steppers'
``grad_evals``), wall time (compilation excluded: a warm-up run compiles the window first) and
the final error. Steppers: ``fp.Langevin``, MALA (``flowpost.steppers.mala``, if present),
``ImplicitLangevin`` and ``JKO`` with their default inner solvers.

Run: ``python benchmarks/bench_stiff.py`` (about 15 minutes on two CPU cores);
``--quick`` for a smaller grid; ``--only ImplicitLangevin --h 3e-4 --time-budget 600`` for one
stepper with a longer wall budget.
"""

from __future__ import annotations

import argparse
import time

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.stats import norm

import flowpost as fp
from flowpost.steppers import JKO, ImplicitLangevin

try:
    from flowpost.steppers import MALA
except ImportError:  # pragma: no cover - optional stepper
    MALA = None

D, COND, N, LEVEL = 50, 1e3, 2000, 0.25


def make_problem(d=D, cond=COND, seed=0):
    rng = np.random.default_rng(seed)
    lam = np.logspace(-np.log10(cond), 0.0, d)
    q, _ = np.linalg.qr(rng.normal(size=(d, d)))
    w = (q / np.sqrt(lam)).T  # W = diag(lam)^(-1/2) Q^T, so W Sigma W^T = I
    return lam, q, w


def log_p(x, w):
    return jnp.sum(norm.logpdf(w @ x))


def cov_error(x, w):
    z = np.asarray(x, np.float64) @ w.T
    c = np.cov(z, rowvar=False)
    return float(np.linalg.norm(c - np.eye(z.shape[1])) / np.sqrt(z.shape[1]))


class CovarianceWatch(fp.Monitor):
    """The default monitor plus the whitened covariance error; stops at ``level`` or when the
    score-evaluation budget is spent."""

    def __init__(self, w, level, eval_budget):
        super().__init__()
        self.w, self.level, self.eval_budget = np.asarray(w, np.float64), level, eval_budget
        self.evals = 0.0

    def open(self, target, stepper, state):
        super().open(target, stepper, state)
        self.evals = 0.0

    def read(self, target, stepper, state, stats, tape, step, elapsed, **window):
        rec = super().read(target, stepper, state, stats, tape, step, elapsed, **window)
        x = np.asarray(state.x)
        rec["cov_err"] = cov_error(x, self.w) if np.all(np.isfinite(x)) else float("inf")
        self.evals += rec.get("grad_evals", 0.0)
        rec["evals_total"] = self.evals
        return rec

    def judge(self, history):
        verdict = super().judge(history)
        if verdict.action != "go":
            return verdict
        last = history.last
        if last["cov_err"] < self.level:
            return fp.Verdict("stop", "level reached")
        if last["evals_total"] >= self.eval_budget:
            return fp.Verdict("stop", "evaluation budget spent")
        return verdict


def one_run(target, w, stepper, window, x0, eval_budget, time_budget, max_steps):
    key = jax.random.key(1)
    # warm-up: compile the window (same stepper, window length and shapes) outside the timing
    fp.run(target, stepper, x0, key=key, steps=window, window=window, progress=False)
    mon = CovarianceWatch(w, LEVEL, eval_budget)
    t0 = time.perf_counter()
    r = fp.run(
        target,
        stepper,
        x0,
        key=key,
        steps=max_steps,
        window=window,
        monitor=mon,
        time_budget=time_budget,
        progress=False,
    )
    wall = time.perf_counter() - t0
    recs = [rec for rec in r.history if "cov_err" in rec]
    last = recs[-1] if recs else {}
    reached = r.status == "stopped" and r.reason == "level reached"
    capped = sum(rec.get("inner_capped", 0.0) for rec in recs)
    return {
        "reached": reached,
        "why": "level reached" if reached else (r.reason if r.status != "done" else "step budget"),
        "steps": r.steps,
        "flow_time": float(recs[-1]["flow_time"]) if recs else 0.0,
        "evals": last.get("evals_total", float("nan")),
        "wall": wall,
        "err": last.get("cov_err", float("nan")),
        "capped": capped,
    }


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller grid and budgets")
    ap.add_argument("--eval-budget", type=float, default=30_000.0, help="score evaluations per particle per run")
    ap.add_argument("--time-budget", type=float, default=120.0, help="wall seconds per run")
    ap.add_argument("--only", default=None, help="run one stepper only (Langevin, MALA, ImplicitLangevin, JKO)")
    ap.add_argument(
        "--h", type=float, nargs="+", default=None, help="step sizes to try (with --only), replacing the default grid"
    )
    args = ap.parse_args()

    _, _, w = make_problem()
    w_j = jnp.asarray(w, jnp.float32)
    target = fp.Target(log_p, data=w_j)
    x0 = 2.0 * jax.random.normal(jax.random.key(0), (N, D))
    flow_time = 6.0  # step budget: this much flow time (the slowest direction relaxes like e^-2t)

    grid = [
        ("Langevin", fp.Langevin, [2e-4, 5e-4, 1e-3], 200),
        ("MALA", MALA, [5e-4, 1e-3, 2e-3], 200),
        ("ImplicitLangevin", ImplicitLangevin, [1e-4, 3e-4, 1e-3], 100),
        ("JKO", JKO, [1e-2, 1e-1], 10),
    ]
    if args.quick:
        grid = [(n, c, hs[:2], win) for n, c, hs, win in grid]
    if args.only is not None:
        grid = [(n, c, args.h or hs, win) for n, c, hs, win in grid if n == args.only]
        if not grid:
            ap.error(f"--only: unknown stepper {args.only!r}")

    print(f"stiff Gaussian: d = {D}, condition number {COND:g}, N = {N} particles, start N(0, 4 I)")
    print(
        f"error = ||W C W^T - I||_F / sqrt(d); exact-sample floor sqrt((d+1)/N) = "
        f"{np.sqrt((D + 1) / N):.3f}; level {LEVEL}"
    )
    print(
        f"budgets per run: {args.eval_budget:g} score evaluations per particle, "
        f"{args.time_budget:g} s wall, flow time {flow_time:g}"
    )
    head = (
        f"{'stepper':<17}{'h':>8}{'reached':>9}{'flow t':>9}{'steps':>8}{'evals':>10}"
        f"{'wall s':>9}{'err':>8}{'capped':>8}  stop"
    )
    print(head)
    print("-" * len(head))
    rows = []
    for name, cls, hs, window in grid:
        if cls is None:
            print(f"{name:<17} (not available)")
            continue
        for h in hs:
            stepper = cls(step_size=h)
            max_steps = int(np.ceil(flow_time / h / window)) * window
            res = one_run(target, w, stepper, window, x0, args.eval_budget, args.time_budget, max_steps)
            rows.append((name, h, res))
            print(
                f"{name:<17}{h:>8.0e}{'yes' if res['reached'] else 'no':>9}{res['flow_time']:>9.3f}"
                f"{res['steps']:>8d}{res['evals']:>10.0f}{res['wall']:>9.1f}{res['err']:>8.3f}"
                f"{res['capped']:>8.0f}  {res['why']}",
                flush=True,
            )

    print()
    print("cheapest run reaching the level, per stepper (score evaluations per particle, wall s):")
    for name in dict.fromkeys(n for n, _, _ in rows):
        ok = [(h, r) for n, h, r in rows if n == name and r["reached"]]
        if not ok:
            best = min((r["err"], h) for n, h, r in rows if n == name)
            print(f"  {name:<17} never reached {LEVEL} (best final error {best[0]:.3f} at h = {best[1]:g})")
            continue
        h, r = min(ok, key=lambda hr: hr[1]["evals"])
        print(f"  {name:<17} h = {h:<8g} {r['evals']:>9.0f} evaluations {r['wall']:>7.1f} s")


if __name__ == "__main__":
    main()
