"""The outcome of a run: particles in the user's pytree and constrained space, the monitor's
history, why the run stopped, a text summary, and save / load.

File format (ours): a NumPy ``.npz`` archive read with ``allow_pickle=False``, holding

- ``meta``: a JSON string with ``{"format": "flowpost-result", "version": 1, ...}``, the
  parameter names, shapes and supports, the status, the stepper's description and report,
  and the history records;
- ``u``: the unconstrained ``(N, d)`` ensemble;
- ``p:<name>``: each parameter's constrained values, shape ``(N, ...)``.

Loading never executes code from the file; a file that is not ours or is damaged raises a
``ValueError`` that says so.
"""

from __future__ import annotations

import json
import os
import zipfile
from collections.abc import Iterable, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from ..model._labels import ROOT_NAME, element_labels
from ._history import History

if TYPE_CHECKING:  # the module itself does not import JAX until a run's result is built
    from matplotlib.figure import Figure

    from ..model._target import Target

__all__ = ["Result", "load"]

RESULT_FORMAT = "flowpost-result"


def _rebuild(names: list[str], arrays: dict[str, np.ndarray], root_array: bool):
    if root_array:
        return arrays[names[0]]
    out: dict[str, Any] = {}
    for name in names:
        node = out
        parts = name.split(".")
        for p in parts[:-1]:
            node = node.setdefault(p, {})
        node[parts[-1]] = arrays[name]
    return out


