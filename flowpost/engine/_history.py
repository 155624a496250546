"""The run's history: one record per window, written by the monitor.

A record is a flat dict of numbers and small arrays (for example ``"step"``,
``"mean_logp"``, ``"centre"`` of shape ``(d,)``) plus, for events, strings. :class:`History`
keeps them in order and converts them to plain arrays or a text table.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import numpy as np

__all__ = ["History"]


def _jsonable(value):
    if isinstance(value, (np.ndarray, np.generic)):
        return value.tolist()
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return repr(value)
    return value


class History:
    """Ordered monitor records, one per window (plus event records such as a roll-back)."""

    def __init__(self, records: list[dict[str, Any]] | None = None):
        self.records: list[dict[str, Any]] = list(records or [])

    def append(self, record: dict[str, Any]) -> None:
        self.records.append(dict(record))

    def __len__(self) -> int:
        return len(self.records)

    def __iter__(self) -> Iterator[dict[str, Any]]:
        return iter(self.records)

    def __getitem__(self, i):
        return self.records[i]

    @property
    def last(self) -> dict[str, Any] | None:
        return self.records[-1] if self.records else None

    @property
    def last_record(self) -> dict[str, Any]:
        """The latest window record (event records such as roll-backs are skipped)."""
        for r in reversed(self.records):
            if "event" not in r:
                return r
        raise LookupError("history: expected at least one window record; got none")

    def windows(self) -> list[dict[str, Any]]:
        """The window records, in order, without the events."""
        return [r for r in self.records if "event" not in r]

    def events(self) -> list[dict[str, Any]]:
        """The event records (roll-backs and their remedies), in order."""
        return [r for r in self.records if "event" in r]

    def keys(self) -> list[str]:
        seen: dict[str, None] = {}
        for r in self.records:
            for k in r:
                seen.setdefault(k, None)
        return list(seen)

    def column(self, name: str) -> np.ndarray:
        """Values of one figure over the windows; NaN where a record lacks it.

        Array-valued figures (e.g. ``centre``) come back stacked, shape ``(windows, d)``.
        """
        vals = [r.get(name) for r in self.records]
        present = [v for v in vals if v is not None and not isinstance(v, str)]
        if not present:
            if any(isinstance(v, str) for v in vals):
                return np.array(["" if v is None else v for v in vals])
            raise KeyError(f"name: '{name}' is not a figure of this history; figures are {self.keys()}")
        shape = np.shape(present[0])
        filler = np.full(shape, np.nan)
        return np.stack(
            [np.asarray(v, dtype=float) if v is not None and not isinstance(v, str) else filler for v in vals]
        )

    def as_arrays(self) -> dict[str, np.ndarray]:
        """Every figure as an array over the windows (strings as an array of str)."""
        return {k: self.column(k) for k in self.keys()}

    def scalar_figures(self) -> list[str]:
        """The figures whose every recorded value is a number (no arrays, no strings)."""
        return [
            k
            for k in self.keys()
            if all(np.ndim(r.get(k, 0.0)) == 0 and not isinstance(r.get(k, 0.0), str) for r in self.records)
        ]

    def table(self, names: list[str] | None = None, width: int = 11) -> str:
        """A plain-text table of the scalar figures, one row per window. Each column is at
        least ``width`` characters wide and as wide as its name: names are never cut."""
        if names is None:
            names = self.scalar_figures()
        widths = [max(width, len(n)) for n in names]
        head = " ".join(f"{n:>{w}}" for n, w in zip(names, widths))
        lines = [head, "-" * len(head)]
        for r in self.records:
            cells = []
            for n, w in zip(names, widths):
                v = r.get(n)
                if v is None:
                    cells.append(f"{'':>{w}}")
                elif isinstance(v, (int, np.integer)) or (
                    isinstance(v, float) and float(v).is_integer() and abs(v) < 1e9 and n in ("step", "window")
                ):
                    cells.append(f"{int(v):>{w}d}")
                else:
                    cells.append(f"{float(v):>{w}.4g}")
            lines.append(" ".join(cells))
        return "\n".join(lines)

    def to_frame(self):
        """The records as a ``pandas.DataFrame`` (the ``export`` extra): one row per record,
        windows and events in order, one column per scalar figure (numbers, and strings such
        as an event's name); array-valued figures are left out (see :meth:`column`)."""
        from ._export import history_frame

        return history_frame(self)

    def __repr__(self) -> str:
        wins = self.windows()
        n_events = len(self.records) - len(wins)
        if not wins:
            return f"<flowpost History: 0 windows, {n_events} event(s)>"
        last = wins[-1]
        step = last.get("step")
        steps = f", {int(step)} steps" if isinstance(step, (int, float, np.integer, np.floating)) else ""
        figures = ", ".join(
            f"{k}={float(v):.4g}"
            for k, v in last.items()
            if k != "step" and not isinstance(v, str) and np.ndim(v) == 0 and v is not None
        )
        return f"<flowpost History: {len(wins)} windows{steps}, {n_events} event(s); last window: {figures}>"

    def to_json(self) -> list[dict[str, Any]]:
        return [{k: _jsonable(v) for k, v in r.items()} for r in self.records]

    @classmethod
    def from_json(cls, items: list[dict[str, Any]]) -> History:
        recs = []
        for r in items:
            rec = {}
            for k, v in r.items():
                if isinstance(v, list):
                    rec[k] = np.asarray(v, dtype=float)
                elif isinstance(v, str) and v in ("nan", "inf", "-inf"):
                    rec[k] = float(v)
                else:
                    rec[k] = v
            recs.append(rec)
        return cls(recs)
