r"""Mixing diagnostics for stochastic steppers: split R-hat, effective sample size.

These functions run on the host, in numpy, between compiled windows of steps:
the convergence monitor hands them short thinned trajectories of a few tracked
particles (see :class:`ThinnedTrail`), never the whole ensemble history.

Layout
------
``draws`` has shape ``(chains, draws)`` for one quantity, or
``(chains, draws, params)`` for several. For a stochastic stepper whose particles
do not interact (Langevin, MALA, proximal Langevin, BAOAB) every tracked particle's
trajectory is an independent chain. All arithmetic is done in float64, whatever
the dtype of the input; results are float64.

Methods
-------
The estimators follow "Rank-normalization, folding, and localization: an improved
R-hat for assessing convergence of MCMC" (Bayesian Analysis, 2021), written here
in our own words:

* **Split.** Each chain of ``N`` draws is cut into a first and a second half of
  ``n = N // 2`` draws, doubling the number of chains to ``M``. (When ``N`` is
  odd, the middle draw is discarded, so that both halves have the same length.)
  A chain that drifts then shows up as two halves that disagree.
* **Rank-normalise.** All ``S = M n`` draws are pooled and ranked (ties get
  their average rank ``r``); each draw is replaced by its normal score
  ``z = Phi^{-1}((r - 3/8) / (S + 1/4))`` (``Phi^{-1}`` is
  ``scipy.stats.norm.ppf``). This makes the diagnostics invariant to monotone
  transforms and well defined for heavy-tailed draws.
* **Fold.** ``zeta = |theta - median(theta)|`` (pooled median), then rank-normalise.
  R-hat on the folded draws detects chains that differ in scale, not in location.
* **Classic R-hat** ("Bayesian Data Analysis", 3rd ed. (2013), sec. 11.4) on ``M``
  chains of ``n`` draws ``psi_{ij}``:

  .. math::

     \bar\psi_{.j} = \frac1n \sum_i \psi_{ij},\quad
     s_j^2 = \frac1{n-1}\sum_i (\psi_{ij} - \bar\psi_{.j})^2,\quad
     W = \frac1M \sum_j s_j^2,\quad
     B = \frac{n}{M-1}\sum_j (\bar\psi_{.j} - \bar\psi_{..})^2,

  .. math::

     \widehat{\mathrm{var}}^+ = \frac{n-1}{n} W + \frac1n B,\qquad
     \hat R = \sqrt{\widehat{\mathrm{var}}^+ / W}.

* **Effective sample size.** With the per-chain biased autocovariance
  ``c_{t,m} = (1/n) sum_i (x_i - xbar)(x_{i+t} - xbar)`` (computed by FFT) and
  ``s_m^2 rho_{t,m} = c_{t,m} n / (n - 1)``, the autocorrelation pooled over chains is

  .. math::

     \hat\rho_t = 1 - \frac{W - \frac1M\sum_m s_m^2 \hat\rho_{t,m}}{\widehat{\mathrm{var}}^+}.

  Pair sums ``P_k = rho_{2k} + rho_{2k+1}`` are kept up to (not including) the
  first negative one (initial positive sequence), replaced by their running
  minimum (initial monotone sequence), and

  .. math::

     \hat\tau = -1 + 2 \sum_k \hat P_k,\qquad \mathrm{ESS} = M n / \hat\tau.

  As a safeguard (common practice in implementations of the paper, not part of
  its text) ``tau`` is floored at ``1 / log10(M n)``, which bounds the ESS of
  antithetic chains by ``M n log10(M n)`` and keeps it positive.

Conventions for degenerate input (per parameter)
------------------------------------------------
* fewer than ``4`` draws per chain (before splitting): ``nan``;
* any non-finite draw: ``nan`` (only for the parameter concerned);
* every draw identical: ``nan`` for R-hat and ESS (``0 / 0``: the reference
  implementations of the paper report a missing value here too);
* every chain constant but the chains not all equal: R-hat is ``inf`` (the
  chains disagree completely); the ESS is then small (about ``M / 2``) but finite.

Wrong shapes or non-real dtypes raise ``ValueError`` / ``TypeError``.
"""

