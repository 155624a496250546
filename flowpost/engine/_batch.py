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
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from .._validate import fail
from ..model._target import Target, as_target
from ..steppers.base import Stepper, check_stepper
from ._controllers import Controller, as_controller
from ._driver import (
    START_SALT,
    Carry,
    check_run_args,
    check_start,
    check_step_contract,
    resolve_controller,
    tape_stride,
    taped_subset,
    window_body,
)
from ._history import History
from ._monitor import Monitor, chain_figures
from ._result import Result

__all__ = ["sweep"]


def batch_body(stepper, controllers, target, carry, keys, t0, n_active, tape_index, length, tape_every=1):
    def one(ctrl, c, k, t, n):
        return window_body(stepper, ctrl, target, c, k, t, n, tape_index, length, tape_every)

    return jax.vmap(one)(controllers, carry, keys, t0, n_active)


_batch_window = jax.jit(batch_body, static_argnames=("length", "tape_every"))


@jax.jit
def _batch_start(stepper, controllers, target, x, keys):
    def one(ctrl, k):
        state = stepper.start(target, x, jax.random.fold_in(k, START_SALT))
        return Carry(state, ctrl.start(x.dtype), jnp.zeros((), x.dtype))

    return jax.vmap(one)(controllers, keys)


def _member(tree, m: int):
    return jax.tree_util.tree_map(lambda a: a[m], tree)


def _members_of(step_size: Any, stepper, on_blowup: str, key: jax.Array) -> tuple[list[Controller], jax.Array]:
    batched_h = isinstance(step_size, (list, tuple)) or (hasattr(step_size, "shape") and np.ndim(step_size) == 1)
    typed = jnp.issubdtype(key.dtype, jax.dtypes.prng_key)
    batched_k = (typed and key.ndim == 1) or (not typed and key.ndim == 2)
    if not typed and key.shape[-1:] != (2,):
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
    controllers, keys = _members_of(step_size, stepper, on_blowup, key)
    m = len(controllers)
    stacked = jax.tree_util.tree_map(lambda *a: jnp.stack([jnp.asarray(v) for v in a]), *controllers)
    bound, x0 = target.bind(init)
    check_start(bound, x0)
    template = Monitor() if monitor is None else monitor
    monitors = [copy.deepcopy(template) for _ in range(m)]

    carry = _batch_start(stepper, stacked, bound, x0, keys)
    reductions = check_step_contract(stepper, controllers[0], bound, _member(carry, 0), keys[0])
    for mon in monitors:
        mon.open(bound, stepper, _member(carry, 0).state)
    tape_index = taped_subset(keys[0], x0.shape[0], min(monitors[0].tape_particles, x0.shape[0]))
    every = tape_stride(monitors[0], window)

    histories = [History() for _ in range(m)]
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
        while (active & (mstep < steps)).any():
            n = np.where(active, np.minimum(window, steps - mstep), 0)
            t0, n_dev = jnp.asarray(mstep, jnp.int32), jnp.asarray(n, jnp.int32)
            new, stats, taped = _batch_window(
                stepper, stacked, bound, carry, keys, t0, n_dev, tape_index, length=window
            )
            stats = jax.device_get(stats)
            taped = None if taped is None else np.asarray(taped)
            elapsed = time.perf_counter() - t_start
            keep = active.copy()
            # the device figures of every member in one compiled call (the members' monitors
            # share their settings: copies of one template)
            measured = template.measure_batch(bound, new.state, mstep + n)
            flow = np.asarray(new.flow_time)
            host_states = jax.device_get(new.state)  # one transfer; members are numpy slices of it
            records = {}
            for i in np.nonzero(n)[0]:
                ni = int(n[i])
                records[i] = monitors[i].read(
                    bound,
                    stepper,
                    _member(host_states, int(i)),
                    {k: np.asarray(v)[i, :ni] for k, v in stats.items()},
                    None if taped is None else taped[i, : ni // every],
                    int(mstep[i]) + ni,
                    elapsed,
                    flow_time=float(flow[i]),
                    reductions=reductions,
                    measured=measured[i],
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
                if verdict.action == "rewind":
                    keep[i] = False
                    back = _member(good, int(i))
                    event: dict[str, Any] = {
                        "step": int(mstep[i]) + ni,
                        "event": "rollback",
                        "reason": verdict.reason,
                        "back_to": int(mstep[i]),
                    }
                    ctrl = _member(stacked, int(i))
                    smaller = ctrl.rewind(back.cstate)
                    if smaller is None:
                        histories[i].append(event)
                        status[i] = "blow-up"
                        reasons[i] = (
                            f"{verdict.reason}; returned the last good ensemble (step {int(mstep[i])}). "
                            "Try a smaller step_size or on_blowup='halve'."
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
                if bar is not None:
                    bar.update(ni)
                if verdict.action == "stop":
                    status[i], reasons[i] = "stopped", verdict.reason
                    active[i] = False
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
