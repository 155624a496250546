r"""Run health: what makes a run's answer wrong without making it fail, found and said.

A run that cannot be right either refuses to start (a clear ``name: expected ...; got ...``
error) or ends with its findings recorded: every finding becomes a ``"warning"`` event in the
history (once per kind, with the number of windows it was seen in), is listed by
:attr:`flowpost.Result.warnings`, shown by ``Result.summary()`` and noted in
``Result.reason``. The findings and their policy:

At the start (:func:`score_findings`, :func:`spread_findings`, from ``check_start`` and ``run``)

- **zero score** (error when the score is exactly 0 in every coordinate at every particle,
  :func:`flowpost.diagnostics.score_flatness`; warning ``"zero-score"`` when it is so in some
  coordinates where the particles differ): a ``jnp.round``, ``jnp.floor``, integer cast or
  comparison inside ``log_p``, or a parameter that ``log_p`` does not read. Every stepper
  moves by the score, so the run would only random-walk (or stand still) there; a single flat
  coordinate may be meant (a flat region with walls), an everywhere-zero score cannot. A start
  with all particles at one point is not judged (any score is then the same at every particle).
- **constant score** (warning ``"constant-score"``): the score is the same non-zero number at
  every particle in a coordinate where they differ: ``log_p`` is linear there over the whole
  ensemble (improper unless bounded; legitimate for a one-sided ``-|x|``).
- **no spread for the stepper** (error): a stepper declaring ``needs_spread = "coordinates"``
  (SVGD, BlobFlow) given particles that coincide in a coordinate, or ``"full_rank"``
  (EnsembleLangevin, JKO, ForwardBackward) given ``N <= d`` particles or deviations of rank
  below ``d``: the step cannot leave the start's point (or affine hull).
- **float resolution** (warning ``"collapsed"``): a coordinate whose starting spread is
  positive but at most ``4 eps |mean|`` (``eps`` the machine epsilon of the ensemble's dtype):
  only a few distinct values are left (at ``1e8`` in float32 the spacing of numbers is 8).

In every window (:func:`window_findings`, from :meth:`flowpost.Monitor.judge`)

- **stuck** (``"stuck"``): a stochastic stepper's particles did not move (the ensemble mean
  and spread are unchanged to the last bit): every proposal rejected, a step below the float
  resolution, or an ensemble the stepper cannot leave (a deterministic flow that stops moving
  has reached its fixed point, which is not a finding);
- **rejecting** (``"rejecting"``): a stepper that reports ``accept`` had a mean acceptance
  probability below 1% over the window (each particle moved about once per 100 steps);
- **collapsed** (``"collapsed"``): with ``N >= 2``, a coordinate whose spread is at most
  ``4 eps |mean|`` (all particles equal there, or only a few float values apart).

At the end (:func:`step_bias_findings`, from ``run``)

- **step bias** (``"step-bias"``): the step was halved after blow-ups (``on_blowup="halve"``)
  and the run went on at ``2^-k`` of a step that blew up. On a Gaussian an explicit Langevin
  step ``h`` blows up only when ``h L > 2`` (``L`` the largest curvature of ``-log pi``), so
  the step kept has ``h L > 2^(1-k)`` and unadjusted Langevin's stationary variance along the
  stiffest direction, ``1 / (L (1 - h L / 2))``, is inflated by more than ``1 / (1 - 2^-k)``
  ("Exponential convergence of Langevin distributions and their discrete approximations",
  1996): a factor 2 after one halving.

``log_p = +inf`` is not a finding but a defect of ``log_p`` (a log-density is finite or
``-inf``): the monitor ends the run on it, the same way for every stepper (see
:meth:`flowpost.Monitor.judge`, verdict ``"fail"``).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any, NamedTuple

import numpy as np

from ._history import History

__all__ = [
    "LOW_ACCEPTANCE",
    "RESOLUTION_ULPS",
    "WARNING_EVENT",
    "Finding",
    "collapsed_coordinates",
    "record_findings",
    "score_findings",
    "spread_findings",
    "step_bias_findings",
    "warnings_of",
    "window_findings",
]

#: The history's event name for a recorded finding.
WARNING_EVENT = "warning"
#: A coordinate counts as collapsed when its spread is at most this many ``eps * |mean|``.
RESOLUTION_ULPS = 4.0
#: Window mean acceptance below which a stepper "rejects" (common practice: MALA is tuned to 0.574).
LOW_ACCEPTANCE = 0.01
_FLOAT64_HINT = (
    "centre the parametrisation (sample the offset from a typical value, e.g. theta - 1e8) or "
    "enable float64 (jax.config.update('jax_enable_x64', True) and a float64 init)"
)


class Finding(NamedTuple):
    """One finding: a short ``kind`` (one record per kind per run) and the message."""

    kind: str
    message: str


def _names(target: Any, k: Iterable[int], limit: int = 6) -> str:
    coords = target.bound_layout().coordinate_names()
    idx = list(k)
    shown = ", ".join(coords[j] for j in idx[:limit])
    return shown + (f" and {len(idx) - limit} more" if len(idx) > limit else "")


def score_findings(target: Any, x: Any, logp: Any, score: Any) -> list[Finding]:
    """The start's score: raises ``ValueError`` (naming ``log_p``) for a score that is exactly
    zero everywhere while the particles differ; returns a ``"zero-score"`` finding for one that
    is so in some coordinates, and a ``"constant-score"`` finding for one that is the same
    non-zero number at every particle in some coordinates (module docstring)."""
    from ..diagnostics import score_flatness  # lazily: Result imports this module for its warnings only

    flat = score_flatness(x, logp, score)
    lo, hi = flat.value_range
    values = f"log_p ranges over [{lo:.6g}, {hi:.6g}] across them" if hi > lo else "log_p is the same at all of them"
    cause = (
        "a jnp.round, jnp.floor, integer cast or comparison inside log_p has zero gradient, and so has "
        "a parameter log_p does not read; every stepper moves by the score"
    )
    if flat.identically_zero:
        raise ValueError(
            f"log_p: expected a score (gradient of log_p) that is not zero everywhere; got a score of "
            f"exactly 0 in every coordinate at all {flat.points} starting particles, which differ in "
            f"{_names(target, flat.zero)} ({values}): {cause}. Write log_p with smooth operations."
        )
    out = []
    if flat.zero:
        out.append(
            Finding(
                "zero-score",
                f"zero score: the score is exactly 0 at all {flat.points} starting particles in "
                f"{_names(target, flat.zero)}, where they differ ({values}): {cause}, so the particles "
                "only random-walk there",
            )
        )
    if flat.constant:
        out.append(
            Finding(
                "constant-score",
                f"constant score: the score is the same non-zero value at all {flat.points} starting "
                f"particles in {_names(target, flat.constant)}, where they differ: log_p is linear there "
                "over the whole ensemble (improper unless bounded; check for a rounding or a cast in log_p)",
            )
        )
    return out


def collapsed_coordinates(centre: Any, spread: Any, eps: float) -> np.ndarray:
    """Indices of the coordinates whose spread is at most ``RESOLUTION_ULPS * eps * |centre|``."""
    c, s = np.abs(np.asarray(centre, dtype=np.float64)), np.asarray(spread, dtype=np.float64)
    return np.nonzero(np.isfinite(s) & (s <= RESOLUTION_ULPS * eps * c))[0]


def _resolution_message(target: Any, k: Sequence[int], centre: Any, spread: Any, dtype_name: str, when: str) -> str:
    j = int(k[0])
    c, s = float(np.asarray(centre)[j]), float(np.asarray(spread)[j])
    gap = float(np.spacing(np.asarray(abs(c), dtype_name)))
    if s == 0.0:
        what = f"all particles are equal there, at {c:.6g}, where the {dtype_name} spacing of numbers is {gap:.3g}"
    else:
        what = (
            f"at {c:.6g} the {dtype_name} spacing of numbers is {gap:.3g} and the spread is {s:.3g}: "
            "one or a few distinct values are left"
        )
    return (
        f"collapsed coordinates {when}: {_names(target, k)} ({what}). Unless the stepper cannot spread "
        f"them, {_FLOAT64_HINT}"
    )


def spread_findings(stepper: Any, target: Any, x: Any) -> list[Finding]:
    """The start's spread: raises ``ValueError`` (naming ``init``) when the stepper's
    ``needs_spread`` declaration is violated; returns a ``"collapsed"`` finding for
    coordinates left with a few float values only (module docstring)."""
    xs = np.asarray(x)
    n, d = xs.shape
    name = type(stepper).__name__
    x64 = xs.astype(np.float64)
    centre = x64.mean(axis=0)
    spread = x64.std(axis=0, ddof=1) if n > 1 else np.zeros(d)
    need = stepper.needs_spread
    if need == "coordinates" and n > 1:
        flat = np.nonzero(np.all(xs == xs[:1], axis=0))[0]
        if flat.size:
            raise ValueError(
                f"init: expected particles that differ in every coordinate for {name} (a deterministic "
                "interacting flow keeps particles that coincide in a coordinate together there); got all "
                f"{n} particles equal in {_names(target, flat)}. Spread the start, e.g. init + 0.1 * noise."
            )
    if need == "full_rank":
        if n <= d:
            raise ValueError(
                f"init: expected more particles than dimensions (N > d) for {name}, which moves the "
                "ensemble with its own covariance (with N <= d it never leaves the affine hull of its "
                f"start); got N={n} particles for d={d} coordinates"
            )
        rank = d
        if n * d * d <= 1e10:  # an SVD of the deviations, tolerance at the ensemble dtype's resolution
            sv = np.linalg.svd(x64 - centre, compute_uv=False)
            rank = int(np.sum(sv > sv.max(initial=0.0) * max(n, d) * float(np.finfo(xs.dtype).eps)))
        if rank < d:
            raise ValueError(
                f"init: expected starting particles whose deviations from their mean span all d={d} "
                f"coordinates for {name}, which moves the ensemble with its own covariance; got deviations "
                f"of rank {rank} (the ensemble would stay in an affine subspace of dimension {rank}). "
                "Spread the start in every direction, e.g. init + 0.1 * noise."
            )
    eps = float(np.finfo(xs.dtype).eps)
    k = [j for j in collapsed_coordinates(centre, spread, eps) if spread[j] > 0]
    if k:
        return [Finding("collapsed", _resolution_message(target, k, centre, spread, xs.dtype.name, "at the start"))]
    return []


def window_findings(
    target: Any,
    previous: tuple[Any, Any] | None,
    record: dict[str, Any],
    *,
    n: int,
    eps: float,
    dtype_name: str,
    stochastic: bool = True,
) -> list[Finding]:
    """A window's findings (module docstring) from its record (``centre``, ``spread``, the
    stepper's stats) and the ensemble mean and spread at the window's start (``previous``)."""
    out: list[Finding] = []
    centre, spread = record.get("centre"), record.get("spread")
    if centre is None or spread is None or record.get("n_nonfinite", 0):
        return out
    step = record["step"]
    accept = record.get("accept")
    unmoved = previous is not None and np.array_equal(previous[0], centre) and np.array_equal(previous[1], spread)
    if stochastic and unmoved:
        why = (
            f"the mean acceptance was {accept:.3g}: every proposal was rejected; use a smaller step_size or tune_steps"
            if accept is not None
            else "a step below the float resolution of the ensemble, or an ensemble the stepper cannot leave"
        )
        out.append(Finding("stuck", f"stuck ensemble: no particle moved in the window ending at step {step} ({why})"))
    elif accept is not None and np.isfinite(accept) and accept < LOW_ACCEPTANCE:
        out.append(
            Finding(
                "rejecting",
                f"almost every proposal rejected: mean acceptance {accept:.3g} < {LOW_ACCEPTANCE:g} in the "
                f"window ending at step {step}; use a smaller step_size or tune_steps",
            )
        )
    if n >= 2:
        k = [int(j) for j in collapsed_coordinates(centre, spread, eps)]
        if k:
            out.append(
                Finding("collapsed", _resolution_message(target, k, centre, spread, dtype_name, f"at step {step}"))
            )
    return out


def step_bias_findings(history: History) -> list[Finding]:
    """A ``"step-bias"`` finding when the run went on after halving its step (module docstring)."""
    halved = [e for e in history.events() if e.get("event") == "rollback" and "action" in e]
    k = len(halved)
    if not k:
        return []
    factor = 1.0 / (1.0 - 2.0**-k)
    return [
        Finding(
            "step-bias",
            f"step bias: the step was halved {k} time(s) after blow-ups and the run went on at 2^-{k} of a "
            f"step that blew up ({halved[-1]['action']}). An explicit step that blows up on a Gaussian has "
            f"h L > 2 (L the largest curvature of -log pi), so the step kept has h L > {2.0 ** (1 - k):.3g}: "
            f"unadjusted Langevin's stationary variance along the stiffest direction is then inflated by more "
            f"than a factor {factor:.3g}. Re-run with a smaller step_size (e.g. 2^-{k + 2} of the first) or MALA.",
        )
    ]


def record_findings(history: History, findings: Iterable[Finding | tuple[str, str]], step: int) -> None:
    """Record findings as ``"warning"`` events: the first of each kind with its message, later
    ones by counting the windows (``"windows"``) and the last step (``"last_step"``)."""
    for kind, message in findings:
        seen = next((e for e in history.events() if e.get("event") == WARNING_EVENT and e.get("kind") == kind), None)
        if seen is None:
            history.append(
                {
                    "step": int(step),
                    "event": WARNING_EVENT,
                    "kind": str(kind),
                    "reason": str(message),
                    "windows": 1,
                    "last_step": int(step),
                }
            )
        else:
            seen["windows"] = int(seen.get("windows", 1)) + 1
            seen["last_step"] = int(step)


def warnings_of(history: History) -> list[str]:
    """The recorded findings in words, in the order they were first seen."""
    out = []
    for e in history.events():
        if e.get("event") != WARNING_EVENT:
            continue
        times = int(e.get("windows", 1))
        seen = f" [seen {times} times, steps {e['step']}..{e.get('last_step', e['step'])}]" if times > 1 else ""
        out.append(f"{e['reason']}{seen}")
    return out
