"""The convergence monitor: reads the ensemble between compiled windows, writes one record
per window, and says whether the run goes on, stops, or rolls back.

Interface (what :func:`flowpost.run` calls; a user's own monitor implements the same):

``tape_particles`` : int
    How many particles' trajectories the driver should record inside each window and hand
    to ``read`` (0 for none): a fixed random subset, drawn from the run's key.
``tape_every`` : int
    The driver records them after every ``tape_every``-th step when that divides the window
    (else after every step); the default monitor asks for its ``trail_thin``.
``open(target, stepper, state) -> None``
    Called once before the first window (and again on resume and after a roll-back).
``read(target, stepper, state, stats, tape, step, elapsed, *, flow_time, reductions,
measured=None, defer_chains=False, tape_stride=1) -> dict``
    Called after each window. ``stats`` is the stepper's per-step stats stacked over the
    window's steps (numpy arrays of shape ``(steps,)``, the driver's ``step_size``
    included); ``tape`` is ``None`` or an array ``(steps / tape_stride, tape_particles, d)``,
    one row after every ``tape_stride``-th step; ``flow_time`` is the sum of the steps taken
    so far; ``reductions`` says how each stat reduces over the window (the stepper's
    declaration); ``measured`` are the device figures when the driver computed them already
    (a sweep computes every member's in one call, :meth:`Monitor.measure_batch`), and
    ``defer_chains`` leaves R-hat and ESS to the caller (:func:`chain_figures`). Returns the
    window's record.
``judge(history) -> Verdict``
    Looks at the history (the new record is its last) and returns a :class:`Verdict`:
    ``"go"``, ``"stop"`` (with the reason), ``"rewind"`` (roll back to the last good window,
    with the reason; the controller may offer a smaller step) or ``"fail"`` (roll back and end
    the run as a blow-up whatever ``on_blowup`` says: a smaller step is no remedy), and the
    window's findings in ``warnings`` (recorded in the history, :mod:`flowpost.engine` (health)).
``headline(record) -> dict``
    A few short figures for the progress bar.

The default :class:`Monitor` reads only the particles, the scores and the stepper's own
stats, so the same monitor watches every stepper. Per window it records, in the
unconstrained coordinates the flow moves:

- ``ksd``: the kernel Stein discrepancy with the inverse multiquadric kernel ("Measuring
  sample quality with kernels" (2017); :mod:`flowpost.discrepancy`). It needs only the
  score, so the unknown normalising constant does not matter; it tends to zero only when
  the ensemble matches the target. Computed on a random subset of ``discrepancy_points``
  particles (fresh each window, drawn with a key derived from the window's step), reusing
  the scores the stepper keeps in its state when it has them.
- ``mean_logp``, the ensemble mean (``centre``) and standard deviation (``spread``) per
  coordinate, and their drift per unit of flow time,

      centre_drift = max_k |m_k - m_k'| / (s_k dt),  spread_drift = max_k |log s_k - log s_k'| / dt

  (primes: the previous window; ``dt`` the flow time between the two);
- for stochastic steppers (``stepper.stochastic``, a declaration every stepper makes):
  ``rhat``, the largest rank-normalised split R-hat over coordinates, and ``ess``, the smallest
  bulk effective sample size, from the thinned trajectories of ``trail_particles`` particles
  (a fixed random subset drawn from the run's key),
  each an independent chain, kept in a bounded buffer (:mod:`flowpost.mixing`);
- ``n_nonfinite`` and the stepper's stats reduced over the window as the stepper declares
  (``sum``, ``mean`` over finite values, or ``max``; :mod:`flowpost.steppers.base`).

Stop rules (the record of the window that stops the run says which, and so does
``Result.reason``): a target discrepancy, a plateau, and a user rule on the history; the
step and time budgets live in :func:`flowpost.run`. Blow-ups (non-finite particles or an
explosive growth of the spread) ask the driver to roll back.

``log_p = +inf`` (policy, the same for every stepper): a log-density is finite or ``-inf``, so
``+inf`` at a particle is a defect of ``log_p``, not of the step. The monitor evaluates
``log_p`` at the ensemble after every window (``n_posinf``, particles with finite coordinates
where ``log_p = +inf``); on any it says ``"fail"``: the run returns the last good window with
status ``"blow-up"`` and a reason naming ``log_p``, without halving the step. (MALA accepts a
proposal at ``+inf``, as its Metropolis ratio says, so it reaches the monitor like any other
stepper's move.)

Findings (:mod:`flowpost.engine` (health)): after every window the monitor also looks for a
stuck ensemble (no particle moved), an acceptance below 1% and collapsed coordinates (spread
at most ``4 eps |mean|``: all particles equal there, or lost float resolution) and hands them
to the driver in the verdict's ``warnings``; they end up in ``Result.warnings``.

Noisy scores (a minibatch target, :class:`~flowpost.ItemSum`): the discrepancy never uses
the estimates a stepper keeps in its state; it takes **full-data** scores on its subset, at a
cost of ``m n`` data-item gradients per window (``m = min(discrepancy_points, N)``, ``n``
the data items: with a million items and ``m = 256``, a quarter of a billion per window,
often more than the window's steps; lower ``discrepancy_points`` or turn the discrepancy off
for big data). ``mean_logp`` and the ``+inf`` check use the batch estimate of the
log-density on one fixed batch of rows (the same rows every window, so the figure is
comparable between windows; ``N b`` item evaluations). The estimator's variance is the
stepper's stat ``score_variance``.
"""

