"""The run: the driver (compiled windows), the monitor, the history, the result."""

from __future__ import annotations

from ._batch import sweep as sweep
from ._checkpoint import fingerprint as fingerprint
from ._controllers import AcceptanceTarget as AcceptanceTarget
from ._controllers import Constant as Constant
from ._controllers import Controller as Controller
from ._controllers import Halving as Halving
from ._controllers import Schedule as Schedule
from ._controllers import as_controller as as_controller
from ._driver import evolve as evolve
from ._driver import run as run
from ._files import atomic_write as atomic_write
from ._history import History as History
from ._monitor import BareMonitor as BareMonitor
from ._monitor import Monitor as Monitor
from ._monitor import Verdict as Verdict
from ._monitor import summarise_stats as summarise_stats
from ._result import Result as Result
from ._result import load as load

__all__ = [
    "AcceptanceTarget",
    "BareMonitor",
    "Constant",
    "Controller",
    "Halving",
    "History",
    "Monitor",
    "Result",
    "Schedule",
    "Verdict",
    "as_controller",
    "atomic_write",
    "evolve",
    "fingerprint",
    "load",
    "run",
    "summarise_stats",
    "sweep",
]
