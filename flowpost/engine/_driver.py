"""``run``: move an ensemble with a stepper under a step-size controller and the monitor.

Steps are taken in compiled windows: one ``jit``-compiled ``lax.scan`` over ``window`` steps
per (stepper structure, controller structure, target, ensemble shape). The stepper and the
controller are pytrees passed as ordinary arguments, so their numbers (step sizes,
frictions, tolerances) are traced: a new step size, a halving after a blow-up or an adapted
step never recompiles. The scanned carry is ``(stepper state, controller state, flow
time)``; step ``t`` runs with ``h = controller.step_size(cstate, t)`` and the key
``fold_in(key, t)``, so the key stream does not depend on the window length and a resumed run
continues exactly as an uninterrupted one. A final partial window reuses the compiled window
with the extra steps masked. The flow time is the sum of the steps taken.

Between windows, in Python: the monitor's record and verdict, the progress bar, the stop
rules (step budget, time budget, the monitor's own rules), checkpoints, and the roll-back
to the last good window when the monitor reports a blow-up (the controller may then offer a
smaller step: :class:`~flowpost.Halving`). A ``KeyboardInterrupt`` returns
the last completed window, marked as interrupted.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import choice, fail, instance, integer, non_negative, prng_key
from ..model._target import Target, as_target
from ..model._user_code import nonfinite_data
from ..steppers.base import Stepper, check_stats, check_stepper
from ._checkpoint import fingerprint, load_checkpoint, save_checkpoint, target_fingerprint
from ._controllers import Controller, Halving, as_controller
from ._figures import check_stop_rules
from ._files import check_writable
from ._health import Finding, record_findings, score_findings, spread_findings, step_bias_findings
from ._history import History
from ._monitor import Monitor
from ._result import Result
from ._sharding import as_particle_sharding, host_copy, in_particle_mesh, process_path

__all__ = ["DRIVER_REDUCTIONS", "Carry", "evolve", "resolve_controller", "run"]

START_SALT = 0x7FFFFFFF  # the start key is fold_in(key, START_SALT); step t uses fold_in(key, t)
TAPE_SALT = 0x7FFFFFFE  # the taped particles are a random subset drawn with fold_in(key, TAPE_SALT)
MAX_STEPS = TAPE_SALT  # step indices t < MAX_STEPS: an int32, below both salts

#: Stats the driver adds to every step's: the step size used.
DRIVER_REDUCTIONS = {"step_size": "mean"}


class Carry(NamedTuple):
    """What the compiled window carries from step to step."""

    state: Any
    cstate: Any
    flow_time: jax.Array


def _one_step(stepper, controller, target, carry: Carry, key, t):
    h = jnp.asarray(controller.step_size(carry.cstate, t), carry.state.x.dtype)
    new, stats = stepper.advance(target, carry.state, jax.random.fold_in(key, t), h)
    cstate = controller.update(carry.cstate, t, stats)
    stats = {**stats, "step_size": h}
    return Carry(new, cstate, carry.flow_time + h), stats


def window_body(stepper, controller, target, carry, key, t0, n_active, tape_index, length, tape_every=1):
    """``length`` steps from ``carry``; steps ``i >= n_active`` are computed but not kept (a
    select, not a branch: a conditional inside the loop costs a copy of the carry at every
    step, a select fuses into the update), so a final partial window reuses this program.

    The particles ``tape_index`` are recorded after every ``tape_every``-th step (the
    monitor keeps no more than that): a nested loop of ``length / tape_every`` groups of
    ``tape_every`` steps, each group ending with the record."""

    def step(c, i):
        new, stats = _one_step(stepper, controller, target, c, key, t0 + i)
        if length > 1:
            keep = i < n_active
            new = jax.tree_util.tree_map(lambda a, b: jnp.where(keep, a, b), new, c)
        return new, stats

    steps = jnp.arange(length, dtype=jnp.int32)
    if not tape_index.shape[0]:
        carry, stats = jax.lax.scan(step, carry, steps)
        return carry, stats, None

    def group(c, idx):
        c, stats = jax.lax.scan(step, c, idx)
        return c, (stats, c.state.x[tape_index])

    carry, (stats, taped) = jax.lax.scan(group, carry, steps.reshape(length // tape_every, tape_every))
    stats = jax.tree_util.tree_map(lambda a: a.reshape((length, *a.shape[2:])), stats)
    return carry, stats, taped


_window = jax.jit(window_body, static_argnames=("length", "tape_every"))


@jax.jit
def start_carry(stepper, controller, target, x, key):
    """The carry a run starts from: the stepper's start state (key ``fold_in(key, START_SALT)``),
    the controller's, and flow time 0."""
    state = stepper.start(target, x, jax.random.fold_in(key, START_SALT))
    return Carry(state, controller.start(x.dtype), jnp.zeros((), x.dtype))