from __future__ import annotations

from collections.abc import Callable
from functools import partial
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import boolean, callable_value, fail, integer, non_negative, positive, real
from ..diagnostics import ThinnedTrail, split_rhat_and_bulk_ess, stein_discrepancy
from ..model import figure_log_density, uses_minibatches
from ..model._target import Target
from ..numerics import whiten
from ..steppers.base import Stepper
from ._health import Finding, window_findings
from ._history import History

__all__ = ["BareMonitor", "Monitor", "Verdict", "chain_figures", "summarise_stats"]


class Verdict(NamedTuple):
    """What the monitor decides after a window: ``action`` in {"go", "stop", "rewind",
    "fail"}, the ``reason``, and the window's findings (``(kind, message)`` pairs) in
    ``warnings``, which the driver records whatever the action."""

    action: str
    reason: str = ""
    warnings: tuple[Finding, ...] = ()


GO = Verdict("go")


def _nonfinite(rec) -> Verdict:
    return Verdict("rewind", f"non-finite particles ({rec['n_nonfinite']}) at step {rec['step']}")


def summarise_stats(stats: dict[str, np.ndarray], reductions: dict[str, str]) -> dict[str, float]:
    """Per-window summary of per-step stats, each reduced as declared: ``"sum"``, ``"max"``
    or ``"mean"`` (over the finite values; NaN when there are none)."""
    out = {}
    for k, v in stats.items():
        v = np.asarray(v, dtype=float)
        if v.size == 0:
            continue
        how = reductions[k]
        if how == "sum":
            out[k] = float(np.sum(v))
        elif how == "max":
            out[k] = float(np.max(v))
        else:
            finite = v[np.isfinite(v)]
            out[k] = float(np.mean(finite)) if finite.size else float("nan")
    return out


def _ensemble_figures_body(target, x):
    finite = jnp.all(jnp.isfinite(x), axis=1)
    n_bad = jnp.sum(~finite)
    safe = jnp.where(finite[:, None], x, 0.0)
    n_ok = jnp.maximum(jnp.sum(finite), 1)
    centre = jnp.sum(safe, axis=0) / n_ok
    var = jnp.sum(jnp.where(finite[:, None], (safe - centre) ** 2, 0.0), axis=0) / jnp.maximum(n_ok - 1, 1)
    logp = figure_log_density(target, safe)  # a fixed-batch estimate for minibatch targets
    logp_ok = finite & jnp.isfinite(logp)
    mean_logp = jnp.sum(jnp.where(logp_ok, logp, 0.0)) / jnp.maximum(jnp.sum(logp_ok), 1)
    n_bad = n_bad + jnp.sum(finite & ~jnp.isfinite(logp))
    n_posinf = jnp.sum(finite & (logp == jnp.inf))  # a defect of log_p (module docstring)
    return {
        "mean_logp": mean_logp,
        "centre": centre,
        "spread": jnp.sqrt(var),
        "n_nonfinite": n_bad,
        "n_posinf": n_posinf,
    }