class Result:
    """What :func:`flowpost.run` returns.

    Attributes
    ----------
    particles : pytree
        The final ensemble in the user's pytree structure and constrained space, each leaf
        with leading axis N (NumPy arrays).
    unconstrained : numpy.ndarray
        The final ensemble as the stepper saw it, shape ``(N, d)``.
    history : History
        The monitor's records, one per window, plus events (roll-backs).
    status : str
        ``"done"`` (step budget), ``"stopped"`` (a stop rule), ``"blow-up"`` or
        ``"interrupted"``.
    reason : str
        Why the run ended, in words.
    steps : int
        Steps completed (the particles are those after this many steps).
    report : dict
        The stepper's own figures (e.g. a tuned step size).
    """

    def __init__(
        self,
        *,
        target: Target | None = None,
        state: Any = None,
        history: History | None = None,
        status: str = "done",
        reason: str = "",
        steps: int = 0,
        elapsed: float = 0.0,
        stepper: Any = None,
        report: Mapping[str, Any] | None = None,
        events: Iterable[str] | None = None,
        controller_description: str | None = None,
        _loaded: dict[str, Any] | None = None,
    ):
        self.target = target
        self.state = state
        self.history = history if history is not None else History()
        self.status = status
        self.reason = reason
        self.steps = int(steps)
        self.elapsed = float(elapsed)
        self.stepper = stepper
        self.report = {k: (float(v) if np.ndim(v) == 0 else np.asarray(v)) for k, v in (report or {}).items()}
        self.events = list(events or [])
        if _loaded is not None:
            self._names = _loaded["names"]
            self._shapes = _loaded["shapes"]
            self._supports = _loaded["supports"]
            self._root_array = _loaded["root_array"]
            self._constrained = _loaded["arrays"]
            self.unconstrained = _loaded["u"]
            self.stepper_description = _loaded["stepper"]
        else:
            import jax

            if target is None or state is None:
                raise TypeError(
                    "Result: expected the bound target= and final state= of a run (or use "
                    f"flowpost.load for a saved result); got target={target!r}, state={state!r}"
                )
            layout = target.bound_layout()
            self.unconstrained = np.asarray(jax.device_get(state.x))
            tree = jax.device_get(target.constrain(state.x))
            leaves = layout.treedef.flatten_up_to(tree)
            self._names = list(layout.names)
            self._shapes = [list(s.shape) for s in layout.slots]
            self._supports = [s.support.describe() for s in layout.slots]
            self._root_array = layout.treedef.num_leaves == 1 and layout.names == (ROOT_NAME,)
            self._constrained = {n: np.asarray(l) for n, l in zip(self._names, leaves)}
            self.stepper_description = repr(stepper) + (f", {controller_description}" if controller_description else "")

    # ----- views -------------------------------------------------------------------------
    @property
    def particles(self) -> Any:
        """Final particles in the user's pytree (constrained space)."""
        if self.target is not None:
            import jax

            return jax.tree_util.tree_unflatten(
                self.target.bound_layout().treedef, [self._constrained[n] for n in self._names]
            )
        return _rebuild(self._names, self._constrained, self._root_array)

    @property
    def n_particles(self) -> int:
        return int(self.unconstrained.shape[0])

    @property
    def ok(self) -> bool:
        """False after a blow-up or an interrupt."""
        return self.status in ("done", "stopped")

    def draws(self) -> tuple[list[str], np.ndarray]:
        """Element names and the constrained ensemble as an ``(N, k)`` matrix."""
        names, cols = [], []
        n = self.n_particles
        for name, shape in zip(self._names, self._shapes):
            arr = self._constrained[name].reshape(n, -1)
            names.extend(element_labels(name, tuple(shape)))
            cols.append(arr)
        return names, np.concatenate(cols, axis=1)

    def summary(self, level: float = 0.90) -> str:
        """Plain-text table: one row per scalar parameter (each element of vector ones), with
        the ensemble mean, standard deviation and a central ``level`` interval (equal-tailed
        quantiles), followed by how the run ended."""
        names, mat = self.draws()
        lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2
        lo_lab, hi_lab = f"{100 * lo_q:g}%", f"{100 * hi_q:g}%"
        width = max(12, max(len(n) for n in names) + 2)
        head = f"{'parameter':<{width}}{'post. mean':>12}{'post. sd':>12}{lo_lab:>12}{hi_lab:>12}"
        lines = [
            f"flowpost result: {self.n_particles} particles, {self.steps} steps, {self.stepper_description}",
            head,
            "=" * len(head),
        ]
        with np.errstate(all="ignore"):
            mean = np.mean(mat, axis=0)
            sd = np.std(mat, axis=0, ddof=1) if mat.shape[0] > 1 else np.full(mat.shape[1], np.nan)
            lo = np.quantile(mat, lo_q, axis=0)
            hi = np.quantile(mat, hi_q, axis=0)
        for i, n in enumerate(names):
            lines.append(f"{n:<{width}}{mean[i]:>12.5g}{sd[i]:>12.5g}{lo[i]:>12.5g}{hi[i]:>12.5g}")
        lines.append("-" * len(head))
        lines.append(f"status: {self.status} ({self.reason})")
        for k, v in self.report.items():
            lines.append(f"{k}: {v:.5g}" if np.ndim(v) == 0 else f"{k}: {v}")
        return "\n".join(lines)

    def plot(self, params: list[str] | None = None, pair: tuple[str, str] | None = None) -> Figure:
        """Monitor curves, marginal histograms of ``params`` and a scatter of ``pair``;
        returns the matplotlib figure (see :func:`flowpost.plotting.run_figure`)."""
        from ..plotting import run_figure

        return run_figure(self, params=params, pair=pair)

    def __repr__(self):
        return f"<flowpost Result: {self.n_particles} particles, {self.steps} steps, status={self.status!r}>"

    # ----- persistence -----------------------------------------------------------------------
    def save(self, path: str | os.PathLike) -> None:
        """Write the result to ``path`` (``.npz`` with JSON metadata; see the module docstring)."""
        meta = {
            "format": RESULT_FORMAT,
            "version": 1,
            "names": self._names,
            "shapes": self._shapes,
            "supports": self._supports,
            "root_array": bool(self._root_array),
            "status": self.status,
            "reason": self.reason,
            "steps": self.steps,
            "elapsed": self.elapsed,
            "stepper": self.stepper_description,
            "report": {k: (v if np.ndim(v) == 0 else np.asarray(v).tolist()) for k, v in self.report.items()},
            "events": self.events,
            "history": self.history.to_json(),
        }
        # Any: numpy's stub would match the unpacked arrays against savez's allow_pickle: bool
        arrays: dict[str, Any] = {f"p:{n}": self._constrained[n] for n in self._names}
        with open(path, "wb") as fh:
            np.savez(fh, meta=np.array(json.dumps(meta)), u=self.unconstrained, **arrays)


def load(path: str | os.PathLike) -> Result:
    """Read a result written by :meth:`Result.save`. Never unpickles: a file that is not a
    flowpost result, or is truncated, raises ``ValueError``."""
    try:
        with np.load(path, allow_pickle=False) as f:
            if "meta" not in f.files:
                raise ValueError("no flowpost metadata")
            meta = json.loads(str(f["meta"]))
            if not isinstance(meta, dict) or meta.get("format") != RESULT_FORMAT:
                raise ValueError("metadata is not a flowpost result")
            arrays = {n: f[f"p:{n}"] for n in meta["names"]}
            u = f["u"]
    except FileNotFoundError:
        raise
    except (ValueError, KeyError, OSError, EOFError, zipfile.BadZipFile, json.JSONDecodeError) as err:
        raise ValueError(f"path: '{path}' is not a readable flowpost result file ({err})") from err
    loaded = {
        "names": meta["names"],
        "shapes": meta["shapes"],
        "supports": meta["supports"],
        "root_array": meta["root_array"],
        "arrays": arrays,
        "u": u,
        "stepper": meta["stepper"],
    }
    return Result(
        history=History.from_json(meta["history"]),
        status=meta["status"],
        reason=meta["reason"],
        steps=meta["steps"],
        elapsed=meta["elapsed"],
        report=meta["report"],
        events=meta["events"],
        _loaded=loaded,
    )