from __future__ import annotations

import numbers
from collections.abc import Callable

import numpy as np
from numpy.typing import ArrayLike
from scipy import fft as _sfft
from scipy import special as _sspecial

__all__ = [
    "MIN_DRAWS_PER_CHAIN",
    "ThinnedTrail",
    "autocorrelation",
    "bulk_ess",
    "ess",
    "plain_split_rhat",
    "rank_normalise",
    "split_rhat",
]

#: Chains shorter than this (before splitting) give ``nan`` diagnostics.
MIN_DRAWS_PER_CHAIN = 4


# ---------------------------------------------------------------------------
# input handling
# ---------------------------------------------------------------------------


def _check_real(arr: np.ndarray, name: str) -> None:
    if arr.dtype.kind not in "biuf":
        raise TypeError(f"{name}: expected real numbers; got an array of dtype {arr.dtype}")


def _as_draws(draws: ArrayLike, *, allow_1d: bool) -> tuple[np.ndarray, bool]:
    """Return ``(x, scalar)`` with ``x`` float64 of shape ``(chains, draws, params)``."""
    arr = np.asarray(draws)
    _check_real(arr, "draws")
    arr = arr.astype(np.float64, copy=False)
    if arr.ndim == 1 and allow_1d:
        return arr[None, :, None], True
    if arr.ndim == 2:
        x, scalar = arr[:, :, None], True
    elif arr.ndim == 3:
        x, scalar = arr, False
    else:
        shapes = "(draws,), " if allow_1d else ""
        raise ValueError(
            f"draws: expected shape {shapes}(chains, draws) or (chains, draws, params); "
            f"got an array with shape {arr.shape}"
        )
    if x.shape[0] == 0:
        raise ValueError(f"draws: expected at least one chain; got shape {arr.shape}")
    return x, scalar


def _usable(x: np.ndarray) -> np.ndarray:
    """Boolean ``(params,)``: enough draws per chain and all draws finite."""
    if x.shape[1] < MIN_DRAWS_PER_CHAIN:
        return np.zeros(x.shape[2], dtype=bool)
    return np.asarray(np.isfinite(x).all(axis=(0, 1)))


def _finish(out: np.ndarray, scalar: bool) -> float | np.ndarray:
    return float(out[0]) if scalar else out


def _split_halves(x: np.ndarray) -> np.ndarray:
    """``(M, N, P) -> (2M, N // 2, P)``: first halves, then second halves.

    For odd ``N`` the middle draw is dropped so both halves have ``N // 2`` draws.
    """
    half = x.shape[1] // 2
    return np.concatenate([x[:, :half], x[:, x.shape[1] - half :]], axis=0)