class Monitor:
    """Default convergence monitor.

    Parameters
    ----------
    discrepancy : bool
        Compute the kernel Stein discrepancy each window.
    discrepancy_points : int
        Particles (a random subset, fresh each window) used for the discrepancy; cost
        O(m^2 d), memory O(m * block). With m exact draws the (V-statistic) discrepancy is
        about sqrt(E|score|^2 / m), its floor; a value well above that floor means the
        ensemble is not yet the target.
    whitened : bool
        Compute the discrepancy in coordinates whitened by the subset's own covariance
        (``y = L^-1 (x - m)``, score ``L^T s``), so that it does not depend on the units of
        the parameters (the IMQ kernel's length scale 1 then means one ensemble sd).
    trail_particles : int
        Particles whose thinned trajectories feed R-hat and ESS (stochastic steppers only;
        0 turns them off).
    trail_thin, trail_capacity : int
        Keep every ``trail_thin``-th step of those trajectories, at most ``trail_capacity``
        per particle (the oldest are dropped first).
    target_discrepancy : float, optional
        Stop once ``ksd`` falls below this value.
    plateau : (str, int, float), optional
        ``(figure, M, tol)``: stop once the mean of ``figure`` over the last ``M`` windows
        differs from its mean over the ``M`` windows before by less than ``tol`` relative
        (``|a - b| <= tol * max(|b|, 1e-12)``). ``("ksd", 5, 0.05)`` is a sensible choice.
    stop_when : callable, optional
        ``stop_when(history)`` returning a reason (a string, or True) to stop, or a false
        value to go on.
    growth_limit : float
        A spread larger than ``growth_limit`` times the start's (or the first window's)
        counts as an explosive blow-up.
    """

    def __init__(
        self,
        *,
        discrepancy: bool = True,
        discrepancy_points: int = 256,
        whitened: bool = True,
        trail_particles: int = 32,
        trail_thin: int = 10,
        trail_capacity: int = 100,
        target_discrepancy: float | None = None,
        plateau: tuple[str, int, float] | None = None,
        stop_when: Callable[[Any], Any] | None = None,
        growth_limit: float = 1e6,
    ):
        boolean("discrepancy", discrepancy)
        integer("discrepancy_points", discrepancy_points, minimum=2)
        boolean("whitened", whitened)
        integer("trail_particles", trail_particles, minimum=0)
        integer("trail_thin", trail_thin, minimum=1)
        integer("trail_capacity", trail_capacity, minimum=8)
        if target_discrepancy is not None:
            positive("target_discrepancy", target_discrepancy)
            if not discrepancy:
                raise fail("target_discrepancy", "None when discrepancy=False (no ksd is computed)", target_discrepancy)
        if plateau is not None:
            if not (isinstance(plateau, tuple) and len(plateau) == 3 and isinstance(plateau[0], str)):
                raise fail("plateau", "(figure name, M >= 1, tol >= 0)", plateau, TypeError)
            if plateau[0] in ("centre", "spread") or (plateau[0] == "ksd" and not discrepancy):
                raise fail(
                    "plateau",
                    "a scalar figure of the history (e.g. 'ksd', 'mean_logp'; 'ksd' needs discrepancy=True)",
                    plateau[0],
                )
            integer("plateau[1]", plateau[1], minimum=1)
            non_negative("plateau[2]", plateau[2])
        if stop_when is not None:
            callable_value("stop_when", stop_when, "a callable on the history", nargs=1)
        real("growth_limit", growth_limit, low=1.0, low_open=True, expected="a finite number > 1")
        self.discrepancy = bool(discrepancy)
        self.discrepancy_points = int(discrepancy_points)
        self.whitened = bool(whitened)
        self.trail_particles = int(trail_particles)
        self.trail_thin = int(trail_thin)
        self.trail_capacity = int(trail_capacity)
        self.target_discrepancy = target_discrepancy
        self.plateau = plateau
        self.stop_when = stop_when
        self.growth_limit = float(growth_limit)
        self.tape_particles = 0
        self.tape_every = self.trail_thin
        self._prev = None
        self._first_spread = 0.0
        self._scale_set = False
        self._trail = None
        self._clock = None
        self._findings: tuple[Finding, ...] = ()
        self._dtype = np.dtype(np.float32)
        self._n = 0
        self._stochastic = True

    def open(self, target: Target, stepper: Stepper, state: Any) -> None:
        fig = jax.device_get(_ensemble_figures(target, state.x))
        self._prev = (None, fig["centre"], fig["spread"])
        # the scale for "explosive growth": the larger of the starting spread and the spread
        # after the first window (a start with near-zero spread has no scale of its own)
        self._first_spread = float(np.nanmax(fig["spread"])) if np.size(fig["spread"]) else 0.0
        self._scale_set = False
        self._clock = None
        self._findings = ()
        self._dtype, self._n = np.dtype(state.x.dtype), int(state.x.shape[0])
        stochastic = stepper.stochastic
        self._stochastic = bool(stochastic)
        self.tape_particles = min(self.trail_particles, state.x.shape[0]) if stochastic else 0
        self._trail = ThinnedTrail(self.trail_capacity, self.trail_thin) if self.tape_particles else None

    def dispatch(self, target: Target, state: Any, step: int) -> dict[str, Any]:
        """Start computing :meth:`measure`'s figures on the device and return them without
        waiting (JAX arrays; ``jax.device_get`` them later). The run queues the next window
        behind this call, so the host's work on one window overlaps the device's on the next:
        what it computes may depend only on what :meth:`open` fixed, never on :meth:`read`'s
        bookkeeping of the window before."""
        return _measure(
            target,
            state.x,
            _score_of(state, target),
            np.int32(step),
            self._subset(state.x.shape[0]),
            self.whitened,
            self.discrepancy,
        )

    def measure(self, target: Target, state: Any, step: int) -> dict[str, Any]:
        """The figures computed on the device for one window (ensemble moments, mean
        log-density, non-finite count and, when on, the discrepancy), in one compiled call."""
        return jax.device_get(self.dispatch(target, state, step))

    def dispatch_batch(self, target: Target, states: Any, steps: Any) -> dict[str, Any]:
        """:meth:`dispatch` for a batch of ensembles (a leading member axis on every leaf of
        ``states``, one step per member): one compiled, ``vmap``-ped call, not waited for; every
        figure comes back with the member axis first."""
        return _measure_batch(
            target,
            states.x,
            _score_of(states, target),
            np.asarray(steps, np.int32),
            self._subset(states.x.shape[1]),
            self.whitened,
            self.discrepancy,
        )

    def measure_batch(self, target: Target, states: Any, steps: Any) -> list[dict[str, Any]]:
        """:meth:`measure` for a batch of ensembles: :meth:`dispatch_batch`, fetched and cut
        into one record of figures per member."""
        out = jax.device_get(self.dispatch_batch(target, states, steps))
        return [{k: v[i] for k, v in out.items()} for i in range(len(steps))]

    def _subset(self, n: int) -> int:
        return min(self.discrepancy_points, n)

    def read(
        self,
        target: Target,
        stepper: Stepper,
        state: Any,
        stats: dict[str, Any],
        tape: Any,
        step: int,
        elapsed: float,
        *,
        flow_time: float,
        reductions: dict[str, str],
        measured: dict[str, Any] | None = None,
        defer_chains: bool = False,
        tape_stride: int = 1,
    ) -> dict[str, Any]:
        fig = self.measure(target, state, step) if measured is None else measured
        sizes = np.asarray(stats["step_size"], dtype=float)
        now = float(flow_time)
        if self._clock is None:  # first window since open(): the flow time of the steps before it
            self._clock = now - float(np.sum(sizes))
        rec: dict[str, Any] = {"step": int(step), "flow_time": now, "elapsed": float(elapsed)}
        rec["mean_logp"] = float(fig["mean_logp"])
        rec["n_nonfinite"] = int(fig["n_nonfinite"])
        rec["centre"] = np.asarray(fig["centre"], dtype=float)
        rec["spread"] = np.asarray(fig["spread"], dtype=float)
        posinf = int(fig["n_posinf"]) if "n_posinf" in fig else 0
        before = None if self._prev is None else (self._prev[1], self._prev[2])
        if self._prev is not None:
            t0, c0, sd0 = self._prev
            t0 = self._clock if t0 is None else t0
            dt = max(now - t0, 1e-300)
            with np.errstate(all="ignore"):
                rec["centre_drift"] = float(np.max(np.abs(rec["centre"] - c0) / np.maximum(rec["spread"], 1e-300)) / dt)
                ratio = np.abs(np.log(rec["spread"]) - np.log(sd0))
                ratio = ratio[np.isfinite(ratio)]  # a coordinate that started with zero spread has no log-drift
                rec["spread_drift"] = float(np.max(ratio)) / dt if ratio.size else float("nan")
        if rec["n_nonfinite"] == 0:
            self._clock = now
            self._prev = (now, rec["centre"], rec["spread"])
            if not self._scale_set and np.all(np.isfinite(rec["spread"])):
                self._first_spread = max(self._first_spread, float(np.max(rec["spread"], initial=0.0)))
                self._scale_set = True
            if self.discrepancy:
                rec["ksd"] = float(fig["ksd"])
            if self._trail is not None and tape is not None and len(tape):
                self._trail.push(np.asarray(tape, dtype=float), stride=tape_stride)
                if self._trail.size >= 8 and not defer_chains:
                    rec.update(chain_figures([self._trail.groups()])[0])
        rec.update(summarise_stats(stats, reductions))
        self._findings = tuple(
            window_findings(
                target,
                before,
                rec,
                n=self._n,
                eps=float(np.finfo(self._dtype).eps),
                dtype_name=self._dtype.name,
                stochastic=self._stochastic,
            )
        )
        if posinf:
            rec["n_posinf"] = posinf
        return rec

    def chains(self) -> np.ndarray | None:
        """The taped particles' thinned trails as chains ``(chains, draws, d)``, once there
        are enough draws for R-hat and ESS (else ``None``)."""
        if self._trail is None or self._trail.size < 8:
            return None
        return self._trail.groups()

    def judge(self, history: History) -> Verdict:
        verdict = self._decide(history)
        return verdict._replace(warnings=self._findings) if self._findings else verdict

    def _decide(self, history: History) -> Verdict:
        rec = history.last_record
        if rec.get("n_posinf", 0) > 0:
            return Verdict(
                "fail",
                f"log_p: expected a log-density that is finite or -inf; got log_p = +inf at {rec['n_posinf']} "
                f"particle(s) at step {rec['step']} (a log-density cannot be +inf: check log_p for a log of "
                "a zero denominator, a division by zero or a missing minus sign)",
            )
        if rec["n_nonfinite"] > 0:
            return _nonfinite(rec)
        big = float(np.max(rec["spread"])) if np.size(rec["spread"]) else 0.0
        if self._first_spread and big > self.growth_limit * max(self._first_spread, 1e-12):
            return Verdict("rewind", f"explosive growth of the ensemble spread ({big:.3g}) at step {rec['step']}")
        if self.target_discrepancy is not None and rec.get("ksd", np.inf) <= self.target_discrepancy:
            return Verdict("stop", f"target discrepancy reached (ksd {rec['ksd']:.4g} <= {self.target_discrepancy:g})")
        if self.plateau is not None:
            name, m, tol = self.plateau
            m = int(m)
            vals = [r[name] for r in history if "event" not in r and name in r]
            if len(vals) >= 2 * m:
                recent, before = np.mean(vals[-m:]), np.mean(vals[-2 * m : -m])
                if abs(recent - before) <= float(tol) * max(abs(before), 1e-12):
                    return Verdict(
                        "stop",
                        f"plateau: mean {name} changed by less than {float(tol):g} "
                        f"(relative) over the last {m} windows",
                    )
        if self.stop_when is not None:
            said = self.stop_when(history)
            if said:
                return Verdict("stop", said if isinstance(said, str) else "user stop rule (stop_when)")
        return GO

    def headline(self, record: dict[str, Any]) -> dict[str, str]:
        out = {}
        if "ksd" in record:
            out["ksd"] = f"{record['ksd']:.3g}"
        out["logp"] = f"{record['mean_logp']:.4g}"
        if "rhat" in record:
            out["rhat"] = f"{record['rhat']:.3f}"
        if "accept" in record:
            out["acc"] = f"{record['accept']:.2f}"
        return out


