"""The convergence monitor: reads the ensemble between compiled windows, writes one record
per window, and says whether the run goes on, stops, or rolls back.

Interface (what :func:`flowpost.run` calls; a user's own monitor implements the same):

``tape_particles`` : int
    How many particles' per-step trajectories the driver should record inside each window
    and hand to ``read`` (0 for none). The first ``tape_particles`` particles are taped.
``open(target, stepper, state) -> None``
    Called once before the first window (and again on resume); resets internal buffers.
``read(target, stepper, state, stats, tape, step, elapsed) -> dict``
    Called after each window. ``stats`` is the stepper's per-step stats stacked over the
    window's steps (numpy arrays of shape ``(steps,)``); ``tape`` is ``None`` or an array
    ``(steps, tape_particles, d)``. Returns the window's record.
``judge(history) -> Verdict``
    Looks at the history (the new record is its last) and returns a :class:`Verdict`:
    ``"go"``, ``"stop"`` (with the reason) or ``"rewind"`` (roll back to the last good window,
    with the reason).
``headline(record) -> dict``
    A few short figures for the progress bar.

The default :class:`Monitor` records, per window, in the unconstrained coordinates the flow
moves: the mean log-density, the ensemble mean (``centre``) and standard deviation
(``spread``) per coordinate, their drift per unit of flow time,

    centre_drift = max_k |m_k - m_k'| / (s_k dt),    spread_drift = max_k |log s_k - log s_k'| / dt,

(primes: the previous window; ``dt`` the flow time between the two), the count of
non-finite particles, and the stepper's stats summarised over the window (means; sums for
counters, see :mod:`flowpost.steppers.base`).
"""
from __future__ import annotations

from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

__all__ = ["Monitor", "Verdict", "summarise_stats"]


class Verdict(NamedTuple):
    """What the monitor decides after a window: ``action`` in {"go", "stop", "rewind"}."""

    action: str
    reason: str = ""


GO = Verdict("go")


def _is_counter(name: str) -> bool:
    return name.startswith("n_") or name.endswith("_evals") or name.endswith("_capped")


def summarise_stats(stats: dict[str, np.ndarray]) -> dict[str, float]:
    """Per-window summary of per-step stats: sums for counters, means (over finite values)
    otherwise."""
    out = {}
    for k, v in stats.items():
        v = np.asarray(v, dtype=float)
        if v.size == 0:
            continue
        if _is_counter(k):
            out[k] = float(np.sum(v))
        else:
            finite = v[np.isfinite(v)]
            out[k] = float(np.mean(finite)) if finite.size else float("nan")
    return out


@jax.jit
def _ensemble_figures(target, x):
    finite = jnp.all(jnp.isfinite(x), axis=1)
    n_bad = jnp.sum(~finite)
    safe = jnp.where(finite[:, None], x, 0.0)
    n_ok = jnp.maximum(jnp.sum(finite), 1)
    centre = jnp.sum(safe, axis=0) / n_ok
    var = jnp.sum(jnp.where(finite[:, None], (safe - centre) ** 2, 0.0), axis=0) / jnp.maximum(n_ok - 1, 1)
    logp = target.log_density(safe)
    logp_ok = finite & jnp.isfinite(logp)
    mean_logp = jnp.sum(jnp.where(logp_ok, logp, 0.0)) / jnp.maximum(jnp.sum(logp_ok), 1)
    n_bad = n_bad + jnp.sum(finite & ~jnp.isfinite(logp))
    return {"mean_logp": mean_logp, "centre": centre, "spread": jnp.sqrt(var), "n_nonfinite": n_bad}


class Monitor:
    """Default convergence monitor (mean log-density, moments and their drift, blow-up).

    Parameters
    ----------
    growth_limit : float
        A window whose ensemble spread exceeds ``growth_limit`` times the largest spread seen
        at the start or after the first window (in any coordinate) counts as an explosive blow-up and triggers a
        roll-back, like non-finite particles.
    """

    tape_particles: int = 0

    def __init__(self, growth_limit: float = 1e6):
        self.growth_limit = float(growth_limit)
        self._prev = None
        self._first_spread = 0.0
        self._scale_set = False

    def open(self, target, stepper, state) -> None:
        fig = jax.device_get(_ensemble_figures(target, state.x))
        self._prev = (0, fig["centre"], fig["spread"])
        # the scale for "explosive growth": the larger of the starting spread and the spread
        # after the first window (a start with near-zero spread has no scale of its own)
        self._first_spread = float(np.nanmax(fig["spread"])) if np.size(fig["spread"]) else 0.0
        self._scale_set = False

    def read(self, target, stepper, state, stats, tape, step, elapsed) -> dict[str, Any]:
        fig = jax.device_get(_ensemble_figures(target, state.x))
        h = float(getattr(stepper, "step_size", 1.0))
        rec: dict[str, Any] = {"step": int(step), "flow_time": step * h, "elapsed": float(elapsed)}
        rec["mean_logp"] = float(fig["mean_logp"])
        rec["n_nonfinite"] = int(fig["n_nonfinite"])
        rec["centre"] = np.asarray(fig["centre"], dtype=float)
        rec["spread"] = np.asarray(fig["spread"], dtype=float)
        if self._prev is not None:
            s0, c0, sd0 = self._prev
            dt = max((step - s0) * h, 1e-300)
            with np.errstate(all="ignore"):
                rec["centre_drift"] = float(np.max(np.abs(rec["centre"] - c0) / np.maximum(rec["spread"], 1e-300)) / dt)
                ratio = np.abs(np.log(rec["spread"]) - np.log(sd0))
                ratio = ratio[np.isfinite(ratio)]  # a coordinate that started with zero spread has no log-drift
                rec["spread_drift"] = float(np.max(ratio)) / dt if ratio.size else float("nan")
        if rec["n_nonfinite"] == 0:
            self._prev = (step, rec["centre"], rec["spread"])
            if not self._scale_set and np.all(np.isfinite(rec["spread"])):
                self._first_spread = max(self._first_spread, float(np.max(rec["spread"], initial=0.0)))
                self._scale_set = True
        rec.update(summarise_stats(stats))
        return rec

    def judge(self, history) -> Verdict:
        rec = history.last
        if rec["n_nonfinite"] > 0:
            return Verdict("rewind", f"non-finite particles ({rec['n_nonfinite']}) at step {rec['step']}")
        big = float(np.max(rec["spread"])) if np.size(rec["spread"]) else 0.0
        if self._first_spread and big > self.growth_limit * max(self._first_spread, 1e-12):
            return Verdict("rewind", f"explosive growth of the ensemble spread ({big:.3g}) at step {rec['step']}")
        return GO

    def headline(self, record) -> dict[str, str]:
        out = {"logp": f"{record['mean_logp']:.4g}"}
        if "centre_drift" in record:
            out["drift"] = f"{record['centre_drift']:.2g}"
        if "accept" in record:
            out["acc"] = f"{record['accept']:.2f}"
        return out
