"""Moment assertions: an ensemble's mean and covariance against reference values, measured
in Monte-Carlo standard errors.

Draws are an array of shape ``(N, d)`` (``(N,)`` is read as ``d = 1``) or a pytree of arrays
with a common leading axis ``N``; a pytree is flattened leaf by leaf (``tree_flatten``
order, each leaf raveled in C order) and its coordinates are labelled ``name[index]``.

With ``dx_n = x_n - xbar`` (``xbar`` the ensemble mean), ``s_k^2`` the sample variance
(divisor ``N - 1``) and ``n_eff`` the effective sample size (default ``N``: independent
particles; pass an effective sample size for correlated draws, either one number or one
per coordinate):

mean
    ``se(xbar_k) = sqrt(s_k^2 / n_eff_k)``, ``z_k = (xbar_k - mean_k) / se(xbar_k)``.
covariance entry (j, k), ``variance_error="empirical"`` (default)
    ``se(C_jk) = sqrt((m_jk - c_jk^2) / n_eff_jk)`` with ``m_jk = mean_n dx_nj^2 dx_nk^2``
    and ``c_jk = mean_n dx_nj dx_nk``: the standard error of a sample mean of the products
    ``dx_j dx_k``. On the diagonal this is ``sqrt((m4 - s^4) / n_eff)`` with ``m4`` the
    fourth central moment. ``n_eff_jk = min(n_eff_j, n_eff_k)``.
covariance entry (j, k), ``variance_error="gaussian"``
    The normal-theory value under the hypothesis that the ensemble matches a Gaussian with
    the reference covariance ``S``: ``se(C_jk) = sqrt((S_jj S_kk + S_jk^2) / n_eff_jk)``,
    ``2 S_kk^2 / n_eff`` on the diagonal.

``z = (C_jk - cov_jk) / se(C_jk)``. For ``|z|`` thresholds of 4-5 a correct ensemble fails
with probability about 6e-5 (4) to 6e-7 (5) per compared quantity (two-sided normal tail).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import jax
import numpy as np

from .._validate import choice, fail, positive
from .checks import coordinates

__all__ = ["MomentZScores", "assert_moments_match", "moment_zscores"]


@dataclass(frozen=True)
class MomentZScores:
    """z-scores of an ensemble's moments against references.

    Attributes
    ----------
    labels : list of str
        One name per coordinate (``"w[2]"``, ``"sigma"``, ``"theta[0]"``).
    mean_z : ndarray, shape (d,)
        ``(xbar_k - mean_k) / se_k``.
    cov_z : ndarray, shape (d, d), or None
        ``(C_jk - cov_jk) / se_jk``; ``None`` when no reference covariance was given.
    ensemble_mean, mean_se : ndarray, shape (d,)
    ensemble_cov, cov_se : ndarray, shape (d, d)
    n_eff : ndarray, shape (d,)
    """

    labels: list
    mean_z: np.ndarray
    cov_z: np.ndarray | None
    ensemble_mean: np.ndarray
    mean_se: np.ndarray
    ensemble_cov: np.ndarray
    cov_se: np.ndarray | None
    n_eff: np.ndarray

    @property
    def max_abs_z(self) -> float:
        worst = float(np.max(np.abs(self.mean_z)))
        if self.cov_z is not None:
            worst = max(worst, float(np.max(np.abs(self.cov_z))))
        return worst


def _as_floats(name: str, value: Any) -> np.ndarray:
    """``value`` as a float64 array, or a clear error (a string, an object, a complex number)."""
    try:
        arr = np.asarray(value)
    except Exception as err:  # ragged nesting
        raise fail(name, "real numbers (an array or a pytree of arrays)", value, TypeError) from err
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise TypeError(f"{name}: expected real numbers (an array or a pytree of arrays); got dtype {arr.dtype}")
    return arr.astype(np.float64)


def _flatten_draws(draws) -> tuple[np.ndarray, list[str]]:
    if isinstance(draws, (np.ndarray, jax.Array)) or np.isscalar(draws):
        arr = _as_floats("draws", draws)
        if arr.ndim == 1:
            arr = arr[:, None]
        if arr.ndim != 2:
            raise ValueError(
                f"draws: expected an array of shape (N, d) or a pytree of arrays with leading "
                f"axis N; got an array of shape {arr.shape}"
            )
        return arr, [f"theta[{k}]" for k in range(arr.shape[1])]
    leaves = jax.tree_util.tree_leaves(draws)
    if not leaves:
        raise ValueError("draws: expected an array or a pytree of arrays; got no arrays")
    n = None
    cols = []
    for leaf in leaves:
        a = _as_floats("draws", leaf)
        if a.ndim < 1:
            raise ValueError("draws: expected every leaf to have a leading particle axis N; got a scalar leaf")
        if n is None:
            n = a.shape[0]
        elif a.shape[0] != n:
            raise ValueError(f"draws: expected every leaf to share the leading axis N; got {n} and {a.shape[0]}")
        cols.append(a.reshape(n, -1))
    labels = [c.label for c in coordinates(draws, leading=1)]
    return np.concatenate(cols, axis=1), labels


def _flatten_reference(ref, d: int, name: str) -> np.ndarray:
    if isinstance(ref, (np.ndarray, jax.Array, list, tuple, float, int)) or np.isscalar(ref):
        arr = _as_floats(name, ref).reshape(-1)
    else:
        leaves = jax.tree_util.tree_leaves(ref)
        arr = np.concatenate([_as_floats(name, x).reshape(-1) for x in leaves]) if leaves else np.zeros(0)
    if arr.shape != (d,):
        raise ValueError(f"{name}: expected {d} values (one per coordinate of draws); got {arr.size}")
    return arr


def moment_zscores(
    draws: Any,
    mean: Any,
    cov: Any = None,
    *,
    n_eff: float | Sequence[float] | None = None,
    variance_error: str = "empirical",
    names: Sequence[str] | None = None,
) -> MomentZScores:
    """z-scores of the ensemble mean (and covariance) against references, in Monte-Carlo
    standard errors (formulas in the module docstring).

    Parameters
    ----------
    draws : array (N, d) or pytree of arrays with leading axis N
    mean : array (d,) or pytree shaped like one draw
        Reference mean.
    cov : array (d, d), optional
        Reference covariance; when omitted only the mean is compared.
    n_eff : float or array (d,), optional
        Effective sample size(s); default ``N``.
    variance_error : {"empirical", "gaussian"}
        Standard error of covariance entries from the sample fourth moments, or the
        normal-theory value from the reference covariance.
    names : sequence of str, optional
        Coordinate labels overriding the automatic ones.
    """
    x, labels = _flatten_draws(draws)
    n, d = x.shape
    if n < 2:
        raise ValueError(f"draws: expected at least 2 particles; got N={n}")
    if names is not None:
        if len(names) != d:
            raise ValueError(f"names: expected {d} labels; got {len(names)}")
        labels = [str(s) for s in names]
    choice("variance_error", variance_error, ("empirical", "gaussian"))
    mu = _flatten_reference(mean, d, "mean")
    if n_eff is None:
        ne = np.full(d, float(n))
    else:
        ne = (
            np.broadcast_to(_as_floats("n_eff", n_eff), (d,)).copy()
            if np.ndim(n_eff) in (0, 1) and np.size(n_eff) in (1, d)
            else None
        )
        if ne is None or not np.all(np.isfinite(ne)) or np.any(ne <= 0):
            raise ValueError(f"n_eff: expected a positive number or {d} positive numbers; got {n_eff!r}")
    if not np.all(np.isfinite(x)):
        bad = [labels[k] for k in range(d) if not np.all(np.isfinite(x[:, k]))]
        raise ValueError(f"draws: expected finite values; got non-finite values in {', '.join(bad)}")

    xbar = x.mean(axis=0)
    dx = x - xbar
    sample_cov = dx.T @ dx / (n - 1)
    var = np.diag(sample_cov)
    mean_se = np.sqrt(var / ne)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_z = np.where(mean_se > 0, (xbar - mu) / mean_se, np.where(xbar == mu, 0.0, np.sign(xbar - mu) * np.inf))

    cov_z = cov_se = None
    if cov is not None:
        S = _as_floats("cov", cov)
        if S.shape != (d, d):
            raise ValueError(f"cov: expected shape ({d}, {d}); got {S.shape}")
        ne_pair = np.minimum(ne[:, None], ne[None, :])
        if variance_error == "empirical":
            biased = dx.T @ dx / n
            fourth = (dx**2).T @ (dx**2) / n
            cov_se = np.sqrt(np.maximum(fourth - biased**2, 0.0) / ne_pair)
        else:
            sd2 = np.diag(S)
            cov_se = np.sqrt((np.outer(sd2, sd2) + S**2) / ne_pair)
        diff = sample_cov - S
        with np.errstate(divide="ignore", invalid="ignore"):
            cov_z = np.where(cov_se > 0, diff / cov_se, np.where(diff == 0, 0.0, np.sign(diff) * np.inf))
    return MomentZScores(labels, mean_z, cov_z, xbar, mean_se, sample_cov, cov_se, ne)


def assert_moments_match(
    draws: Any,
    mean: Any,
    cov: Any = None,
    *,
    threshold: float = 4.5,
    n_eff: float | Sequence[float] | None = None,
    variance_error: str = "empirical",
    names: Sequence[str] | None = None,
) -> MomentZScores:
    """Raise ``AssertionError`` when an ensemble moment is more than ``threshold`` standard
    errors from its reference; otherwise return the :class:`MomentZScores`.

    The message names each offending quantity (``mean of w[2]``, ``variance of sigma``,
    ``covariance of (w[0], w[1])``), its ensemble and reference values, its standard error
    and the number of standard errors, worst first. Arguments as in :func:`moment_zscores`.
    """
    threshold = positive("threshold", threshold)
    z = moment_zscores(draws, mean, cov, n_eff=n_eff, variance_error=variance_error, names=names)
    mu = _flatten_reference(mean, len(z.labels), "mean")
    problems = []
    for k, lab in enumerate(z.labels):
        if not abs(z.mean_z[k]) <= threshold:
            problems.append(
                (
                    abs(z.mean_z[k]),
                    f"mean of {lab}: ensemble {z.ensemble_mean[k]:.6g}, reference "
                    f"{mu[k]:.6g}, off by {z.mean_z[k]:+.3g} standard errors "
                    f"(se {z.mean_se[k]:.3g}, n_eff {z.n_eff[k]:.4g})",
                )
            )
    if z.cov_z is not None and z.cov_se is not None:  # both set, or both None without a reference cov
        S = np.asarray(cov, dtype=np.float64)
        d = len(z.labels)
        for j in range(d):
            for k in range(j, d):
                if not abs(z.cov_z[j, k]) <= threshold:
                    what = f"variance of {z.labels[j]}" if j == k else f"covariance of ({z.labels[j]}, {z.labels[k]})"
                    problems.append(
                        (
                            abs(z.cov_z[j, k]),
                            f"{what}: ensemble {z.ensemble_cov[j, k]:.6g}, reference "
                            f"{S[j, k]:.6g}, off by {z.cov_z[j, k]:+.3g} standard errors "
                            f"(se {z.cov_se[j, k]:.3g})",
                        )
                    )
    if problems:
        problems.sort(key=lambda p: -p[0])
        raise AssertionError(
            f"{len(problems)} ensemble moment(s) beyond {threshold:g} standard errors:\n"
            + "\n".join(f"- {msg}" for _, msg in problems)
        )
    return z