@jax.jit
def _value_and_score(target, x):
    return target.value_and_score(x)


def check_start(target: Target, x: jax.Array) -> list[Finding]:
    """Refuse a start where log_p or its score is not finite, or where the score is exactly
    zero where the particles differ; return the start's other findings (a constant score), to
    be recorded in the run's history (:mod:`flowpost.engine` (health))."""
    logp, score = _value_and_score(target, x)
    logp, score = np.asarray(logp), np.asarray(score)
    bad_lp = ~np.isfinite(logp)
    bad_sc = ~np.isfinite(score)
    bad = bad_lp | bad_sc.any(axis=1)
    if bad.any():
        coords = target.bound_layout().coordinate_names()
        slots = {c: c.split("[")[0] for c in coords}
        params = sorted({slots[coords[j]] for j in np.nonzero(bad_sc.any(axis=0))[0]})
        what = []
        if bad_lp.any():
            what.append(f"log-density non-finite at {int(bad_lp.sum())}")
        if bad_sc.any():
            what.append(f"score non-finite at {int(bad_sc.any(axis=1).sum())} (parameters: {', '.join(params)})")
        held = nonfinite_data(target.data)  # NaN in the data: the data are at fault, not init
        if held:
            raise ValueError(
                f"data: expected finite values (log_p or its score is non-finite at {int(bad.sum())} of "
                f"{x.shape[0]} starting particles); got NaN or infinite values in {', '.join(held)} "
                "(drop or mask them before building the Target)"
            )
        everywhere = " If log_p is non-finite everywhere, check log_p itself." if bad.all() else ""
        raise ValueError(
            f"init: expected starting particles where log_p and its score are finite; got "
            f"{int(bad.sum())} of {x.shape[0]} particles with non-finite values "
            f"({'; '.join(what)}); first bad particle index {int(np.argmax(bad))}. Start the "
            f"particles where log_p is finite (e.g. near the prior's centre).{everywhere}"
        )
    return score_findings(target, x, logp, score)


def resolve_controller(stepper: Stepper, step_size: Any, on_blowup: str) -> Controller:
    """The run's controller: ``step_size`` (a number or a controller) when given, else the
    stepper's default; wrapped in :class:`Halving` for ``on_blowup="halve"``."""
    controller = stepper.default_controller() if step_size is None else as_controller(step_size)
    if on_blowup == "halve" and not isinstance(controller, Halving):
        controller = Halving(controller)
    return controller


def check_step_contract(stepper, controller: Controller, target: Target, carry: Carry, key) -> dict[str, str]:
    """Trace one step (no compilation) to check the stats against the declarations and the
    controller's needs; returns the window's reductions."""

    def bare_step(carry, key):
        h = jnp.asarray(controller.step_size(carry.cstate, jnp.zeros((), jnp.int32)), carry.state.x.dtype)
        return stepper.advance(target, carry.state, key, h)[1]

    inner = jax.eval_shape(bare_step, carry, key)
    check_stats(stepper, inner)
    missing = [k for k in controller.requires if k not in inner]
    if missing:
        raise TypeError(
            f"step_size: expected a stepper that reports {missing} for {type(controller).__name__}; "
            f"got {type(stepper).__name__}, whose stats are {sorted(inner)}"
        )
    bad = {k: v.shape for k, v in inner.items() if v.shape != ()}
    if bad:
        raise TypeError(f"stepper: expected scalar stats from {type(stepper).__name__}.advance; got shapes {bad}")
    return {**stepper.reductions, **DRIVER_REDUCTIONS}


def check_run_args(steps, window, on_blowup, key, time_budget, checkpoint_every, progress):
    steps = integer("steps", steps, minimum=0, maximum=MAX_STEPS)
    window = integer("window", window, minimum=1, maximum=MAX_STEPS)
    choice("on_blowup", on_blowup, ("stop", "halve"))
    if not isinstance(key, jax.Array):
        raise fail("key", "a JAX PRNG key such as jax.random.key(0)", key, TypeError)
    if time_budget is not None:
        non_negative("time_budget", time_budget)
    integer("checkpoint_every", checkpoint_every, minimum=1)
    if not isinstance(progress, bool):
        raise fail("progress", "True or False", progress, TypeError)
    return steps, window