class BareMonitor(Monitor):
    """The least a run needs: non-finite detection and roll-back, nothing else (no
    discrepancy, no moments' drift, no trajectories). For overhead measurements and for
    users who monitor by other means."""

    def __init__(self):
        super().__init__(discrepancy=False, trail_particles=0)

    def open(self, target: Target, stepper: Stepper, state: Any) -> None:
        self.tape_particles = 0

    def dispatch(self, target: Target, state: Any, step: int) -> dict[str, Any]:
        return {"n_nonfinite": _count_nonfinite(state.x)}

    def dispatch_batch(self, target: Target, states: Any, steps: Any) -> dict[str, Any]:
        return {"n_nonfinite": _count_nonfinite_batch(states.x)}

    def chains(self) -> np.ndarray | None:
        return None

    def read(self, target: Target, stepper: Stepper, state: Any, *args: Any, **window: Any) -> dict[str, Any]:
        stats, _tape, step, elapsed = args
        measured = window.get("measured")
        fig = self.measure(target, state, step) if measured is None else measured
        flow_time, reductions = window["flow_time"], window["reductions"]
        bad = int(fig["n_nonfinite"])
        rec = {"step": int(step), "elapsed": float(elapsed), "n_nonfinite": bad, "flow_time": float(flow_time)}
        rec.update(summarise_stats(stats, reductions))
        return rec

    def judge(self, history: History) -> Verdict:
        rec = history.last_record
        return _nonfinite(rec) if rec["n_nonfinite"] > 0 else GO

    def headline(self, record: dict[str, Any]) -> dict[str, str]:
        return {}


