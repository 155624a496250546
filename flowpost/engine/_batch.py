"""``sweep``: many runs of one stepper as one ``vmap``-ped computation.

A sweep runs ``M`` members that differ in their step-size controller's numbers (a list of
step sizes, or of controllers of one structure) and/or their keys, with the same stepper
structure, target and starting ensemble. Each compiled window is the run's window
``vmap``-ped over the members' carries, controllers and keys: one compilation for the whole
batch, whatever the step sizes. Between windows every member has its own monitor, history,
stop rules and roll-back; a member that stops or blows up without a remedy is frozen (its
later steps are masked) while the others go on. One :class:`~flowpost.engine.Result` per
member comes back, in order.

A single ``key`` is shared by all members (common random numbers: the members then differ
only by their step sizes, which sharpens a comparison between them); give a batch of keys
(``jax.random.split(key, M)``) for independent members.
"""

from __future__ import annotations

import copy
import time
from collections.abc import Callable, Sequence
from functools import partial
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import fail
from ..model._target import Target, as_target
from ..steppers.base import Stepper, check_stepper
from ._controllers import Controller, as_controller
from ._driver import (
    DRIVER_REDUCTIONS,
    START_SALT,
    Carry,
    check_run_args,
    check_start,
    check_step_contract,
    resolve_controller,
    start_carry,
    tape_stride,
    taped_subset,
    window_body,
)
from ._figures import check_stop_rules
from ._health import record_findings, spread_findings, step_bias_findings
from ._history import History
from ._monitor import Monitor, chain_figures
from ._result import Result

__all__ = ["sweep"]


def batch_body(
    stepper,
    controllers,
    target,
    carry,
    keys,
    t0,
    n_active,
    tape_index,
    length,
    tape_every=1,
    shared_key=False,
    aligned=False,
):
    """The run's window ``vmap``-ped over the members' controllers and carries.

    ``shared_key``: ``keys`` is one key for all members (common random numbers), not a batch.
    ``aligned``: ``t0`` and ``n_active`` are one step and one count for all members (every
    member that moves is at the same step; the others' results are discarded by the caller).
    What is shared is not batched: the noise and the loop's step index are then computed once
    per step, not once per member, a program as cheap to compile as one run's window."""

    def one(ctrl, c, k, t, n):
        return window_body(stepper, ctrl, target, c, k, t, n, tape_index, length, tape_every)

    axes = (0, 0, None if shared_key else 0, None if aligned else 0, None if aligned else 0)
    return jax.vmap(one, in_axes=axes)(controllers, carry, keys, t0, n_active)


_batch_window = jax.jit(batch_body, static_argnames=("length", "tape_every", "shared_key", "aligned"))


@jax.jit
def _batch_start(stepper, controllers, target, x, keys):
    def one(ctrl, k):
        state = stepper.start(target, x, jax.random.fold_in(k, START_SALT))
        return Carry(state, ctrl.start(x.dtype), jnp.zeros((), x.dtype))

    return jax.vmap(one)(controllers, keys)


class _Launched(NamedTuple):
    """A batched window dispatched to the device and its members' figures, not yet fetched:
    ``source`` the carry it started from, ``n`` each member's steps in it."""

    source: Carry
    n: np.ndarray
    carry: Carry
    stats: Any
    taped: Any
    measured: Any


def _one_key(key: jax.Array) -> bool:
    """Whether ``key`` is one key (shared by the members), not a batch of keys."""
    typed = jnp.issubdtype(key.dtype, jax.dtypes.prng_key)
    return key.ndim == (0 if typed else 1)


@partial(jax.jit, static_argnames=("dtype",))
def _controller_starts(controllers, dtype):
    return jax.vmap(lambda ctrl: ctrl.start(dtype))(controllers)


