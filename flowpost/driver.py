"""``run``: move an ensemble with a stepper under the monitor, window by window.

Steps are taken in compiled windows: one ``jit``-compiled ``lax.scan`` over ``window`` steps
per (stepper, target, ensemble shape); the stepper is a static argument and the target's
data are traced. The key for step ``t`` is ``fold_in(key, t)``, so the key stream does not
depend on the window length and a resumed run continues exactly as an uninterrupted one.
A final partial window reuses the same compiled function with the extra steps masked.

Between windows, in Python: the monitor's record and verdict, the progress bar, the stop
rules (step budget, time budget, the monitor's own rules), checkpoints, and the roll-back
to the last good window when the monitor reports a blow-up. A ``KeyboardInterrupt`` returns
the last completed window, marked as interrupted.
"""
from __future__ import annotations

import dataclasses
import json
import os
import time
from functools import partial
from typing import Any, Callable

import jax
import jax.numpy as jnp
import numpy as np

from .history import History
from .monitor import Monitor
from .result import Result
from .steppers.base import check_stepper
from .target import Target, as_target

__all__ = ["run", "evolve"]

START_SALT = 0x7FFFFFFF  # the start key is fold_in(key, START_SALT); step t uses fold_in(key, t)

CHECKPOINT_FORMAT = "flowpost-checkpoint"


@partial(jax.jit, static_argnames=("stepper", "length", "tape"))
def _window(stepper, length, tape, target, state, key, t0, n_active):
    def body(st, i):
        t = t0 + i
        k = jax.random.fold_in(key, t)

        def do(s):
            return stepper.advance(target, s, k)

        if length == 1:
            new, stats = do(st)
        else:
            stats_shape = jax.eval_shape(lambda s: do(s)[1], st)

            def skip(s):
                return s, jax.tree_util.tree_map(lambda a: jnp.zeros(a.shape, a.dtype), stats_shape)

            new, stats = jax.lax.cond(i < n_active, do, skip, st)
        out = (stats, new.x[:tape]) if tape else (stats, None)
        return new, out

    state, (stats, taped) = jax.lax.scan(body, state, jnp.arange(length))
    return state, stats, taped


@partial(jax.jit, static_argnames=("stepper",))
def _start(stepper, target, x, key):
    return stepper.start(target, x, key)


@jax.jit
def _value_and_score(target, x):
    return target.value_and_score(x)


def _check_start(target: Target, x: jax.Array) -> None:
    logp, score = _value_and_score(target, x)
    logp, score = np.asarray(logp), np.asarray(score)
    bad_lp = ~np.isfinite(logp)
    bad_sc = ~np.isfinite(score)
    bad = bad_lp | bad_sc.any(axis=1)
    if bad.any():
        coords = target.layout.coordinate_names()
        slots = {c: c.split("[")[0] for c in coords}
        params = sorted({slots[coords[j]] for j in np.nonzero(bad_sc.any(axis=0))[0]})
        what = []
        if bad_lp.any():
            what.append(f"log-density non-finite at {int(bad_lp.sum())}")
        if bad_sc.any():
            what.append(f"score non-finite at {int(bad_sc.any(axis=1).sum())} (parameters: {', '.join(params)})")
        raise ValueError(
            f"init: {int(bad.sum())} of {x.shape[0]} starting particles give non-finite values "
            f"({'; '.join(what)}); first bad particle index {int(np.argmax(bad))}. Start the "
            "particles where log_p is finite (e.g. near the prior's centre)."
        )


def _key_parts(key):
    typed = jnp.issubdtype(key.dtype, jax.dtypes.prng_key)
    return (np.asarray(jax.random.key_data(key)) if typed else np.asarray(key)), typed


def _save_checkpoint(path, state, step, key, history, stepper, window):
    leaves = jax.tree_util.tree_leaves(state)
    kdata, typed = _key_parts(key)
    meta = {"format": CHECKPOINT_FORMAT, "version": 1, "step": int(step), "typed_key": typed,
            "stepper": repr(stepper), "window": int(window), "history": history.to_json(),
            "n_leaves": len(leaves)}
    arrays = {f"leaf_{i}": np.asarray(l) for i, l in enumerate(leaves)}
    tmp = str(path) + ".tmp.npz"
    np.savez(tmp, meta=np.array(json.dumps(meta)), key=kdata, **arrays)
    os.replace(tmp, path)


