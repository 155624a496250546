"""The run: the driver (compiled windows), the monitor, the history, the result."""
from __future__ import annotations

from ._batch import sweep as sweep
from ._checkpoint import fingerprint as fingerprint
from ._controllers import (
    AcceptanceTarget as AcceptanceTarget,
    Constant as Constant,
    Controller as Controller,
    Halving as Halving,
    Schedule as Schedule,
    as_controller as as_controller,
)
from ._driver import (
    evolve as evolve,
    run as run,
)
from ._history import (
    History as History,
)
from ._monitor import (
    BareMonitor as BareMonitor,
    Monitor as Monitor,
    Verdict as Verdict,
    summarise_stats as summarise_stats,
)
from ._result import (
    Result as Result,
    load as load,
)

__all__ = [
    'AcceptanceTarget',
    'BareMonitor',
    'Constant',
    'Controller',
    'Halving',
    'History',
    'Monitor',
    'Result',
    'Schedule',
    'Verdict',
    'as_controller',
    'evolve',
    'fingerprint',
    'load',
    'run',
    'summarise_stats',
    'sweep',
]