def _shared_start(stepper, controller, controllers, target, x, key, m: int) -> Carry:
    """The members' starting carry when they share one key: the stepper's start computed once
    (by the run's own compiled start, so a member starts exactly as ``fp.run`` does) and
    broadcast, each controller's own start state beside it. Cheaper to compile than the
    ``vmap``-ped start over the members, which would compute the same state ``M`` times."""
    one = start_carry(stepper, controller, target, x, key)
    state = jax.tree_util.tree_map(lambda a: jnp.broadcast_to(a, (m, *a.shape)), one.state)
    cstate = _controller_starts(controllers, jnp.dtype(x.dtype))
    return Carry(state, cstate, jnp.zeros((m,), x.dtype))


def _member(tree, m: int):
    return jax.tree_util.tree_map(lambda a: a[m], tree)


def _members_of(step_size: Any, stepper, on_blowup: str, key: jax.Array) -> tuple[list[Controller], jax.Array]:
    batched_h = isinstance(step_size, (list, tuple)) or (hasattr(step_size, "shape") and np.ndim(step_size) == 1)
    typed = jnp.issubdtype(key.dtype, jax.dtypes.prng_key)
    batched_k = (typed and key.ndim == 1) or (not typed and key.ndim == 2)
    if (typed and key.ndim > 1) or (not typed and (key.dtype != jnp.uint32 or key.shape[-1:] != (2,) or key.ndim > 2)):
        raise fail("key", "a JAX PRNG key or a batch of keys (jax.random.split(key, M))", key, TypeError)
    if batched_h:
        items = list(step_size)
        if not items:
            raise fail("step_size", "a non-empty sequence of step sizes or controllers", step_size)
        controllers = [
            resolve_controller(stepper, as_controller(h, f"step_size[{i}]"), on_blowup) for i, h in enumerate(items)
        ]
    else:
        controllers = [resolve_controller(stepper, step_size, on_blowup)]
    m_k = key.shape[0] if batched_k else None
    if m_k == 0:
        raise fail("key", "a non-empty batch of keys (jax.random.split(key, M), M >= 1)", key)
    m = len(controllers)
    if not batched_h and m_k is None:
        raise fail("step_size / key", "a batch: a sequence of step sizes and/or a batch of keys", step_size, TypeError)
    if batched_h and m_k is not None and m_k != m:
        raise fail("key", f"a batch of {m} keys, one per step size", key)
    if not batched_h:
        controllers = controllers * int(m_k)  # type: ignore[arg-type]
        m = int(m_k)  # type: ignore[arg-type]
    keys = key if batched_k else jnp.stack([key] * m)
    structures = {jax.tree_util.tree_structure(c) for c in controllers}
    if len(structures) != 1:
        raise fail("step_size", "controllers of one structure (the same classes and options)", step_size, TypeError)
    return controllers, keys