def _sorted_rows(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each column of ``(S, P)`` ``a`` sorted, as rows: ``order`` (the sorting indices) and
    ``ordered`` (the sorted values), both ``(P, S)``."""
    rows = np.ascontiguousarray(a.T)  # one column per row: the sorts run along memory
    order = np.argsort(rows, axis=1)
    return order, np.take_along_axis(rows, order, axis=1)


def _ranks_of_sorted(
    order: np.ndarray, ordered: np.ndarray, transform: Callable[[np.ndarray], np.ndarray]
) -> np.ndarray:
    """``transform`` (elementwise) of the average ranks of rows sorted by :func:`_sorted_rows`,
    back in the original places and as columns, ``(S, P)``.

    A run of ``l`` equal sorted values starting at position ``i`` (0-based) has the rank
    ``(2 i + l + 1) / 2``, the mean of ``i + 1 .. i + l``. Ranks are then half-integers in
    ``[1, S]``, so ``transform`` is applied to those ``2 S - 1`` values only and looked up
    (without ties every row's ranks are ``1 .. S``).
    """
    p, s = ordered.shape
    starts = np.ones(ordered.shape, dtype=bool)
    starts[:, 1:] = ordered[:, 1:] != ordered[:, :-1]
    if starts.all():
        values = np.broadcast_to(transform(np.arange(1.0, s + 1.0)), ordered.shape)
    else:
        flat = starts.ravel()  # a row's first value always starts a run: runs never span rows
        first = np.flatnonzero(flat)
        length = np.diff(first, append=flat.size)
        twice_rank = 2 * (first % s) + length + 1
        table = transform(np.arange(2, 2 * s + 1) / 2.0)  # table[k] is transform((k + 2) / 2)
        values = table[twice_rank - 2][np.cumsum(flat) - 1].reshape(p, s)
    out = np.empty(ordered.shape, dtype=np.float64)
    np.put_along_axis(out, order, values, axis=1)
    return out.T


def _ranked(a: np.ndarray, transform: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """``transform`` (elementwise) of the average ranks of each column of a finite ``(S, P)``
    array (:func:`_ranks_of_sorted`)."""
    return _ranks_of_sorted(*_sorted_rows(a), transform)


def average_ranks(a: np.ndarray) -> np.ndarray:
    """Ranks ``1 .. S`` of each column of a finite ``(S, P)`` array, ties given their average
    rank: what ``scipy.stats.rankdata(a, method="average", axis=0)`` returns, with one sort
    of all the columns instead of one call per column."""
    return _ranked(np.asarray(a, dtype=np.float64), lambda r: r)


def _score_of(total: int) -> Callable[[np.ndarray], np.ndarray]:
    def score(ranks):
        return _sspecial.ndtri((ranks - 0.375) / (total + 0.25))  # the standard normal quantile

    return score


def _normal_scores(x: np.ndarray) -> np.ndarray:
    """Pooled rank normalisation of finite ``(M, n, P)`` draws, column by column."""
    m, n, p = x.shape
    return _ranked(x.reshape(m * n, p), _score_of(m * n)).reshape(m, n, p)


def _bulk_and_folded_scores(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The normal scores of finite ``(M, n, P)`` draws and of their folded values
    ``|x - median(x)|`` (pooled median), from one sort of each column.

    The folded values are sorted starting from the column's sorted order (the median is
    read from it, and the order carries the folded ranks back to the draws).
    """
    m, n, p = x.shape
    total = m * n
    score = _score_of(total)
    order, ordered = _sorted_rows(x.reshape(total, p))
    bulk = _ranks_of_sorted(order, ordered, score)
    median = (ordered[:, (total - 1) // 2] + ordered[:, total // 2]) / 2.0  # as np.median
    folded = np.abs(ordered - median[:, None])
    merge = np.argsort(folded, axis=1)
    folded_scores = _ranks_of_sorted(
        np.take_along_axis(order, merge, axis=1), np.take_along_axis(folded, merge, axis=1), score
    )
    return bulk.reshape(m, n, p), folded_scores.reshape(m, n, p)


# ---------------------------------------------------------------------------
# autocorrelation
# ---------------------------------------------------------------------------


def _autocovariance(x: np.ndarray, axis: int) -> np.ndarray:
    """Biased autocovariance ``c_t = (1/n) sum_{i<n-t} (x_i - xbar)(x_{i+t} - xbar)``.

    Computed with a zero-padded FFT (padding to at least ``2 n`` avoids the
    circular wrap-around), for all lags ``0 .. n-1`` along ``axis``.
    """
    x = np.moveaxis(x, axis, -1)
    n = x.shape[-1]
    centred = x - x.mean(axis=-1, keepdims=True)
    nfft = _sfft.next_fast_len(2 * n, real=True)
    spec = np.fft.rfft(centred, n=nfft, axis=-1)
    acov = np.fft.irfft(spec * np.conj(spec), n=nfft, axis=-1)[..., :n] / n
    return np.moveaxis(acov, -1, axis)


def autocorrelation(x: ArrayLike, *, axis: int = -1, max_lag: int | None = None) -> np.ndarray:
    r"""Sample autocorrelation of series along ``axis``, computed by FFT.

    .. math::

        \hat\rho_t = \frac{\sum_{i=1}^{n-t} (x_i - \bar x)(x_{i+t} - \bar x)}
                          {\sum_{i=1}^{n} (x_i - \bar x)^2},\qquad t = 0, \dots, T,

    i.e. the ratio of the biased (divide-by-``n``) autocovariances, which is the
    usual estimator in time-series analysis and is positive semi-definite.

    Parameters
    ----------
    x : array_like
        Real series; time runs along ``axis``; other axes are independent series.
    axis : int, default -1
        Time axis.
    max_lag : int, optional
        Largest lag ``T`` returned (``0 <= T <= n - 1``); default ``n - 1``.

    Returns
    -------
    numpy.ndarray
        Same shape as ``x`` except that ``axis`` has length ``T + 1``; float64.
        A series with zero variance gives ``nan`` at every lag.
    """
    arr = np.asarray(x)
    _check_real(arr, "x")
    if arr.ndim == 0:
        raise ValueError("x: expected at least one axis (the time axis); got a scalar")
    arr = arr.astype(np.float64, copy=False)
    if isinstance(axis, bool) or not isinstance(axis, numbers.Integral):
        raise TypeError(f"axis: expected an int; got {type(axis).__name__}")
    if not -arr.ndim <= axis < arr.ndim:
        raise ValueError(f"axis: expected an int in [-{arr.ndim}, {arr.ndim}) for x with {arr.ndim} axes; got {axis}")
    axis = int(axis) % arr.ndim
    n = arr.shape[axis]
    if n == 0:
        raise ValueError("x: expected at least one point along the time axis; got length 0")
    if max_lag is None:
        max_lag = n - 1
    if isinstance(max_lag, bool) or not isinstance(max_lag, numbers.Integral):
        raise TypeError(f"max_lag: expected an int or None; got {type(max_lag).__name__}")
    if not 0 <= max_lag <= n - 1:
        raise ValueError(f"max_lag: expected an int in [0, {n - 1}] for a series of length {n}; got {max_lag}")
    acov = _autocovariance(arr, axis)
    acov = np.take(acov, np.arange(max_lag + 1), axis=axis)
    lag0 = np.take(acov, [0], axis=axis)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = acov / lag0
    return np.where(lag0 > 0, rho, np.nan)


# ---------------------------------------------------------------------------
# R-hat
# ---------------------------------------------------------------------------


def _classic_rhat(x: np.ndarray) -> np.ndarray:
    """Classic R-hat of finite ``(M, n, P)`` chains (no splitting here), shape ``(P,)``."""
    m, n, _ = x.shape
    chain_mean = x.mean(axis=1)
    chain_var = x.var(axis=1, ddof=1)
    within = chain_var.mean(axis=0)
    between = n * chain_mean.var(axis=0, ddof=1) if m > 1 else np.zeros_like(within)
    var_plus = (n - 1) / n * within + between / n
    with np.errstate(divide="ignore", invalid="ignore"):
        rhat = np.sqrt(var_plus / within)
    # Exact degeneracies, decided on the data rather than on round-off in W.
    each_constant = (np.ptp(x, axis=1) == 0).all(axis=0)
    all_equal = np.ptp(x.reshape(m * n, -1), axis=0) == 0
    rhat = np.where(each_constant, np.inf, rhat)
    return np.where(all_equal, np.nan, rhat)


def _rhat_of_scores(bulk: np.ndarray, folded: np.ndarray) -> np.ndarray:
    """The larger of the bulk and the folded R-hat, from the two sets of normal scores."""
    # fmax: a nan from one version (e.g. folded draws all equal) yields the other.
    return np.fmax(_classic_rhat(bulk), _classic_rhat(folded))


def _rank_normalised_rhat(halves: np.ndarray) -> np.ndarray:
    """The larger of the bulk and the folded R-hat of finite split chains, shape ``(P,)``."""
    return _rhat_of_scores(*_bulk_and_folded_scores(halves))


def _split_rhat_with(draws: ArrayLike, rhat_of: Callable[[np.ndarray], np.ndarray]) -> float | np.ndarray:
    """``rhat_of`` on the split chains of the usable parameters of ``draws`` (enough finite
    draws, see :func:`_usable`); ``nan`` for the others."""
    x, scalar = _as_draws(draws, allow_1d=False)
    out = np.full(x.shape[2], np.nan)
    ok = _usable(x)
    if ok.any():
        out[ok] = rhat_of(_split_halves(x[:, :, ok]))
    return _finish(out, scalar)


def plain_split_rhat(draws: ArrayLike) -> float | np.ndarray:
    """Split R-hat on the draws as they are: no rank normalisation, no folding.

    Each chain is split in halves (middle draw dropped for odd lengths) and the
    classic formula of "Bayesian Data Analysis", 3rd ed. (2013), sec. 11.4 is
    applied (see the module docstring). Kept for comparison and for raw,
    well-behaved scalar summaries; prefer :func:`split_rhat`.

    Parameters
    ----------
    draws : array_like
        Shape ``(chains, draws)`` or ``(chains, draws, params)``.

    Returns
    -------
    float or numpy.ndarray
        As for :func:`split_rhat`: a float for 2-D input, else one value per parameter
        (``nan`` and ``inf`` in the same degenerate cases).
    """
    return _split_rhat_with(draws, _classic_rhat)


def rank_normalise(draws: ArrayLike) -> np.ndarray:
    """Pooled rank normalisation ``z = Phi^{-1}((r - 3/8) / (S + 1/4))``.

    All ``S = chains * draws`` values of a parameter are ranked together
    (average rank for ties) and mapped to normal scores with
    ``scipy.stats.norm.ppf``, as in "Rank-normalization, folding, and
    localization: an improved R-hat for assessing convergence of MCMC" (2021).

    Parameters
    ----------
    draws : array_like
        Shape ``(chains, draws)`` or ``(chains, draws, params)``.

    Returns
    -------
    numpy.ndarray
        Same shape as ``draws``, float64. Parameters with any non-finite draw
        come back as all ``nan``.
    """
    x, scalar = _as_draws(draws, allow_1d=False)
    out = np.full(x.shape, np.nan)
    ok = np.isfinite(x).all(axis=(0, 1)) if x.size else np.zeros(x.shape[2], bool)
    if ok.any() and x.shape[1] > 0:
        out[:, :, ok] = _normal_scores(x[:, :, ok])
    return out[:, :, 0] if scalar else out


def split_rhat(draws: ArrayLike) -> float | np.ndarray:
    r"""Rank-normalised split R-hat: the larger of the bulk and the folded version.

    Steps (see the module docstring for the formulas), following
    "Rank-normalization, folding, and localization: an improved R-hat for
    assessing convergence of MCMC" (Bayesian Analysis, 2021):

    1. split each chain into its first and second half (``2 * chains`` chains of
       ``draws // 2``; the middle draw is dropped for odd lengths);
    2. *bulk*: pool all draws, rank them, replace rank ``r`` by
       ``Phi^{-1}((r - 3/8) / (S + 1/4))`` and apply the classic R-hat formula
       ("Bayesian Data Analysis", 3rd ed. (2013), sec. 11.4);
    3. *folded*: do the same with ``|theta - median(theta)|``;
    4. return ``max(bulk, folded)``, as the paper recommends.

    Values below about 1.01 are the paper's suggested threshold for declaring
    the chains mixed.

    Parameters
    ----------
    draws : array_like
        Shape ``(chains, draws)`` or ``(chains, draws, params)``. A single chain
        is allowed (its two halves are then compared).

    Returns
    -------
    float or numpy.ndarray
        A float for 2-D input, an array of shape ``(params,)`` for 3-D input.
        ``nan`` where a chain has fewer than 4 draws, a draw is non-finite, or
        all draws are equal; ``inf`` where every chain is constant but they differ.
    """
    return _split_rhat_with(draws, _rank_normalised_rhat)


# ---------------------------------------------------------------------------
# effective sample size
# ---------------------------------------------------------------------------


def _ess_core(x: np.ndarray) -> np.ndarray:
    """ESS of finite ``(M, n, P)`` chains with ``n >= 2`` (no splitting here)."""
    m, n, _ = x.shape
    acov = _autocovariance(x, axis=1)  # (M, n, P)
    scaled = acov * (n / (n - 1))  # s_m^2 * rho_{t,m}
    within = scaled[:, 0].mean(axis=0)
    between = n * x.mean(axis=1).var(axis=0, ddof=1) if m > 1 else np.zeros_like(within)
    var_plus = (n - 1) / n * within + between / n
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = 1.0 - (within - scaled.mean(axis=0)) / var_plus  # (n, P)
    n_pairs = n // 2
    pairs = rho[0 : 2 * n_pairs : 2] + rho[1 : 2 * n_pairs : 2]  # P_k, (K, P)
    # Initial positive sequence: keep P_0 .. P_{k-1}, k = first index with P_k < 0.
    keep = np.cumprod(pairs >= 0, axis=0).astype(bool)
    # Initial monotone sequence: running minimum over the kept prefix.
    monotone = np.minimum.accumulate(np.where(keep, pairs, np.inf), axis=0)
    tau = -1.0 + 2.0 * np.where(keep, monotone, 0.0).sum(axis=0)
    total = m * n
    tau = np.maximum(tau, 1.0 / np.log10(total))
    ess_value = total / tau
    all_equal = np.ptp(x.reshape(total, -1), axis=0) == 0
    return np.where(all_equal, np.nan, ess_value)


def ess(draws: ArrayLike) -> float | np.ndarray:
    """Effective sample size of raw draws (no splitting, no rank normalisation).

    Autocorrelations of each chain by FFT, pooled over chains with the
    within/between variance formula, summed with the initial monotone sequence
    estimator (module docstring; "Rank-normalization, folding, and localization:
    an improved R-hat for assessing convergence of MCMC" (2021)). For a single
    chain this is the classic estimate ``n / tau`` with
    ``tau = 1 + 2 sum_t rho_t``.

    Parameters
    ----------
    draws : array_like
        Shape ``(draws,)`` (one chain), ``(chains, draws)`` or
        ``(chains, draws, params)``.

    Returns
    -------
    float or numpy.ndarray
        The ESS of all chains together: a float for 1-D / 2-D input, an array of
        shape ``(params,)`` for 3-D input. ``nan`` where a chain has fewer than 4
        draws, a draw is non-finite, or all draws are equal.
    """
    x, scalar = _as_draws(draws, allow_1d=True)
    out = np.full(x.shape[2], np.nan)
    ok = _usable(x)
    if ok.any():
        out[ok] = _ess_core(x[:, :, ok])
    return _finish(out, scalar)


def bulk_ess(draws: ArrayLike) -> float | np.ndarray:
    """Bulk effective sample size: ESS of the split, rank-normalised draws.

    Each chain is split in halves (middle draw dropped for odd lengths), all
    draws are replaced by their pooled normal scores
    ``Phi^{-1}((r - 3/8) / (S + 1/4))``, and :func:`ess`'s estimator is applied,
    as in "Rank-normalization, folding, and localization: an improved R-hat for
    assessing convergence of MCMC" (Bayesian Analysis, 2021).

    Parameters
    ----------
    draws : array_like
        Shape ``(chains, draws)`` or ``(chains, draws, params)``.

    Returns
    -------
    float or numpy.ndarray
        A float for 2-D input, an array of shape ``(params,)`` for 3-D input.
        ``nan`` where a chain has fewer than 4 draws, a draw is non-finite, or
        all draws are equal.
    """
    x, scalar = _as_draws(draws, allow_1d=False)
    out = np.full(x.shape[2], np.nan)
    ok = _usable(x)
    if ok.any():
        out[ok] = _ess_core(_normal_scores(_split_halves(x[:, :, ok])))
    return _finish(out, scalar)


def split_rhat_and_bulk_ess(draws: ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """:func:`split_rhat` and :func:`bulk_ess` of ``(chains, draws, params)`` draws together,
    the split halves and their normal scores computed once for both (the monitor's figures
    after every window). Returns two ``(params,)`` arrays, equal to the two functions'."""
    x, _ = _as_draws(draws, allow_1d=False)
    rhat = np.full(x.shape[2], np.nan)
    ess_value = np.full(x.shape[2], np.nan)
    ok = _usable(x)
    if ok.any():
        bulk, folded = _bulk_and_folded_scores(_split_halves(x[:, :, ok]))
        rhat[ok] = _rhat_of_scores(bulk, folded)
        ess_value[ok] = _ess_core(bulk)
    return rhat, ess_value


# ---------------------------------------------------------------------------
# bounded store of thinned trajectories
# ---------------------------------------------------------------------------


def _positive_int(value: object, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise TypeError(f"{name}: expected a positive int; got {type(value).__name__}")
    if value < 1:
        raise ValueError(f"{name}: expected a positive int; got {value}")
    return int(value)


class ThinnedTrail:
    """Bounded, thinned record of the trajectories of ``m`` tracked particles.

    The driver pushes, after each compiled window, the positions of ``m``
    tracked particles at every step of that window, as a block of shape
    ``(steps, m, d)`` in time order. The trail keeps one step in ``thin``
    counting steps over the whole life of the trail (the phase carries across
    pushes): it keeps the steps whose 1-based global count is a multiple of
    ``thin``, i.e. global step indices ``thin - 1, 2 thin - 1, ...``. Pushing a
    trajectory in several blocks therefore keeps exactly what pushing it at
    once would.

    At most ``capacity`` kept draws are stored, in a ring: once full, each new
    draw overwrites the oldest one, so the trail always holds the most recent
    ``capacity`` kept draws (a sliding window, which suits a convergence
    monitor that judges the recent behaviour). Memory is
    ``capacity * m * d`` numbers of the first block's dtype (integers are
    stored as float64).

    Parameters
    ----------
    capacity : int
        Largest number of kept (thinned) draws per particle.
    thin : int, default 1
        Keep one step in ``thin``.

    Examples
    --------
    After each window, with ``block`` of shape ``(steps, m, d)``::

        trail = ThinnedTrail(capacity=500, thin=5)
        trail.push(block)
        rhat = split_rhat(trail.groups())    # every particle is a chain
    """

    def __init__(self, capacity: int, thin: int = 1) -> None:
        self._capacity = _positive_int(capacity, "capacity")
        self._thin = _positive_int(thin, "thin")
        self._store: np.ndarray | None = None
        self._next = 0  # ring slot written next
        self._size = 0  # draws held
        self._steps_seen = 0

    @property
    def capacity(self) -> int:
        """Largest number of kept draws held."""
        return self._capacity

    @property
    def thin(self) -> int:
        """One step in ``thin`` is kept."""
        return self._thin

    @property
    def size(self) -> int:
        """Number of kept draws held now (``<= capacity``)."""
        return self._size

    def __len__(self) -> int:
        return self._size

    @property
    def steps_seen(self) -> int:
        """Total number of steps pushed so far (before thinning)."""
        return self._steps_seen

    @property
    def particle_shape(self) -> tuple[int, int] | None:
        """``(m, d)`` fixed by the first push, or ``None`` before it."""
        return None if self._store is None else self._store.shape[1:]

    def clear(self) -> None:
        """Forget all draws, the shape and the thinning phase."""
        self._store = None
        self._next = 0
        self._size = 0
        self._steps_seen = 0

    def push(self, block: ArrayLike, stride: int = 1) -> int:
        """Append one window's trajectories.

        Parameters
        ----------
        block : array_like
            Shape ``(rows, m, d)``: positions of the ``m`` tracked particles, oldest first,
            one row every ``stride`` steps (the row stands for the last of its ``stride``
            steps). ``m`` and ``d`` must stay the same from one push to the next. ``rows``
            may be 0.
        stride : int
            Steps per row (>= 1): 1 for every step; a producer that already keeps one step in
            ``stride`` (a divisor of ``thin``) passes its ``stride``, and the trail keeps every
            ``thin / stride``-th row, the same steps as from the full block.

        Returns
        -------
        int
            Number of draws from this block kept by the thinning (those beyond
            ``capacity`` in a single block are counted although only the last
            ``capacity`` of them are stored).
        """
        arr = np.asarray(block)
        _check_real(arr, "block")
        if arr.ndim != 3:
            raise ValueError(f"block: expected shape (steps, m, d); got an array with shape {arr.shape}")
        steps, m, d = arr.shape
        if m == 0 or d == 0:
            raise ValueError(f"block: expected at least one particle in at least one dimension; got shape {arr.shape}")
        if self._store is None:
            dtype = arr.dtype if arr.dtype.kind == "f" else np.float64
            self._store = np.empty((self._capacity, m, d), dtype=dtype)
        elif arr.shape[1:] != self._store.shape[1:]:
            raise ValueError(
                f"block: expected shape (steps, {self._store.shape[1]}, {self._store.shape[2]}) "
                f"like the earlier pushes; got {arr.shape}"
            )
        stride = _positive_int(stride, "stride")
        if self._thin % stride:
            raise ValueError(f"stride: expected a divisor of thin = {self._thin}; got {stride}")
        # Row i stands for step steps_seen + (i + 1) stride; it is kept when that step count is a
        # multiple of thin.
        every = self._thin // stride
        first = (-(self._steps_seen // stride) - 1) % every
        kept = arr[first::every]
        self._steps_seen += steps * stride
        n_kept = kept.shape[0]
        if n_kept > self._capacity:
            kept = kept[-self._capacity :]
        k = kept.shape[0]
        if k:
            slots = (self._next + np.arange(k)) % self._capacity
            self._store[slots] = kept
            self._next = int((self._next + k) % self._capacity)
            self._size = min(self._size + k, self._capacity)
        return n_kept

    def draws(self) -> np.ndarray:
        """Held draws in time order, shape ``(size, m, d)`` (a copy)."""
        if self._store is None:
            raise ValueError(
                "trail: expected a block pushed first (push(block), shape (steps, m, d)); got an empty trail"
            )
        if self._size < self._capacity:
            return self._store[: self._size].copy()
        return np.concatenate([self._store[self._next :], self._store[: self._next]], axis=0)

    def groups(self, n_groups: int | None = None) -> np.ndarray:
        """Trajectories laid out for R-hat / ESS: one chain per particle.

        Each tracked particle's thinned trajectory is one chain (for steppers
        whose particles move independently, these are independent chains). With
        ``n_groups``, the ``m`` particles are dealt into ``n_groups`` groups of
        ``k = m // n_groups`` consecutive particles (group ``g`` holds tracked
        particles ``g k, ..., (g + 1) k - 1``); the ``m - n_groups k`` left over
        are left out so that every group has the same size. The result is
        group-major, so ``out.reshape(n_groups, k, draws, d)`` separates the groups.

        Parameters
        ----------
        n_groups : int, optional
            Number of equal groups, ``1 <= n_groups <= m``; default: all ``m``
            particles, in tracked order.

        Returns
        -------
        numpy.ndarray
            Shape ``(chains, draws, d)`` with ``chains = n_groups * k`` (or ``m``),
            ``draws = size``, oldest draw first.
        """
        traj = np.swapaxes(self.draws(), 0, 1)  # (m, size, d)
        if n_groups is None:
            return traj
        m = traj.shape[0]
        if isinstance(n_groups, bool) or not isinstance(n_groups, numbers.Integral):
            raise TypeError(f"n_groups: expected an int or None; got {type(n_groups).__name__}")
        if not 1 <= n_groups <= m:
            raise ValueError(f"n_groups: expected an int in [1, {m}] for {m} tracked particles; got {n_groups}")
        k = m // int(n_groups)
        return traj[: int(n_groups) * k]