def chain_figures(groups: list[np.ndarray]) -> list[dict[str, float]]:
    """``rhat`` (largest rank-normalised split R-hat over coordinates) and ``ess`` (smallest
    bulk ESS) for each of several sets of chains ``(chains, draws, d)``. Sets of the same
    chains-and-draws shape are computed together, side by side along the coordinate axis
    (R-hat and ESS are per coordinate), in one call: a sweep's members cost one computation."""
    out: list[dict[str, float]] = [{} for _ in groups]
    by_shape: dict[tuple[int, int], list[int]] = {}
    for i, g in enumerate(groups):
        by_shape.setdefault(g.shape[:2], []).append(i)
    for members in by_shape.values():
        joint = np.concatenate([groups[i] for i in members], axis=2)
        with np.errstate(all="ignore"):
            rhat, ess = split_rhat_and_bulk_ess(joint)
        start = 0
        for i in members:
            d = groups[i].shape[2]
            r, e = rhat[start : start + d], ess[start : start + d]
            start += d
            out[i] = {
                "rhat": float(np.nanmax(r)) if np.any(np.isfinite(r)) else float("nan"),
                "ess": float(np.nanmin(e)) if np.any(np.isfinite(e)) else float("nan"),
            }
    return out


@jax.jit
def _count_nonfinite(x):
    return jnp.sum(~jnp.all(jnp.isfinite(x), axis=1))


