"""The run: the driver (compiled windows), the monitor, the history, the result."""
from __future__ import annotations

from ._history import (
    History as History,
)
from ._monitor import (
    Monitor as Monitor,
    BareMonitor as BareMonitor,
    Verdict as Verdict,
    summarise_stats as summarise_stats,
)
from ._result import (
    Result as Result,
    load as load,
)
from ._driver import (
    run as run,
    evolve as evolve,
)
from ._controllers import (
    Controller as Controller,
    Constant as Constant,
    Halving as Halving,
    AcceptanceTarget as AcceptanceTarget,
    Schedule as Schedule,
    as_controller as as_controller,
)
from ._checkpoint import fingerprint as fingerprint
from ._batch import sweep as sweep

__all__ = ['History', 'Monitor', 'BareMonitor', 'Verdict', 'summarise_stats', 'Result', 'load', 'run', 'evolve', 'Controller', 'Constant', 'Halving', 'AcceptanceTarget',
           'Schedule', 'as_controller', 'fingerprint', 'sweep']
