"""The figures a run's history records per window, and the check, at the start of a run, that
a stop rule of the default monitor names one of them.

A window's record of the default :class:`~flowpost.Monitor` holds the monitor's own scalar
figures (``step``, ``flow_time``, ``elapsed``, ``mean_logp``, ``n_nonfinite``,
``centre_drift``, ``spread_drift``; ``ksd`` when the discrepancy is on; ``rhat`` and ``ess``
for a stochastic stepper with trails), the stepper's stats reduced over the window (the keys
of its declared ``reductions``) and the driver's ``step_size``. A plateau rule on any other
name would never fire, so it is refused before the first window, with the list of names.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from ._monitor import Monitor

__all__ = ["MONITOR_FIGURES", "check_stop_rules", "recorded_figures"]

#: The default monitor's scalar figures, recorded in every window.
MONITOR_FIGURES = ("step", "flow_time", "elapsed", "mean_logp", "n_nonfinite", "centre_drift", "spread_drift")


def recorded_figures(monitor: Monitor, stepper: Any, stats: Iterable[str]) -> list[str]:
    """The scalar figures the default monitor records per window for ``stepper`` (whose
    window stats, the driver's included, are ``stats``)."""
    names: list[str] = list(MONITOR_FIGURES)
    if monitor.discrepancy:
        names.append("ksd")
    if stepper.stochastic and monitor.trail_particles > 0:
        names += ["rhat", "ess"]
    names += [k for k in stats if k not in names]
    return names


def check_stop_rules(monitor: Any, stepper: Any, stats: Iterable[str]) -> None:
    """Refuse a plateau rule of the default monitor on a figure its records do not hold
    (a monitor with its own ``read`` records its own figures and is not checked)."""
    if not isinstance(monitor, Monitor) or type(monitor).read is not Monitor.read or monitor.plateau is None:
        return
    name = monitor.plateau[0]
    known = recorded_figures(monitor, stepper, stats)
    if name not in known:
        why = ""
        if name == "ksd":
            why = " (the discrepancy is off: Monitor(discrepancy=True))"
        elif name in ("rhat", "ess"):
            why = f" ({type(stepper).__name__} is not stochastic, or trail_particles=0: no chains to read)"
        raise ValueError(
            f"plateau: expected the name of a figure the history records per window, one of "
            f"{', '.join(repr(k) for k in known)}{why}; got {name!r}"
        )