_count_nonfinite_batch = jax.jit(jax.vmap(_count_nonfinite))

_ensemble_figures = jax.jit(_ensemble_figures_body)

_DISCREPANCY_SALT = 0x5D15C  # the discrepancy's subset at step t is drawn with fold_in(key(salt), t)


def _score_of(state, target):
    """The score the stepper keeps at ``state.x`` (an optional field of the protocol), or None;
    None too for a minibatch target, whose kept scores are noisy estimates (the discrepancy
    then takes full-data scores)."""
    if uses_minibatches(target):
        return None
    return state.score if "score" in state._fields else None


def _measure_body(target, x, score, step, m, whitened, discrepancy):
    fig = _ensemble_figures_body(target, x)
    if discrepancy:
        key = jax.random.fold_in(jax.random.key(_DISCREPANCY_SALT), step)
        fig["ksd"] = _discrepancy_body(target, x, score, key, m, whitened)
    return fig


_measure = jax.jit(_measure_body, static_argnames=("m", "whitened", "discrepancy"))


@partial(jax.jit, static_argnames=("m", "whitened", "discrepancy"))
def _measure_batch(target, xs, scores, steps, m, whitened, discrepancy):
    def one(x, s, t):
        return _measure_body(target, x, s, t, m, whitened, discrepancy)

    return jax.vmap(one)(xs, scores, steps)


def _discrepancy_body(target, x, score, key, m, whitened):
    n = x.shape[0]
    if m < n:
        idx = jax.random.choice(key, n, (m,), replace=False)
        x = x[idx]
        score = None if score is None else score[idx]
    if score is None:
        score = target.score(x)
    if whitened and x.shape[0] > x.shape[1]:
        # y = L^-1 (x - m) with L L^T the ensemble covariance; the score transforms as
        # grad_y log pi = L^T grad_x log pi. The discrepancy is then the same for a target and
        # any affine image of it, instead of depending on the parameters' units.
        w = whiten(jax.lax.stop_gradient(x))
        x, score = w.apply(x), score @ w.chol
    return stein_discrepancy(x, score)