def sweep(
    target: Target | Callable[..., Any],
    stepper: Stepper,
    init: Any,
    *,
    key: jax.Array,
    steps: int = 1000,
    step_size: Sequence[float | Controller] | float | Controller | None = None,
    window: int = 100,
    monitor: Monitor | None = None,
    progress: bool = False,
    on_blowup: str = "stop",
) -> list[Result]:
    """Run a batch of members (module docstring) as one ``vmap``-ped computation.

    Parameters
    ----------
    target, stepper, init, steps, window, monitor, on_blowup
        As for :func:`flowpost.run` (the monitor is copied for every member).
    key : jax PRNG key or a batch of keys
        One key shared by all members, or ``M`` keys (one per member).
    step_size : sequence of numbers or controllers, or one of them, optional
        ``M`` step sizes (or controllers of one structure), one per member; a single value
        (or ``None``: the stepper's own) when only the keys vary.
    progress : bool
        Show a progress bar over the batch.

    Returns
    -------
    list of Result
        One per member, in order.
    """
    target = as_target(target)
    check_stepper(stepper)
    if not isinstance(key, jax.Array):
        raise fail("key", "a JAX PRNG key or a batch of keys", key, TypeError)
    steps, window = check_run_args(steps, window, on_blowup, jax.random.key(0), None, 1, progress)
    if monitor is not None and not isinstance(monitor, Monitor):
        raise fail("monitor", "a flowpost.Monitor instance (or None for the default)", monitor, TypeError)
    if monitor is not None:
        check_stop_rules(monitor, stepper, {**stepper.reductions, **DRIVER_REDUCTIONS})
    controllers, keys = _members_of(step_size, stepper, on_blowup, key)
    m = len(controllers)
    stacked = jax.tree_util.tree_map(lambda *a: jnp.stack([jnp.asarray(v) for v in a]), *controllers)
    bound, x0 = target.bind(init)
    found = check_start(bound, x0) + spread_findings(stepper, bound, x0)
    template = Monitor() if monitor is None else monitor
    monitors = [copy.deepcopy(template) for _ in range(m)]

    if _one_key(key):  # common random numbers: every member starts from the same state
        carry = _shared_start(stepper, controllers[0], stacked, bound, x0, key, m)
    else:
        carry = _batch_start(stepper, stacked, bound, x0, keys)
    reductions = check_step_contract(stepper, controllers[0], bound, _member(carry, 0), keys[0])
    for mon in monitors:
        mon.open(bound, stepper, _member(carry, 0).state)
    tape_index = taped_subset(keys[0], x0.shape[0], min(monitors[0].tape_particles, x0.shape[0]))
    every = tape_stride(monitors[0], window)

    shared_key = _one_key(key)

    def launch(carry: Carry, mstep: np.ndarray, n: np.ndarray) -> _Launched:
        # the members that move (n > 0) are usually all at one step: then the step and the
        # count are passed once (members with n = 0 are computed too and discarded by the
        # caller's mask); after a roll-back they differ and go per member (a second program)
        moving = np.unique(mstep[n > 0])
        aligned = moving.size == 1
        new, stats, taped = _batch_window(
            stepper,
            stacked,
            bound,
            carry,
            key if shared_key else keys,
            np.int32(moving[0]) if aligned else np.array(mstep, np.int32),  # numpy: no eager op
            np.int32(n[n > 0][0]) if aligned else np.array(n, np.int32),
            tape_index,
            length=window,
            tape_every=every,
            shared_key=shared_key,
            aligned=aligned,
        )
        return _Launched(carry, n, new, stats, taped, template.dispatch_batch(bound, new.state, mstep + n))

    histories = [History() for _ in range(m)]
    for h in histories:
        record_findings(h, found, 0)
    status = ["done"] * m
    reasons = [f"step budget reached ({steps} steps)"] * m
    mstep = np.zeros(m, np.int64)  # steps done by each member (they differ after a roll-back)
    events: list[list[str]] = [[] for _ in range(m)]
    active = np.ones(m, bool)
    good = carry
    t_start = time.perf_counter()
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=steps * m, unit="step", leave=False)
    try:
        ahead: _Launched | None = None
        while (active & (mstep < steps)).any():
            n = np.where(active, np.minimum(window, steps - mstep), 0)
            launched = ahead if ahead is not None and ahead.source is carry and np.array_equal(ahead.n, n) else None
            if launched is None:
                launched = launch(carry, mstep, n)
            new = launched.carry
            # queue the next window now, assuming every member keeps this one and none stops,
            # so that the device runs it while the host reads this one (as fp.run does);
            # dropped unused when a member rolls back or stops
            n_next = np.where(active, np.minimum(window, steps - mstep - n), 0)
            ahead = launch(new, mstep + n, n_next) if n_next.any() else None
            # one transfer: stats, taped trails, the device figures of every member (computed
            # in one vmapped call: the members' monitors share their settings, copies of one
            # template), flow times, states (members are numpy slices of it)
            stats, taped, measured, flow, host_states = jax.device_get(
                (launched.stats, launched.taped, launched.measured, new.flow_time, new.state)
            )
            state_leaves, state_def = jax.tree_util.tree_flatten(host_states)
            elapsed = time.perf_counter() - t_start
            keep = n > 0  # members that did not move keep their carry (in an aligned window they were computed too)
            records = {}
            for i in np.nonzero(n)[0]:
                ni = int(n[i])
                records[i] = monitors[i].read(
                    bound,
                    stepper,
                    jax.tree_util.tree_unflatten(state_def, [leaf[i] for leaf in state_leaves]),
                    {k: np.asarray(v)[i, :ni] for k, v in stats.items()},
                    None if taped is None else taped[i, : ni // every],
                    int(mstep[i]) + ni,
                    elapsed,
                    flow_time=float(flow[i]),
                    reductions=reductions,
                    measured={k: v[i] for k, v in measured.items()},
                    tape_stride=every,
                    defer_chains=True,
                )
            # R-hat and ESS of every member's trails in one computation
            ready = [
                (i, c) for i in records if (c := monitors[i].chains()) is not None and records[i]["n_nonfinite"] == 0
            ]
            for (i, _), figs in zip(ready, chain_figures([c for _, c in ready])):
                records[i].update(figs)
            for i, rec in records.items():
                ni = int(n[i])
                histories[i].append(rec)
                verdict = monitors[i].judge(histories[i])
                if verdict.action in ("rewind", "fail"):  # "fail": a smaller step is no remedy
                    keep[i] = False
                    back = _member(good, int(i))
                    event: dict[str, Any] = {
                        "step": int(mstep[i]) + ni,
                        "event": "rollback",
                        "reason": verdict.reason,
                        "back_to": int(mstep[i]),
                    }
                    ctrl = _member(stacked, int(i))
                    smaller = ctrl.rewind(back.cstate) if verdict.action == "rewind" else None
                    if smaller is None:
                        histories[i].append(event)
                        status[i] = "blow-up"
                        reasons[i] = f"{verdict.reason}; returned the last good ensemble (step {int(mstep[i])})." + (
                            " Try a smaller step_size or on_blowup='halve'." if verdict.action == "rewind" else ""
                        )
                        active[i] = False
                    else:
                        event["action"] = f"halved the step: {ctrl.describe(smaller)}"
                        histories[i].append(event)
                        events[i].append(f"{verdict.reason}: rolled back to step {int(mstep[i])}, {event['action']}")
                        monitors[i].open(bound, stepper, back.state)
                        good = _set_member(good, int(i), back._replace(cstate=smaller))
                    continue
                mstep[i] += ni
                record_findings(histories[i], verdict.warnings, int(mstep[i]))
                if bar is not None:
                    bar.update(ni)
                if verdict.action == "stop":
                    status[i], reasons[i] = "stopped", verdict.reason
                    active[i] = False
            if keep.all():
                carry = new
            else:
                mask = jnp.asarray(keep)
                carry = jax.tree_util.tree_map(
                    lambda a, b, mask=mask: jnp.where(mask.reshape((-1,) + (1,) * (a.ndim - 1)), a, b), new, good
                )
            good = carry
    except KeyboardInterrupt:
        carry = good
        for i in np.nonzero(active & (mstep < steps))[0]:
            status[i], reasons[i] = "interrupted", f"interrupted by the user at step {int(mstep[i])}"
    finally:
        if bar is not None:
            bar.close()
    out = []
    total = time.perf_counter() - t_start
    for i in range(m):
        record_findings(histories[i], step_bias_findings(histories[i]), int(mstep[i]))
        member = _member(carry, i)
        ctrl = _member(stacked, i)
        report = {**stepper.report(member.state), **ctrl.report(member.cstate)}
        out.append(
            Result(
                target=bound,
                state=member.state,
                history=histories[i],
                status=status[i],
                reason=reasons[i],
                steps=int(mstep[i]),
                elapsed=total,
                stepper=stepper,
                report=report,
                events=events[i],
                controller_description=ctrl.describe(member.cstate),
            )
        )
    return out


def _set_member(tree, m: int, value):
    return jax.tree_util.tree_map(lambda a, v: a.at[m].set(v), tree, value)
