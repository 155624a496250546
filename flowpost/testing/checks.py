"""Checks of a user's log-density: score against finite differences, and health checks.

A log-density here is a callable ``log_p(theta)`` or ``log_p(theta, data)`` where
``theta`` is a pytree (a dict of scalars/arrays, or a plain array) and the return value is a
scalar. Every function below takes such a callable plus, optionally, ``data=`` (passed as
the second positional argument when it is not ``None``). Nothing here needs the rest of
flowpost.

Score check
-----------
:func:`score_agreement` compares the autodiff gradient ``g_ad = grad log_p(theta)`` with a
central finite difference ``g_fd``, in float64 (enabled locally with
``jax.enable_x64(True)``; the points and the floating data are cast to float64 inside).
For coordinate ``i`` with value ``x_i`` the step is

    h_i = step * max(1, |x_i|),          step = 1e-5 by default,

and the central difference ``D(h) = (f(x + h e_i) - f(x - h e_i)) / (2 h)`` (with ``2h``
replaced by the exactly representable ``(x_i + h) - (x_i - h)``) is refined by one
Richardson extrapolation,

    g_fd_i = (4 D(h_i / 2) - D(h_i)) / 3,

which cancels the ``O(h^2)`` truncation term and leaves ``O(h^4)``; the round-off part is
about ``eps_64 |f| / h``. The error of coordinate ``i`` is

    err_i = |g_ad_i - g_fd_i| / max(atol, |g_fd_i|, |g_ad_i|),

with ``atol`` defaulting, per point, to ``1e-6 * max(1, |log_p(x)|)`` (a floor above the
finite-difference round-off level, so that coordinates whose gradient is zero at the point do
not give spurious large ratios). A non-finite ``g_ad_i`` or ``g_fd_i`` counts as ``err = inf``
(for instance when the step leaves the support of ``log_p``: use points farther than ``h``
from the boundary, or check the density in unconstrained coordinates).

Health checks
-------------
``assert_scalar_output``, ``assert_finite_on_region``, ``assert_jit_matches_eager``,
``assert_vmap_matches_loop``, ``assert_deterministic`` and ``assert_exchangeable_rows`` each
raise ``AssertionError`` with a message saying what went wrong; :func:`check_health` runs all
of them and returns a :class:`HealthReport`. Two values ``a, b`` are said to agree when

    |a - b| <= rtol * max(1, |a|, |b|),     rtol = sqrt(machine eps of the output dtype)

unless ``rtol`` is given (``sqrt(eps)`` is about 3.5e-4 in float32 and 1.5e-8 in float64:
enough for re-ordered floating-point sums, far below any real discrepancy).

Where to check
--------------
The points of a check come from one value, a :class:`~flowpost.testing.Region`: either
``Region.drawn(sampler)``, points ``sampler(k_j)`` for keys split from the region's key, or
``Region.near(around, scale)``, Gaussian perturbations ``around + scale * z`` (``z``
standard normal, one per element, drawn with a numpy generator seeded by the bits of the
key) of a given pytree. The key defaults to ``jax.random.key(0)``; the number of points, when
the region leaves it unset, is the check's own default (16 for the score check and
:func:`check_health`, 32 for :func:`assert_finite_on_region`, 8 for
:func:`assert_vmap_matches_loop`). Every check that takes ``region=`` also takes the
region's fields as loose keywords, ``around=, sampler=, scale=, num_points=, key=`` (a
shortcut for the same region; giving both is an error):

    score_agreement(log_p, Region.near(point, scale=0.3, num_points=5))
    score_agreement(log_p, around=point, scale=0.3, num_points=5)       # the same points
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.flatten_util import ravel_pytree

from .._validate import boolean, callable_value, fail, integer, non_negative, positive
from ..model._labels import element_label, path_label
from ..model._user_code import check_arity, check_data, explain_call_error
from .region import Region, default_key

if TYPE_CHECKING:  # pragma: no cover - hypothesis is a test dependency
    from hypothesis.strategies import SearchStrategy

__all__ = [
    "HealthReport",
    "ScoreAgreement",
    "assert_deterministic",
    "assert_exchangeable_rows",
    "assert_finite_on_region",
    "assert_jit_matches_eager",
    "assert_scalar_output",
    "assert_score_matches",
    "assert_vmap_matches_loop",
    "check_health",
    "points_near",
    "score_agreement",
]

LogDensity = Callable[..., Any]


# ----------------------------------------------------------------------------- helpers
def _call(log_p: LogDensity, theta, data):
    return log_p(theta) if data is None else log_p(theta, data)


@dataclass(frozen=True)
class _Coordinate:
    label: str  # "w[2]" or "sigma"
    leaf: str  # "w"
    index: tuple[int, ...]  # multi-index within the leaf
    flat_index: int  # index within the flattened leaf


def coordinates(tree, *, leading: int = 0) -> list[_Coordinate]:
    """One entry per scalar of ``tree`` in ``ravel_pytree`` order (leaves in
    ``tree_flatten`` order, each raveled in C order). ``leading`` axes are skipped."""
    out = []
    for path, leaf in jax.tree_util.tree_flatten_with_path(tree)[0]:
        name = path_label(path)
        shape = tuple(np.shape(leaf))[leading:]
        for flat, idx in enumerate(np.ndindex(*shape)):
            out.append(_Coordinate(element_label(name, idx), name, tuple(idx), flat))
    return out


def _stack(points: list):
    return jax.tree_util.tree_map(lambda *xs: np.stack([np.asarray(x) for x in xs]), *points)


def _to_numpy(tree):
    return jax.tree_util.tree_map(lambda x: np.asarray(x), tree)


def _first_line(exc: BaseException) -> str:
    text = str(exc)
    return text.splitlines()[0] if text else ""


def _default_rtol(value) -> float:
    dtype = np.asarray(value).dtype
    if not np.issubdtype(dtype, np.floating):
        dtype = np.dtype(np.float32)
    return float(np.sqrt(np.finfo(dtype).eps))


def _agree(a, b, rtol: float) -> bool:
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    same_nonfinite = (~np.isfinite(a)) & (~np.isfinite(b)) & ((np.isnan(a) & np.isnan(b)) | (a == b))
    with np.errstate(invalid="ignore"):
        close = np.abs(a - b) <= rtol * np.maximum(1.0, np.maximum(np.abs(a), np.abs(b)))
    return bool(np.all(close | same_nonfinite))


def _short(tree, digits: int = 6) -> str:
    """Compact text of a (small) pytree of arrays for messages."""
    with np.printoptions(precision=digits, threshold=20, linewidth=200):
        leaves = jax.tree_util.tree_flatten_with_path(tree)[0]
        if len(leaves) == 1 and leaves[0][0] == ():
            return np.array2string(np.asarray(leaves[0][1]))
        parts = [f"{path_label(p)}={np.array2string(np.asarray(v))}" for p, v in leaves]
    return "{" + ", ".join(parts) + "}"


def _cast64_theta(tree):
    """Every leaf of theta as a float64 array (call inside ``jax.enable_x64(True)``)."""

    def cast(x):
        arr = np.asarray(x)
        if arr.dtype == bool or np.issubdtype(arr.dtype, np.complexfloating):
            raise TypeError(f"theta: expected real floating leaves; got dtype {arr.dtype}")
        return jnp.asarray(arr, dtype=jnp.float64)

    return jax.tree_util.tree_map(cast, tree)


def _cast64_data(tree):
    """Floating leaves of data as float64 arrays; other leaves unchanged."""

    def cast(x):
        if isinstance(x, float) or (hasattr(x, "dtype") and np.issubdtype(np.dtype(x.dtype), np.floating)):
            return jnp.asarray(x, dtype=jnp.float64)
        return x

    return None if tree is None else jax.tree_util.tree_map(cast, tree)


# ----------------------------------------------------------------------------- score check
@dataclass(frozen=True)
class ScoreAgreement:
    """Outcome of :func:`score_agreement`.

    Attributes
    ----------
    worst_error : float
        Largest ``|g_ad - g_fd| / max(atol, |g_fd|, |g_ad|)`` over all points and
        coordinates (``inf`` where either gradient was not finite).
    parameter : str
        Label of the worst coordinate, pytree path plus index, e.g. ``"w[2]"``.
    leaf : str
        Pytree path of the leaf holding it, e.g. ``"w"``.
    index : tuple of int
        Index of the coordinate within the leaf (``()`` for a scalar leaf).
    flat_index : int
        Index within the leaf raveled in C order.
    point : pytree of numpy float64 arrays
        The point where the worst error occurred.
    autodiff, finite_difference : float
        The two gradient values of the worst coordinate at that point.
    point_errors : numpy array, shape (num_points,)
        Worst error at each point.
    coordinate_errors : dict
        Worst error of each coordinate label over all points.
    step : float
        The relative finite-difference step used.
    flatness : str
        Empty, or what is wrong with a score that is identically zero, or the same non-zero
        vector, at every point while the points differ (finite differences agree with it, so
        the error above cannot see it: a ``jnp.round`` or integer cast inside ``log_p``;
        :func:`flowpost.diagnostics.score_flatness`). :func:`assert_score_matches` fails on
        it. (One flat coordinate alone is not flagged: it can be a redundant coordinate.)
    """

    worst_error: float
    parameter: str
    leaf: str
    index: tuple
    flat_index: int
    point: Any
    autodiff: float
    finite_difference: float
    point_errors: np.ndarray
    coordinate_errors: dict
    step: float
    flatness: str = ""

    @property
    def num_points(self) -> int:
        return int(self.point_errors.shape[0])

    def summary(self) -> str:
        return (
            f"worst relative score error {self.worst_error:.3g} in parameter "
            f"'{self.parameter}' (leaf '{self.leaf}', index {self.flat_index} of the raveled "
            f"leaf): autodiff {self.autodiff:.10g} vs finite difference "
            f"{self.finite_difference:.10g}, at point {_short(self.point)} "
            f"({self.num_points} points, step {self.step:g})"
        )

    def __str__(self) -> str:  # pragma: no cover - convenience
        return self.summary()


def _score_evaluator(log_p, data64, unravel, dim: int, step: float, compiled: bool):
    """Function x (d,) float64 -> (value, g_ad (d,), g_fd (d,))."""

    def f(x):
        return _call(log_p, unravel(x), data64)

    def central(x, i, h):
        xp = x.at[i].add(h)
        xm = x.at[i].add(-h)
        return (f(xp) - f(xm)) / (xp[i] - xm[i])

    if compiled:

        def evaluate(x):
            value, g = jax.value_and_grad(f)(x)
            h = step * jnp.maximum(1.0, jnp.abs(x))

            def one(i):
                return central(x, i, h[i]), central(x, i, 0.5 * h[i])

            big, small = jax.lax.map(one, jnp.arange(dim), batch_size=min(dim, 32))
            return value, g, (4.0 * small - big) / 3.0

        return jax.jit(evaluate)

    def evaluate_eager(x):
        value, g = jax.value_and_grad(f)(x)
        h = step * np.maximum(1.0, np.abs(np.asarray(x)))
        fd = []
        for i in range(dim):
            big, small = central(x, i, h[i]), central(x, i, 0.5 * h[i])
            fd.append((4.0 * small - big) / 3.0)
        return value, g, jnp.stack(fd)

    return evaluate_eager


def score_agreement(
    log_p: LogDensity,
    region: Region | None = None,
    *,
    data: Any = None,
    step: float = 1e-5,
    atol: float | None = None,
    compiled: bool = True,
    **where: Any,
) -> ScoreAgreement:
    """Compare the autodiff score of ``log_p`` with finite differences at many points.

    At each point ``x`` (float64) and each coordinate ``i``,
    ``g_ad_i = d log_p / d x_i`` by ``jax.grad`` and ``g_fd_i = (4 D(h_i/2) - D(h_i)) / 3``
    with ``D(h)`` the central difference and ``h_i = step * max(1, |x_i|)``; the error is
    ``|g_ad_i - g_fd_i| / max(atol, |g_fd_i|, |g_ad_i|)``. See the module docstring.

    Parameters
    ----------
    log_p : callable
        ``log_p(theta)`` or ``log_p(theta, data)`` returning a scalar.
    region : Region, optional
        Where to check: ``Region.near(point, scale)`` or ``Region.drawn(sampler)``
        (16 points unless the region sets ``num_points``).
    **where
        Instead of ``region``, its fields as keywords: ``around=`` or ``sampler=``, and
        ``scale=``, ``num_points=``, ``key=`` (see :meth:`Region.from_keywords`).
    data : pytree, optional
        Passed as the second positional argument when given; its floating leaves are cast
        to float64.
    step : float
        Relative finite-difference step (``h_i = step * max(1, |x_i|)``).
    atol : float, optional
        Floor of the error denominator; default ``1e-6 * max(1, |log_p(x)|)`` per point.
    compiled : bool
        Evaluate with ``jax.jit`` and batched (``lax.map``) differences (default); ``False``
        evaluates eagerly one coordinate at a time, for log-densities that cannot be
        compiled or batched.

    Returns
    -------
    ScoreAgreement
    """
    callable_value("log_p", log_p)
    check_arity("log_p", log_p, data is not None)
    check_data(data)
    region = Region.from_keywords(where, region=region, caller="score_agreement")
    step = positive("step", step)
    atol = None if atol is None else positive("atol", atol)
    compiled = boolean("compiled", compiled)
    points = [_to_numpy(p) for p in region.points(16)]

    with jax.enable_x64(True):
        first = _cast64_theta(points[0])
        flat0, unravel = ravel_pytree(first)
        dim = int(flat0.shape[0])
        if dim == 0:
            raise fail("theta", "points with at least one coordinate", points[0])
        coords = coordinates(first)
        data64 = _cast64_data(data)
        try:
            out0 = jax.eval_shape(lambda t: _call(log_p, t, data64), first)
        except Exception as err:  # the user's log_p failed: say so, naming the argument at fault
            shapes = jax.tree_util.tree_map(np.shape, first)
            raise explain_call_error("log_p", err, shapes, data, "region", "the region's first point") from err
        if np.shape(out0) != ():
            raise ValueError(f"log_p: expected a scalar return value (shape ()); got shape {np.shape(out0)}")
        evaluate = _score_evaluator(log_p, data64, unravel, dim, float(step), compiled)
        all_err, all_ad, all_fd = [], [], []
        values = []
        flat_points = []
        for p in points:
            x, _ = ravel_pytree(_cast64_theta(p))
            flat_points.append(np.asarray(x, dtype=np.float64))
            if x.shape != flat0.shape:
                raise ValueError(
                    f"sampler: expected points of one structure and shape ({dim} coordinates, "
                    f"as the first); got {x.shape[0]} coordinates"
                )
            value, g_ad, g_fd = (np.asarray(v, dtype=np.float64) for v in evaluate(x))
            values.append(float(value))
            floor = (
                (1e-6 * max(1.0, abs(float(value))) if np.isfinite(value) else 1e-6) if atol is None else float(atol)
            )
            with np.errstate(invalid="ignore", divide="ignore"):
                denom = np.maximum(floor, np.maximum(np.abs(g_fd), np.abs(g_ad)))
                err = np.abs(g_ad - g_fd) / denom
            err = np.where(np.isfinite(g_ad) & np.isfinite(g_fd) & np.isfinite(err), err, np.inf)
            all_err.append(err)
            all_ad.append(g_ad)
            all_fd.append(g_fd)

    _score_needs_finite(values, points)
    flatness = _flatness_message(flat_points, values, all_ad, coords)
    errors = np.stack(all_err)  # (num_points, dim)
    flat_worst = int(np.argmax(errors))
    p_idx, c_idx = divmod(flat_worst, dim)
    c = coords[c_idx]
    per_coord = errors.max(axis=0)
    return ScoreAgreement(
        worst_error=float(errors[p_idx, c_idx]),
        parameter=c.label,
        leaf=c.leaf,
        index=c.index,
        flat_index=c.flat_index,
        point=jax.tree_util.tree_map(lambda v: np.asarray(v, dtype=np.float64), points[p_idx]),
        autodiff=float(all_ad[p_idx][c_idx]),
        finite_difference=float(all_fd[p_idx][c_idx]),
        point_errors=errors.max(axis=1),
        coordinate_errors={co.label: float(e) for co, e in zip(coords, per_coord)},
        step=float(step),
        flatness=flatness,
    )


def _flatness_message(points: list, values: list, scores: list, coords: list) -> str:
    """What :func:`flowpost.diagnostics.score_flatness` finds, in words ("" for nothing)."""
    from ..diagnostics import score_flatness

    if len(points) < 2 or any(p.shape != points[0].shape for p in points):
        return ""
    flat = score_flatness(np.stack(points), np.asarray(values), np.stack(scores))

    def labels(idx):
        return ", ".join(coords[k].label for k in idx[:6]) + (f" and {len(idx) - 6} more" if len(idx) > 6 else "")

    lo, hi = flat.value_range
    if flat.identically_zero:
        return (
            f"the autodiff score is exactly 0 in every coordinate at all {flat.points} points, which differ "
            f"in {labels(flat.zero)} (log_p ranges over [{lo:.6g}, {hi:.6g}]): a jnp.round, jnp.floor, integer cast "
            "or comparison inside log_p has zero gradient (so have finite differences across its flat "
            "pieces), and so has a parameter log_p does not read"
        )
    if flat.identically_constant:
        return (
            f"the autodiff score is the same non-zero vector at all {flat.points} points, which differ "
            f"in {labels(flat.constant)}: log_p is linear across the region "
            "(improper unless bounded; check for a rounding or a cast inside log_p)"
        )
    return ""


def _score_needs_finite(values: list[float], points: list) -> None:
    """A score is compared only where ``log_p`` is finite: say so, not "score mismatch"."""
    v = np.asarray(values)
    bad = ~np.isfinite(v)
    if bad.any():
        i = int(np.argmax(bad))
        kinds = ", ".join(
            f"{name} at {int(n)}"
            for name, n in (("NaN", np.isnan(v).sum()), ("+inf", (v == np.inf).sum()), ("-inf", (v == -np.inf).sum()))
            if n
        )
        raise AssertionError(
            f"log_p: expected a finite value at every point of the region (the score is compared with "
            f"finite differences only where log_p is finite); got non-finite log_p at {int(bad.sum())} of "
            f"{len(v)} points ({kinds}); first: point #{i} {_short(points[i])} gives {v[i]}"
        )


def assert_score_matches(
    log_p: LogDensity,
    region: Region | None = None,
    *,
    tolerance: float = 1e-4,
    data: Any = None,
    step: float = 1e-5,
    atol: float | None = None,
    compiled: bool = True,
    **where: Any,
) -> ScoreAgreement:
    """Raise ``AssertionError`` when the score of ``log_p`` disagrees with finite differences.

    Runs :func:`score_agreement` (same arguments; ``region`` or the keywords ``around=`` /
    ``sampler=``, ``scale=``, ``num_points=`` (default 16), ``key=``) and fails when its
    worst relative error exceeds ``tolerance``. With the default step and Richardson
    refinement a correct gradient typically gives errors near 1e-9; a wrong factor of 2
    gives 0.5 and a dropped term gives errors of order 1.

    Returns
    -------
    ScoreAgreement
        When the check passes.
    """
    region = Region.from_keywords(where, region=region, caller="assert_score_matches")
    tolerance = positive("tolerance", tolerance)
    report = score_agreement(log_p, region, data=data, step=step, atol=atol, compiled=compiled)
    if report.flatness:
        raise AssertionError(f"log_p: expected a score that varies over the region; got {report.flatness}")
    if not report.worst_error <= tolerance:
        raise AssertionError(
            f"score of log_p disagrees with finite differences: parameter "
            f"'{report.parameter}' (index {report.flat_index} of leaf '{report.leaf}') has "
            f"relative error {report.worst_error:.3g} > tolerance {tolerance:g}; autodiff "
            f"{report.autodiff:.10g} vs finite difference {report.finite_difference:.10g} "
            f"at point {_short(report.point)}"
        )
    return report


# ----------------------------------------------------------------------------- health checks
def assert_scalar_output(log_p: LogDensity, point: Any, *, data: Any = None) -> None:
    """Raise ``AssertionError`` unless ``log_p(point)`` is a real floating scalar (shape ())."""
    out = _call(log_p, point, data)
    shape = np.shape(out)
    if shape != ():
        raise AssertionError(
            f"log_p must return a scalar (shape ()); it returned shape {shape}. "
            "Sum the log-likelihood terms (e.g. jnp.sum(...)) before returning."
        )
    dtype = np.asarray(out).dtype
    if not np.issubdtype(dtype, np.floating):
        raise AssertionError(f"log_p must return a real floating value; it returned dtype {dtype}")


def assert_finite_on_region(
    log_p: LogDensity,
    region: Region | None = None,
    *,
    data: Any = None,
    **where: Any,
) -> None:
    """Raise ``AssertionError`` if ``log_p`` is NaN or infinite at a point of the region.

    The region is ``region`` (``Region.near(point, scale)`` or ``Region.drawn(sampler)``) or
    the same given as keywords ``around=`` / ``sampler=``, ``scale=``, ``num_points=``,
    ``key=`` (see the module docstring); 32 points unless it sets ``num_points``. Each point
    is evaluated eagerly, so a failure here is not a compilation artefact. ``-inf`` counts as
    a failure too: the region should lie inside the support.
    """
    region = Region.from_keywords(where, region=region, caller="assert_finite_on_region")
    _finite_at(log_p, region.points(32), data)


def _finite_at(log_p, points: list, data) -> None:
    bad = []
    for i, p in enumerate(points):
        v = np.asarray(_call(log_p, p, data))
        if not np.all(np.isfinite(v)):
            bad.append((i, v, p))
    if bad:
        i, v, p = bad[0]
        raise AssertionError(
            f"log_p is not finite at {len(bad)} of {len(points)} points of the region; "
            f"first: point #{i} {_short(p)} gives {v}"
        )


def assert_jit_matches_eager(log_p: LogDensity, point: Any, *, data: Any = None, rtol: float | None = None) -> None:
    """Raise ``AssertionError`` if ``jax.jit(log_p)`` fails or differs from the eager value.

    Agreement: ``|jit - eager| <= rtol * max(1, |jit|, |eager|)``, ``rtol`` defaulting to
    ``sqrt(eps)`` of the output dtype.
    """
    eager = _call(log_p, point, data)
    try:
        if data is None:
            compiled = jax.jit(log_p)(point)
        else:
            compiled = jax.jit(log_p)(point, data)
    except Exception as exc:
        raise AssertionError(f"log_p fails under jax.jit: {type(exc).__name__}: {_first_line(exc)}") from exc
    tol = _default_rtol(eager) if rtol is None else positive("rtol", rtol)
    if np.shape(compiled) != np.shape(eager) or not _agree(compiled, eager, tol):
        raise AssertionError(
            f"log_p gives different values under jax.jit ({np.asarray(compiled)}) and eagerly "
            f"({np.asarray(eager)}) at point {_short(point)} (rtol {tol:.2g})"
        )


def assert_vmap_matches_loop(
    log_p: LogDensity,
    region: Region | None = None,
    *,
    data: Any = None,
    rtol: float | None = None,
    **where: Any,
) -> None:
    """Raise ``AssertionError`` if ``jax.vmap(log_p)`` over a batch of points fails, has the
    wrong shape, or differs from evaluating the points one at a time.

    The batch is the points of the region (``region``, or the keywords ``around=`` /
    ``sampler=``, ``scale=``, ``num_points=``, ``key=``; 8 points unless it sets
    ``num_points``) stacked on a new leading axis; ``data`` is shared
    (``in_axes=(0, None)``). Agreement: ``|batched - single| <= rtol * max(1, |batched|,
    |single|)``, ``rtol`` defaulting to ``sqrt(eps)`` of the output dtype.
    """
    region = Region.from_keywords(where, region=region, caller="assert_vmap_matches_loop")
    rtol = None if rtol is None else positive("rtol", rtol)
    _vmap_at(log_p, region.points(8), data, rtol)


def _vmap_at(log_p, points: list, data, rtol) -> None:
    batch = _stack(points)
    singles = np.stack([np.asarray(_call(log_p, p, data)) for p in points])
    try:
        if data is None:
            batched = jax.vmap(log_p)(batch)
        else:
            batched = jax.vmap(log_p, in_axes=(0, None))(batch, data)
    except Exception as exc:
        raise AssertionError(
            f"log_p fails under jax.vmap over a batch of {len(points)} points: {type(exc).__name__}: {_first_line(exc)}"
        ) from exc
    batched = np.asarray(batched)
    if batched.shape != (len(points),):
        raise AssertionError(
            f"jax.vmap(log_p) over {len(points)} points returned shape {batched.shape}; expected ({len(points)},)"
        )
    tol = _default_rtol(singles) if rtol is None else rtol
    for i in range(len(points)):
        if not _agree(batched[i], singles[i], tol):
            raise AssertionError(
                f"jax.vmap(log_p) differs from the one-point value at point #{i} "
                f"{_short(points[i])}: batched {batched[i]} vs single {singles[i]} (rtol {tol:.2g})"
            )


def assert_deterministic(log_p: LogDensity, point: Any, *, data: Any = None, repeats: int = 3) -> None:
    """Raise ``AssertionError`` unless ``repeats`` eager calls at the same point give
    bit-identical values (a log-density must not draw random numbers or keep state)."""
    repeats = integer("repeats", repeats, minimum=2)
    values = [np.asarray(_call(log_p, point, data)) for _ in range(repeats)]
    for v in values[1:]:
        if v.shape != values[0].shape or not np.array_equal(v, values[0], equal_nan=True):
            raise AssertionError(
                f"log_p is not deterministic: the same point {_short(point)} gave "
                f"{values[0]} and then {v}. Does it use global random numbers (numpy.random, "
                "random) or mutable state? Pass randomness through an explicit jax key instead."
            )


def _row_count(data) -> int:
    sizes = {}
    for path, leaf in jax.tree_util.tree_flatten_with_path(data)[0]:
        shape = np.shape(leaf)
        if len(shape) >= 1:
            sizes[path_label(path) if path else "data"] = shape[0]
    if not sizes:
        raise ValueError("data: expected at least one array leaf with a leading row axis; got none")
    if len(set(sizes.values())) != 1:
        raise ValueError(
            "data: expected every array leaf to share the leading (row) axis, to permute rows; "
            "got leading sizes "
            + ", ".join(f"'{k}': {v}" for k, v in sizes.items())
            + ". Put per-model constants in a closure instead of in data."
        )
    return int(next(iter(sizes.values())))


def assert_exchangeable_rows(
    log_p: LogDensity,
    point: Any,
    data: Any,
    *,
    key: jax.Array | None = None,
    rtol: float | None = None,
) -> None:
    """Raise ``AssertionError`` if ``log_p(point, data)`` changes when the data rows are
    permuted.

    For data declared exchangeable (independent or exchangeable observations) the
    likelihood is a symmetric function of the rows. The same permutation is applied to the
    leading axis of every data leaf with at least one axis (scalar leaves are kept): a
    random single cycle through all rows (drawn with ``key``, default
    ``jax.random.key(0)``), so that every row moves and a log-density that treats any one
    row differently changes.
    """
    if data is None:
        raise ValueError("data: expected the data pytree whose rows are to be permuted; got None")
    n = _row_count(data)
    if n < 2:
        raise ValueError(f"data: expected at least 2 rows to permute; got {n}")
    # a random single cycle through all rows: every row moves (no fixed points)
    order = np.asarray(jax.random.permutation(default_key() if key is None else key, n))
    perm = np.empty(n, dtype=np.int64)
    perm[order] = np.roll(order, -1)

    def permute(leaf):
        return leaf[perm] if np.ndim(leaf) >= 1 else leaf

    shuffled = jax.tree_util.tree_map(permute, data)
    a = np.asarray(_call(log_p, point, data))
    b = np.asarray(_call(log_p, point, shuffled))
    tol = _default_rtol(a) if rtol is None else positive("rtol", rtol)
    if a.shape != b.shape or not _agree(a, b, tol):
        raise AssertionError(
            f"log_p changes when the {n} data rows are permuted ({a} vs {b}, rtol {tol:.2g}) "
            f"at point {_short(point)}, although the data were declared exchangeable"
        )


@dataclass(frozen=True)
class HealthReport:
    """Outcome of :func:`check_health`: one entry per check, ``None`` when it passed and the
    failure message otherwise (checks that were not run are absent)."""

    results: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return all(v is None for v in self.results.values())

    @property
    def failures(self) -> dict:
        return {k: v for k, v in self.results.items() if v is not None}

    def summary(self) -> str:
        lines = [f"{k}: {'ok' if v is None else 'FAILED - ' + v}" for k, v in self.results.items()]
        return "\n".join(lines)

    def assert_passed(self) -> None:
        """Raise ``AssertionError`` listing every failed check."""
        if not self.passed:
            raise AssertionError(
                "log_p failed health checks:\n" + "\n".join(f"- {k}: {v}" for k, v in self.failures.items())
            )

    def __str__(self) -> str:  # pragma: no cover - convenience
        return self.summary()


def check_health(
    log_p: LogDensity,
    region: Region | None = None,
    *,
    data: Any = None,
    exchangeable: bool = False,
    **where: Any,
) -> HealthReport:
    """Run every health check of ``log_p`` and return a :class:`HealthReport`.

    Checks (keys of ``report.results``): ``"scalar"``, ``"finite"`` (on the region's points,
    16 unless it sets ``num_points``), ``"jit"``, ``"vmap"`` (on up to 8 region points),
    ``"deterministic"`` and, when ``exchangeable=True``, ``"exchangeable"``. Point checks use
    the first region point. The region is ``region`` or the keywords ``around=`` /
    ``sampler=``, ``scale=``, ``num_points=``, ``key=``; its key ``k`` (default
    ``jax.random.key(0)``) is split in two, ``(k_points, k_permutation) = split(k)``, one for
    the points and one for the permutation of the rows. A check that raises anything (an
    ``AssertionError`` or an error from ``log_p`` itself) is recorded as failed with the
    message; the report never raises, call ``report.assert_passed()`` for that.
    """
    callable_value("log_p", log_p)
    check_arity("log_p", log_p, data is not None)
    check_data(data)
    region = Region.from_keywords(where, region=region, caller="check_health")
    exchangeable = boolean("exchangeable", exchangeable)
    if exchangeable and data is None:
        raise fail("data", "the data pytree whose rows are permuted (exchangeable=True)", data)
    if exchangeable:
        _row_count(data)  # bad data layouts are usage errors: raise them now
    k_region, k_perm = jax.random.split(region.key_or_default())
    points = replace(region, key=k_region).points(16)
    point = points[0]

    def run(check, *args, **kwargs):
        try:
            check(*args, **kwargs)
            return None
        except AssertionError as exc:
            return str(exc)
        except Exception as exc:
            return f"raised {type(exc).__name__}: {_first_line(exc)}"

    results = {
        "scalar": run(assert_scalar_output, log_p, point, data=data),
        "finite": run(_finite_at, log_p, points, data),
        "jit": run(assert_jit_matches_eager, log_p, point, data=data),
        "vmap": run(_vmap_at, log_p, points[:8], data, None),
        "deterministic": run(assert_deterministic, log_p, point, data=data),
    }
    if exchangeable:
        results["exchangeable"] = run(assert_exchangeable_rows, log_p, point, data, key=k_perm)
    return HealthReport(results)


# ----------------------------------------------------------------------------- hypothesis
def points_near(point: Any, radius: float = 0.1) -> SearchStrategy[Any]:
    """Hypothesis strategy of pytrees shaped like ``point``, each element moved by at most
    ``radius``: ``point + u`` with every ``u_i`` in ``[-radius, radius]``.

    Leaves keep their floating dtype (non-floating leaves become float64). Needs the
    ``hypothesis`` package (a test dependency).
    """
    import hypothesis.strategies as st
    from hypothesis.extra import numpy as hnp

    radius = non_negative("radius", radius)
    leaves, treedef = jax.tree_util.tree_flatten(point)
    if not leaves:
        raise fail("point", "a pytree with at least one array leaf", point)
    bases = []
    for leaf in leaves:
        arr = np.asarray(leaf)
        if not np.issubdtype(arr.dtype, np.floating):
            arr = arr.astype(np.float64)
        bases.append(arr)
    offsets = [
        hnp.arrays(
            np.float64,
            b.shape,
            elements=st.floats(-float(radius), float(radius), allow_nan=False, allow_infinity=False),
        )
        for b in bases
    ]

    def build(offs):
        return jax.tree_util.tree_unflatten(treedef, [(b + o).astype(b.dtype) for b, o in zip(bases, offs)])

    return st.tuples(*offsets).map(build)