def _check_key(key: jax.Array, name: str = "key") -> None:
    typed = jnp.issubdtype(key.dtype, jax.dtypes.prng_key)
    if typed and key.shape == ():
        return
    if not typed and key.dtype == jnp.uint32 and key.shape == (2,):
        return
    raise fail(name, "one JAX PRNG key such as jax.random.key(0)", key, TypeError)


def taped_subset(key, n: int, m: int) -> jax.Array:
    """A fixed random subset of ``m`` of the ``n`` particles, drawn from the run's key."""
    if m <= 0:
        return jnp.zeros((0,), jnp.int32)
    return jnp.sort(jax.random.choice(jax.random.fold_in(key, TAPE_SALT), n, (m,), replace=False)).astype(jnp.int32)


def tape_stride(monitor: Monitor, window: int) -> int:
    """Steps between taped records: the monitor's ``tape_every`` when it divides the window
    (windows then start on a multiple of it), else every step."""
    every = monitor.tape_every
    return every if window % every == 0 else 1


class Launched(NamedTuple):
    """A window dispatched to the device (JAX's dispatch is asynchronous) and the monitor's
    figures of its end, not yet fetched; ``source`` is the carry it started from."""

    source: Carry
    carry: Carry
    stats: Any
    taped: Any
    measured: Any


def _launch(stepper, controller, target, carry, key, step, n, tape_index, window, every, monitor) -> Launched:
    t0, n_dev = np.int32(step), np.int32(n)  # numpy scalars: passed to the window without an eager op
    new, stats, taped = _window(
        stepper, controller, target, carry, key, t0, n_dev, tape_index, length=window, tape_every=every
    )
    return Launched(carry, new, stats, taped, monitor.dispatch(target, new.state, step + n))


def identity_of(stepper, controller, target) -> dict:
    """The fingerprints a checkpoint must match."""
    return {
        "stepper": fingerprint(stepper),
        "controller": fingerprint(controller),
        "target": target_fingerprint(target),
    }