def _load_checkpoint(path, state_like, stepper):
    try:
        with np.load(path, allow_pickle=False) as f:
            meta = json.loads(str(f["meta"]))
            if meta.get("format") != CHECKPOINT_FORMAT:
                raise ValueError("not a flowpost checkpoint")
            leaves = [f[f"leaf_{i}"] for i in range(meta["n_leaves"])]
            kdata = f["key"]
    except (OSError, KeyError, ValueError, EOFError) as err:
        raise ValueError(f"resume: '{path}' is not a readable flowpost checkpoint ({err})") from err
    if meta["stepper"] != repr(stepper):
        raise ValueError(f"resume: the checkpoint was written by {meta['stepper']}, not {stepper!r}")
    like_leaves, treedef = jax.tree_util.tree_flatten(state_like)
    if len(like_leaves) != len(leaves) or any(np.shape(a) != np.shape(b) for a, b in zip(like_leaves, leaves)):
        raise ValueError("resume: the checkpoint's ensemble does not match the shape of init")
    state = jax.tree_util.tree_unflatten(
        treedef, [jnp.asarray(l, dtype=a.dtype) for l, a in zip(leaves, like_leaves)])
    key = jax.random.wrap_key_data(jnp.asarray(kdata)) if meta["typed_key"] else jnp.asarray(kdata)
    return state, int(meta["step"]), key, History.from_json(meta["history"])


