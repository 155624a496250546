"""The outcome of a run: particles in the user's pytree and constrained space, the monitor's
history, why the run stopped, a text summary, and save / load.

File format (ours): a NumPy ``.npz`` archive read with ``allow_pickle=False``, holding

- ``meta``: a JSON string with ``{"format": "flowpost-result", "version": 2, ...}``, the
  parameter names, shapes and supports, the status, the stepper's description and report,
  and the history records;
- ``u``: the unconstrained ``(N, d)`` ensemble;
- ``p:<name>``: each parameter's constrained values, shape ``(N, ...)``;
- ``digest``: a SHA-256 over the members (:mod:`flowpost.engine._files`).

Saving writes a unique temporary in the same folder and renames it onto the path, so a kill
mid-write leaves the old file whole. Loading never executes code from the file and checks
it before believing it; a file that is not ours, is damaged, or whose metadata disagrees
with its arrays raises a ``ValueError`` that says so.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable, Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from ..model._labels import ROOT_NAME, element_labels
from ._files import atomic_write, check_writable, read_result_file, write_npz
from ._health import warnings_of
from ._history import History

if TYPE_CHECKING:  # the module itself does not import JAX until a run's result is built
    from matplotlib.figure import Figure

    from ..model._target import Target

__all__ = ["Result", "load"]

RESULT_FORMAT = "flowpost-result"
RESULT_VERSION = 2  # 2: written through a temporary, with a digest member (1 is still read)


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
    warnings : list of str
        What makes the answer doubtful although the run ended normally (a stuck or collapsed
        ensemble, all proposals rejected, lost float resolution, a step bias after halving, a
        constant score): the ``"warning"`` events of the history (:mod:`flowpost.engine`
        (health)). ``reason`` says how many there are and ``summary()`` lists them.
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
        if _loaded is None and self.warnings:
            self.reason = f"{reason}; {len(self.warnings)} warning(s): see Result.warnings"
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
    def warnings(self) -> list[str]:
        """The run's recorded findings in words (the history's ``"warning"`` events)."""
        return warnings_of(self.history)

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
        mat = np.asarray(mat, dtype=np.float64)  # a float32 ensemble summarised in float32 loses digits
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
        lines.extend(f"warning: {w}" for w in self.warnings)
        for k, v in self.report.items():
            lines.append(f"{k}: {v:.5g}" if np.ndim(v) == 0 else f"{k}: {v}")
        return "\n".join(lines)

    def plot(self, params: list[str] | None = None, pair: tuple[str, str] | None = None) -> Figure:
        """Monitor curves, marginal histograms of ``params`` and a scatter of ``pair``;
        returns the matplotlib figure (see :func:`flowpost.plotting.run_figure`)."""
        from ..plotting import run_figure

        return run_figure(self, params=params, pair=pair)

    def __repr__(self):
        warned = f", warnings={len(self.warnings)}" if self.warnings else ""
        params = ", ".join(n + (f" {tuple(s)}" if s else "") for n, s in zip(self._names, self._shapes))
        return (
            f"<flowpost Result: status={self.status!r}, {self.steps} steps, {self.n_particles} particles, "
            f"parameters: {params}; elapsed {self.elapsed:.3g} s{warned}>"
        )

    # ----- afterwards: predictive draws and export (flowpost.engine._predictive, _export) -----
    def predictive(self, fn: Any, key: Any = None, *, block: int = 256) -> Any:
        """``fn`` mapped over the particles (constrained, the user's pytree): ``fn(params, key)``
        with one key per particle split from ``key``, or ``fn(params)`` when ``key`` is None;
        vmapped in blocks of ``block`` particles. Returns ``fn``'s pytree with a leading
        particle axis: posterior predictive draws (see :mod:`flowpost.engine._predictive`)."""
        from ._predictive import predictive_draws

        return predictive_draws(self.particles, fn, key, block=block)

    def to_frame(self):
        """The particles as a ``pandas.DataFrame`` (``export`` extra): one row per particle,
        one column per scalar element, labelled as in :meth:`summary`; values exact."""
        from ._export import particles_frame

        return particles_frame(self._names, self._shapes, self._constrained)

    def to_dataset(self):
        """The particles as an ``xarray.Dataset`` (``export`` extra): one variable per
        parameter, dimensions ``("particle", "<name>_axis0", ...)``; values exact. Write it
        with xarray's ``to_netcdf``."""
        from ._export import particles_dataset

        attrs = {"status": self.status, "reason": self.reason, "steps": self.steps, "elapsed": self.elapsed}
        attrs["stepper"] = self.stepper_description
        return particles_dataset(self._names, self._shapes, self._supports, self._constrained, attrs)

    # ----- persistence -----------------------------------------------------------------------
    def save(self, path: str | os.PathLike) -> None:
        """Write the result to ``path`` (``.npz`` with JSON metadata; see the module docstring)."""
        meta = {
            "format": RESULT_FORMAT,
            "version": RESULT_VERSION,
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
        arrays: dict[str, Any] = {"meta": json.dumps(meta), "u": self.unconstrained}
        arrays.update({f"p:{n}": self._constrained[n] for n in self._names})
        # a unique temporary in the same folder, renamed onto path: a kill mid-write leaves the old file
        atomic_write(check_writable(path, "path"), lambda fh: write_npz(fh, arrays))


def load(path: str | os.PathLike) -> Result:
    """Read a result written by :meth:`Result.save`. Never unpickles, and checks the file
    before believing it (:class:`flowpost.engine._files.Archive`): a file that is not a
    flowpost result, is truncated, or whose metadata disagrees with its arrays or its digest
    raises ``ValueError`` naming the path and what is wrong."""
    meta = read_result_file(path, RESULT_FORMAT, (1, RESULT_VERSION))
    arrays, u = meta["arrays"], meta["u"]
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