@in_particle_mesh  # devices=: the run is traced and run inside the mesh of its devices
def run(
    target: Target | Callable[..., Any],
    stepper: Stepper,
    init: Any,
    *,
    key: jax.Array,
    steps: int = 1000,
    step_size: float | Controller | None = None,
    window: int = 100,
    monitor: Monitor | None = None,
    time_budget: float | None = None,
    progress: bool = True,
    checkpoint: str | os.PathLike | None = None,
    checkpoint_every: int = 10,
    resume: str | os.PathLike | None = None,
    on_blowup: str = "stop",
    devices: Any = None,
) -> Result:
    """Move the ensemble ``init`` towards the target with ``stepper``.

    Parameters
    ----------
    target : Target or callable
        The posterior; a bare callable ``log_p(theta)`` is wrapped in :class:`Target`.
    stepper : Stepper
        A stepper such as ``flowpost.Langevin(step_size=1e-3)``; see
        :mod:`flowpost.steppers.base` for the protocol.
    init : pytree
        Starting particles in the user's (constrained) parametrisation, every leaf with a
        leading particle axis ``N`` (a plain ``(N, d)`` array included).
    key : jax PRNG key
        The run's key; step ``t`` uses ``jax.random.fold_in(key, t)``.
    steps : int
        Step budget (total, counting steps done before a resume).
    step_size : float or Controller, optional
        The step-size controller (:mod:`flowpost.engine` (controllers)): a number means a
        constant step. Default: the stepper's own (``stepper.default_controller()``: a constant
        step at its ``step_size``, or acceptance targeting for ``MALA(tune_steps=...)``).
    window : int
        Steps per compiled window; the monitor reads the ensemble after each.
    monitor : Monitor, optional
        Defaults to :class:`flowpost.Monitor`.
    time_budget : float, optional
        Wall-clock seconds after which the run stops at the end of the current window.
    progress : bool
        Show a tqdm progress bar with the monitor's headline figures.
    checkpoint : path, optional
        Write a checkpoint (``.npz``) every ``checkpoint_every`` windows and at the end.
    resume : path, optional
        Continue from a checkpoint written by a run with the same stepper, controller, target
        and init shape (checked by structural fingerprints); the key stream continues where it
        stopped (the checkpoint's key is used).
    on_blowup : {"stop", "halve"}
        On a blow-up the ensemble is rolled back to the last good window; then the run stops
        with the reason ("stop") or the step is halved and the run goes on ("halve": the
        controller is wrapped in :class:`~flowpost.Halving`, at most 10
        halvings).
    devices : sequence of jax devices or a 1-D jax.sharding.Mesh, optional
        Shard the particle axis of the ensemble and of every per-particle state leaf over
        these devices (``NamedSharding``; data and numbers replicated); ``N`` must be a
        multiple of their number. Independent steppers give the same particles as on one
        device, bit for bit; interacting ones agree to float rounding. With several
        processes (``jax.distributed.initialize`` first, one process per host) checkpoints
        are written per process and the result holds all particles on every process
        (:mod:`flowpost.engine` (sharding)).

    Returns
    -------
    Result
        Particles in the user's pytree, the monitor's history, why the run stopped, and
        ``warnings``: what makes the answer doubtful although the run ended (a stuck or
        collapsed ensemble, every proposal rejected, lost float resolution, a step bias left
        after halving; :mod:`flowpost.engine` (health)), also counted in ``reason``.

    Notes
    -----
    Refused before the first step: a score that is exactly zero where the starting particles
    differ (a rounding or integer cast inside ``log_p``) and a start the stepper cannot leave
    (its ``needs_spread`` declaration: SVGD with coinciding particles, EnsembleLangevin with
    ``N <= d``). ``log_p = +inf`` reached mid-run is a defect of ``log_p``, the same for every
    stepper: the run returns the last good window with status ``"blow-up"`` and a reason naming
    ``log_p``, without halving the step (whatever ``on_blowup`` says).
    """
    target = as_target(target)
    check_stepper(stepper)
    steps, window = check_run_args(steps, window, on_blowup, key, time_budget, checkpoint_every, progress)
    _check_key(key)
    if checkpoint is not None:  # before any work; one file per process of a multi-process run
        checkpoint = check_writable(process_path(check_writable(checkpoint, "checkpoint")), "checkpoint")
    if monitor is not None and not isinstance(monitor, Monitor):
        raise fail("monitor", "a flowpost.Monitor instance (or None for the default)", monitor, TypeError)
    if monitor is not None:
        check_stop_rules(monitor, stepper, {**stepper.reductions, **DRIVER_REDUCTIONS})
    controller = resolve_controller(stepper, step_size, on_blowup)
    bound, x0 = target.bind(init)
    found = check_start(bound, x0) + spread_findings(stepper, bound, x0)
    sharding = as_particle_sharding(devices)  # its mesh is current (@in_particle_mesh)
    if sharding is not None:  # particles over the devices, data and numbers replicated
        sharding.check_count(x0.shape[0])
        bound, x0, key = sharding.place(bound, -1), sharding.place(x0, x0.shape[0]), sharding.place(key, -1)
    monitor = Monitor() if monitor is None else monitor

    carry = start_carry(stepper, controller, bound, x0, key)
    if sharding is not None:
        carry = sharding.place(carry, x0.shape[0])
    reductions = check_step_contract(stepper, controller, bound, carry, key)
    identity = identity_of(stepper, controller, bound)
    step = 0
    history = History()
    if resume is not None:
        carry, step, key, history = load_checkpoint(process_path(resume), carry, identity)
        if sharding is not None:
            carry, key = sharding.place(carry, x0.shape[0]), sharding.place(key, -1)
    else:
        record_findings(history, found, step)
    monitor.open(bound, stepper, carry.state)
    tape_index = taped_subset(key, x0.shape[0], min(monitor.tape_particles, x0.shape[0]))
    every = tape_stride(monitor, window)

    good, good_step, good_len = carry, step, len(history)  # the committed ensemble and its history
    status, reason = "done", f"step budget reached ({steps} steps)"
    events: list[str] = []
    t_start = time.perf_counter()
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=steps, initial=min(step, steps), unit="step", leave=False)
    windows_done = 0
    try:
        ahead: Launched | None = None
        while step < steps:
            n = min(window, steps - step)
            launched = ahead if ahead is not None and ahead.source is carry else None
            if launched is None:
                launched = _launch(stepper, controller, bound, carry, key, step, n, tape_index, window, every, monitor)
            new = launched.carry
            # queue the next window now (assuming this one is kept), so that the device runs it
            # while the host reads this one; dropped unused after a roll-back or a stop
            ahead = None
            if step + n < steps:
                n_next = min(window, steps - step - n)
                ahead = _launch(
                    stepper, controller, bound, new, key, step + n, n_next, tape_index, window, every, monitor
                )
            stats, taped, measured = jax.device_get(host_copy((launched.stats, launched.taped, launched.measured)))
            stats = {k: np.asarray(v)[:n] for k, v in stats.items()}
            taped = None if taped is None else np.asarray(taped)[: n // every]
            elapsed = time.perf_counter() - t_start
            record = monitor.read(
                bound,
                stepper,
                new.state,
                stats,
                taped,
                step + n,
                elapsed,
                flow_time=float(new.flow_time),
                reductions=reductions,
                measured=measured,
                tape_stride=every,
            )
            history.append(record)
            verdict = monitor.judge(history)
            if verdict.action in ("rewind", "fail"):  # "fail": a smaller step is no remedy
                event: dict[str, Any] = {
                    "step": int(step + n),
                    "event": "rollback",
                    "reason": verdict.reason,
                    "back_to": int(good_step),
                }
                carry, step = good, good_step
                smaller = controller.rewind(carry.cstate) if verdict.action == "rewind" else None
                if smaller is not None:
                    carry = carry._replace(cstate=smaller)
                    event["action"] = f"halved the step: {controller.describe(smaller)}"
                    history.append(event)
                    good, good_len = carry, len(history)
                    events.append(f"{verdict.reason}: rolled back to step {good_step}, {event['action']}")
                    monitor.open(bound, stepper, carry.state)
                    continue
                history.append(event)
                status = "blow-up"
                reason = f"{verdict.reason}; returned the last good ensemble (step {good_step})." + (
                    " Try a smaller step_size, on_blowup='halve', or an implicit stepper (ImplicitLangevin, JKO)."
                    if verdict.action == "rewind"
                    else ""
                )
                break
            carry, step = new, step + n
            record_findings(history, verdict.warnings, step)  # the kept window's findings
            good, good_step, good_len = carry, step, len(history)
            windows_done += 1
            if bar is not None:
                bar.update(n)
                bar.set_postfix(monitor.headline(record), refresh=False)
            if checkpoint is not None and windows_done % checkpoint_every == 0:
                save_checkpoint(checkpoint, carry, step, key, history, identity, window)
            if verdict.action == "stop":
                status, reason = "stopped", verdict.reason
                break
            if time_budget is not None and elapsed >= float(time_budget):
                status, reason = "stopped", f"time budget reached ({elapsed:.1f} s of {time_budget} s)"
                break
    except KeyboardInterrupt:
        # back to the last commit: a record of a window read but not committed goes too
        carry, step, history = good, good_step, History(history.records[:good_len])
        status, reason = "interrupted", f"interrupted by the user at step {step}"
    finally:
        if bar is not None:
            bar.close()
    record_findings(history, step_bias_findings(history), step)
    if checkpoint is not None:  # after an interrupt too: the last committed ensemble
        save_checkpoint(checkpoint, carry, step, key, history, identity, window)
    report = {**stepper.report(carry.state), **controller.report(carry.cstate)}
    return Result(
        target=bound,
        state=host_copy(carry.state),  # gathered from every process of a multi-process run
        history=history,
        status=status,
        reason=reason,
        steps=step,
        elapsed=time.perf_counter() - t_start,
        stepper=stepper,
        report=report,
        events=events,
        controller_description=controller.describe(carry.cstate),
    )


def evolve(
    stepper: Stepper, target: Target, x: jax.Array, key: jax.Array, steps: int, controller: Controller | None = None
) -> Any:
    """Start ``stepper`` at the unconstrained ensemble ``x`` on a *bound* target and take
    ``steps`` steps, all inside one traced function: no monitor, no Python between steps.

    The key stream and the step sizes are those of :func:`run` (start:
    ``fold_in(key, START_SALT)``; step ``t``: ``fold_in(key, t)``; ``controller`` defaults to
    the stepper's own), so ``evolve`` and a ``run`` with the same key agree. Being pure, it can
    be ``jit``-ted and ``vmap``-ped, for example over the data of many targets (simulation-based
    calibration does this). Returns the final state.
    """
    check_stepper(stepper)
    steps = integer("steps", steps, minimum=0, maximum=MAX_STEPS)
    prng_key("key", key)
    instance("target", target, Target, "a bound flowpost.Target (target.bind(init) returns one)").bound_layout()
    controller = stepper.default_controller() if controller is None else as_controller(controller, "controller")
    state = stepper.start(target, x, jax.random.fold_in(key, START_SALT))
    carry = Carry(state, controller.start(x.dtype), jnp.zeros((), x.dtype))

    def body(c, t):
        new, _ = _one_step(stepper, controller, target, c, key, t)
        return new, None

    carry, _ = jax.lax.scan(body, carry, jnp.arange(steps, dtype=jnp.int32))
    return carry.state