def run(
    target: Target | Callable[..., Any],
    stepper,
    init,
    *,
    key: jax.Array,
    steps: int = 1000,
    window: int = 100,
    monitor: Monitor | None = None,
    time_budget: float | None = None,
    progress: bool = True,
    checkpoint: str | os.PathLike | None = None,
    checkpoint_every: int = 10,
    resume: str | os.PathLike | None = None,
    on_blowup: str = "stop",
) -> Result:
    """Move the ensemble ``init`` towards the target with ``stepper``.

    Parameters
    ----------
    target : Target or callable
        The posterior; a bare callable ``log_p(theta)`` is wrapped in :class:`Target`.
    stepper : stepper object
        A configuration such as ``flowpost.Langevin(step_size=1e-3)``; see
        :mod:`flowpost.steppers.base` for the protocol.
    init : pytree
        Starting particles in the user's (constrained) parametrisation, every leaf with a
        leading particle axis ``N`` (a plain ``(N, d)`` array included).
    key : jax PRNG key
        The run's key; step ``t`` uses ``jax.random.fold_in(key, t)``.
    steps : int
        Step budget (total, counting steps done before a resume).
    window : int
        Steps per compiled window; the monitor reads the ensemble after each.
    monitor : Monitor, optional
        Defaults to :class:`flowpost.monitor.Monitor`.
    time_budget : float, optional
        Wall-clock seconds after which the run stops at the end of the current window.
    progress : bool
        Show a tqdm progress bar with the monitor's headline figures.
    checkpoint : path, optional
        Write a checkpoint (``.npz``) every ``checkpoint_every`` windows and at the end.
    resume : path, optional
        Continue from a checkpoint written by a run with the same target, stepper and init
        shape; the key stream continues where it stopped (the checkpoint's key is used).
    on_blowup : {"stop", "halve"}
        On a blow-up the ensemble is rolled back to the last good window; then the run stops
        with the reason ("stop") or halves the stepper's ``step_size`` and goes on ("halve",
        at most 10 times).

    Returns
    -------
    Result
        Particles in the user's pytree, the monitor's history, why the run stopped.
    """
    target = as_target(target)
    check_stepper(stepper)
    if int(steps) < 0:
        raise ValueError(f"steps: must be >= 0; got {steps}")
    if int(window) < 1:
        raise ValueError(f"window: must be >= 1; got {window}")
    if on_blowup not in ("stop", "halve"):
        raise ValueError(f"on_blowup: expected 'stop' or 'halve'; got {on_blowup!r}")
    if not isinstance(key, jax.Array):
        raise TypeError(f"key: expected a JAX PRNG key such as jax.random.key(0); got {type(key).__name__}")
    steps, window = int(steps), int(window)
    bound, x0 = target.bind(init)
    _check_start(bound, x0)
    monitor = Monitor() if monitor is None else monitor

    state = _start(stepper, bound, x0, jax.random.fold_in(key, START_SALT))
    step = 0
    history = History()
    if resume is not None:
        state, step, key, history = _load_checkpoint(resume, state, stepper)
    monitor.open(bound, stepper, state)
    tape = int(getattr(monitor, "tape_particles", 0) or 0)
    tape = min(tape, x0.shape[0])

    good_state, good_step = state, step
    status, reason = "done", f"step budget reached ({steps} steps)"
    events: list[str] = []
    halvings = 0
    t_start = time.perf_counter()
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=steps, initial=min(step, steps), unit="step", leave=False)
    windows_done = 0
    try:
        while step < steps:
            n = min(window, steps - step)
            new_state, stats, taped = _window(stepper, window, tape, bound, state, key,
                                              jnp.asarray(step), jnp.asarray(n))
            stats = {k: np.asarray(v)[:n] for k, v in jax.device_get(stats).items()}
            taped = None if taped is None else np.asarray(taped)[:n]
            elapsed = time.perf_counter() - t_start
            record = monitor.read(bound, stepper, new_state, stats, taped, step + n, elapsed)
            history.append(record)
            verdict = monitor.judge(history)
            if verdict.action == "rewind":
                event = {"step": int(step + n), "event": "rollback", "reason": verdict.reason,
                         "back_to": int(good_step)}
                state, step = good_state, good_step
                if on_blowup == "halve" and halvings < 10 and hasattr(stepper, "step_size"):
                    stepper = dataclasses.replace(stepper, step_size=stepper.step_size / 2)
                    halvings += 1
                    event["action"] = f"halved step_size to {stepper.step_size:g}"
                    history.append(event)
                    events.append(f"{verdict.reason}: rolled back to step {good_step}, {event['action']}")
                    monitor.open(bound, stepper, state)
                    continue
                history.append(event)
                status = "blow-up"
                reason = (f"{verdict.reason}; returned the last good ensemble (step {good_step}). "
                          "Try a smaller step_size, on_blowup='halve', or an implicit stepper "
                          "(ImplicitLangevin, JKO).")
                break
            state, step = new_state, step + n
            good_state, good_step = state, step
            windows_done += 1
            if bar is not None:
                bar.update(n)
                bar.set_postfix(monitor.headline(record), refresh=False)
            if checkpoint is not None and windows_done % max(int(checkpoint_every), 1) == 0:
                _save_checkpoint(checkpoint, state, step, key, history, stepper, window)
            if verdict.action == "stop":
                status, reason = "stopped", verdict.reason
                break
            if time_budget is not None and elapsed >= float(time_budget):
                status, reason = "stopped", f"time budget reached ({elapsed:.1f} s of {time_budget} s)"
                break
    except KeyboardInterrupt:
        state, step = good_state, good_step
        status, reason = "interrupted", f"interrupted by the user at step {step}"
    finally:
        if bar is not None:
            bar.close()
    if checkpoint is not None and status != "interrupted":
        _save_checkpoint(checkpoint, state, step, key, history, stepper, window)
    report = stepper.report(state) if hasattr(stepper, "report") else {}
    return Result(
        target=bound,
        state=state,
        history=history,
        status=status,
        reason=reason,
        steps=step,
        elapsed=time.perf_counter() - t_start,
        stepper=stepper,
        report=report,
        events=events,
    )


def evolve(stepper, target: Target, x: jax.Array, key: jax.Array, steps: int):
    """Start ``stepper`` at the unconstrained ensemble ``x`` on a *bound* target and take
    ``steps`` steps, all inside one traced function: no monitor, no Python between steps.

    The key stream is the one :func:`run` uses (start: ``fold_in(key, START_SALT)``; step
    ``t``: ``fold_in(key, t)``), so ``evolve`` and a ``run`` with the same key agree. Being
    pure, it can be ``jit``-ted and ``vmap``-ped, for example over the data of many targets
    (simulation-based calibration does this). Returns the final state.
    """
    state = stepper.start(target, x, jax.random.fold_in(key, START_SALT))

    def body(st, t):
        new, _ = stepper.advance(target, st, jax.random.fold_in(key, t))
        return new, None

    state, _ = jax.lax.scan(body, state, jnp.arange(int(steps)))
    return state
