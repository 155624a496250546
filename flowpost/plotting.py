"""Pictures of a run (needs matplotlib: ``pip install 'flowpost[plot]'``).

:func:`run_figure` draws, on one figure: the monitor's curves over the steps (mean
log-density, kernel Stein discrepancy on a log scale, drift, R-hat when recorded),
marginal histograms of chosen parameters, and a pairwise scatter of two of them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from ._validate import fail

if TYPE_CHECKING:  # pragma: no cover - matplotlib is optional
    from matplotlib.figure import Figure

    from .engine._result import Result

__all__ = ["run_figure"]


def _plt():
    try:
        import matplotlib.pyplot as plt
    except ImportError as err:  # pragma: no cover - depends on the environment
        raise ImportError("plotting needs matplotlib: pip install 'flowpost[plot]'") from err
    return plt


def run_figure(result: Result, params: list[str] | None = None, pair: tuple[str, str] | None = None) -> Figure:
    """Figure of a :class:`~flowpost.Result`: monitor curves, marginals, one pairwise scatter.

    Parameters
    ----------
    result : Result
    params : list of str, optional
        Element names (as in ``result.summary()``, e.g. ``"sigma"``, ``"w[2]"``) whose
        marginal histograms to draw; default the first three.
    pair : (str, str), optional
        Two element names for the scatter; default the first two of ``params``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = _plt()
    names, mat = result.draws()
    if isinstance(params, str) or (params is not None and not isinstance(params, (list, tuple))):
        raise fail("params", "a list of element names (e.g. ['sigma', 'w[2]']) or None", params, TypeError)
    params = list(params) if params is not None else names[:3]
    unknown = [p for p in params if p not in names]
    if unknown:
        raise ValueError(f"params: expected element names of this result, from {names}; got {unknown}")
    if pair is None and len(params) >= 2:
        pair = (params[0], params[1])
    if pair is not None and not (isinstance(pair, (list, tuple)) and len(pair) == 2):
        raise fail("pair", "two element names, e.g. ('a', 'b'), or None", pair, TypeError)
    if pair is not None and any(p not in names for p in pair):
        raise ValueError(f"pair: expected two element names of this result, from {names}; got {tuple(pair)}")

    hist = result.history
    rows = [r for r in hist if "event" not in r]
    curves = [
        (k, lab)
        for k, lab in (
            ("mean_logp", "mean log-density"),
            ("ksd", "kernel Stein discrepancy"),
            ("centre_drift", "drift of the mean per unit time"),
            ("rhat", "R-hat"),
        )
        if any(k in r for r in rows)
    ]
    ncol = max(len(curves), len(params) + (1 if pair else 0), 1)
    fig, axes = plt.subplots(2, ncol, figsize=(3.2 * ncol, 6), squeeze=False)
    steps = np.array([r["step"] for r in rows])
    for ax, (k, lab) in zip(axes[0], curves):
        vals = np.array([r.get(k, np.nan) for r in rows], dtype=float)
        ax.plot(steps, vals, marker=".")
        if k in ("ksd", "centre_drift") and np.all(vals[np.isfinite(vals)] > 0):
            ax.set_yscale("log")
        ax.set_title(lab, fontsize=9)
        ax.set_xlabel("step")
    for ev in (r for r in hist if r.get("event") == "rollback"):
        for ax in axes[0][: len(curves)]:
            ax.axvline(ev["step"], color="red", lw=0.8, ls="--")
    for ax in axes[0][len(curves) :]:
        ax.axis("off")
    col = 0
    for p in params:
        ax = axes[1][col]
        ax.hist(mat[:, names.index(p)], bins=40, density=True, alpha=0.8)
        ax.set_title(f"marginal of {p}", fontsize=9)
        col += 1
    if pair is not None:
        ax = axes[1][col]
        ax.scatter(mat[:, names.index(pair[0])], mat[:, names.index(pair[1])], s=3, alpha=0.4)
        ax.set_xlabel(pair[0])
        ax.set_ylabel(pair[1])
        ax.set_title(f"{pair[0]} against {pair[1]}", fontsize=9)
        col += 1
    for ax in axes[1][col:]:
        ax.axis("off")
    fig.suptitle(f"{result.stepper_description}: {result.steps} steps, status {result.status}", fontsize=10)
    fig.tight_layout()
    return fig
