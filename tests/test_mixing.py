"""Tests for flowpost.mixing: split R-hat, ESS, autocorrelation, ThinnedTrail.

Every check of the main job names its outside source beside it. The references
are computed here by independent means (hand-written loops, statsmodels, the
standard library's ``statistics.NormalDist``, closed forms), never by the code
under test.
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.tsa.stattools import acf

from flowpost.diagnostics import (
    ThinnedTrail,
    autocorrelation,
    average_ranks,
    bulk_ess,
    ess,
    plain_split_rhat,
    rank_normalise,
    split_rhat,
    split_rhat_and_bulk_ess,
)

N_AR = 20_000  # length of each AR(1) series


def ar1(rho: float, shape: tuple[int, ...], seed: int) -> np.ndarray:
    """Stationary-ish AR(1) x_t = rho x_{t-1} + e_t, e_t ~ N(0, 1), along the last axis.

    Started at the stationary law N(0, 1 / (1 - rho^2)) so no burn-in is needed.
    """
    rng = np.random.default_rng(seed)
    noise = rng.standard_normal(shape)
    noise[..., 0] *= 1.0 / math.sqrt(1.0 - rho**2)
    return scipy.signal.lfilter([1.0], [1.0, -rho], noise, axis=-1)


def ar1_ess(n: int, rho: float) -> float:
    # Closed form: the AR(1) autocorrelation is rho^t, so the integrated
    # autocorrelation time is 1 + 2 sum_{t>=1} rho^t = (1 + rho) / (1 - rho)
    # (geometric series; standard time-series result), and ESS = n (1 - rho) / (1 + rho).
    return n * (1.0 - rho) / (1.0 + rho)


# ---------------------------------------------------------------------------
# autocorrelation
# ---------------------------------------------------------------------------


def test_autocorrelation_matches_statsmodels_acf():
    # Reference: statsmodels.tsa.stattools.acf (direct, non-FFT sums; biased
    # autocovariance ratio), an independent implementation.
    x = ar1(0.7, (3, 600), seed=11)
    ours = autocorrelation(x, max_lag=60)
    for row, mine in zip(x, ours):
        ref = acf(row, nlags=60, fft=False, adjusted=False)
        np.testing.assert_allclose(mine, ref, rtol=0, atol=1e-12)
    # the time axis can be elsewhere
    np.testing.assert_allclose(autocorrelation(x.T, axis=0, max_lag=60), ours.T, atol=1e-14)
    # full length by default; lag 0 is 1
    full = autocorrelation(x[0])
    assert full.shape == (600,) and full[0] == pytest.approx(1.0)


def test_autocorrelation_bad_input():
    with pytest.raises(ValueError, match="max_lag"):
        autocorrelation(np.arange(10.0), max_lag=10)
    with pytest.raises(ValueError, match="axis"):
        autocorrelation(np.zeros((3, 4)), axis=2)
    with pytest.raises(TypeError, match=r"^x: expected real"):
        autocorrelation(np.ones(5, dtype=complex))
    assert np.isnan(autocorrelation(np.full(8, 2.0))).all()  # zero variance -> nan


# ---------------------------------------------------------------------------
# ESS
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("rho", [0.9, 0.0])
def test_ess_ar1_closed_form(rho):
    # Reference: closed-form AR(1) ESS n (1 - rho) / (1 + rho) (see ar1_ess).
    target = ar1_ess(N_AR, rho)
    series = ar1(rho, (16, N_AR), seed=2021)
    per_series = np.array([ess(s) for s in series])
    # Tolerance: 10% of the closed form. The spread of single-series estimates,
    # measured over 200 independent series (not part of this test), is about 7.8%
    # of the target for rho = 0.9 and 2.3% for rho = 0, so the Monte-Carlo
    # standard error of the mean of 16 estimates is about 2% and 0.6%: 10% is
    # at least 5 standard errors, with room for the estimator's small
    # truncation bias (about -1% at rho = 0). The spread is re-measured here
    # from the 16 estimates so that the band cannot silently become blind.
    se = per_series.std(ddof=1) / math.sqrt(len(per_series))
    assert se < 0.04 * target
    assert abs(per_series.mean() - target) < 0.10 * target
    # The same series as 8 chains of one quantity: ESS adds up over chains.
    # Measured spread of one 8-chain estimate: about 2.8% (rho = 0.9), so 10%
    # is about 3.6 standard errors.
    assert ess(series[:8]) == pytest.approx(8 * target, rel=0.10)


def test_bulk_ess_gaussian_ar1():
    # Reference: the same AR(1) closed form. The marginal is Gaussian, so the
    # normal scores are (nearly) a rescaling of the draws and splitting into
    # halves does not change the autocorrelation: bulk ESS ~ n (1 - rho)/(1 + rho)
    # per chain ("Rank-normalization, folding, and localization" (2021)).
    rho = 0.9
    draws = np.stack([ar1(rho, (8, N_AR), seed=7), ar1(rho, (8, N_AR), seed=8)], axis=-1)
    values = bulk_ess(draws)
    assert values.shape == (2,)
    # One 8-chain bulk estimate has a spread of about 2.8% of the target
    # (measured over 25 independent sets of 8 series, not part of this test);
    # 10% is about 3.6 standard errors.
    np.testing.assert_allclose(values, 8 * ar1_ess(N_AR, rho), rtol=0.10)
    # Monotone transforms do not change the bulk ESS (ranks are invariant):
    # exact property of rank normalisation.
    np.testing.assert_allclose(bulk_ess(np.exp(draws)), values, rtol=1e-12)


def hand_ess_one_chain(x: np.ndarray, monotone: bool = True) -> float:
    """ESS of one chain from the steps of the paper, written out with loops.

    Source: "Rank-normalization, folding, and localization: an improved R-hat
    for assessing convergence of MCMC" (2021): with one chain,
    var+ = (n-1)/n W and s^2 = W, so rho_t = 1 - n/(n-1) (1 - acf_t); pair sums
    P_k = rho_2k + rho_2k+1 kept until the first negative one, made monotone by
    a running minimum, tau = -1 + 2 sum P_k, ESS = n / tau. Autocorrelations from
    statsmodels' acf (independent of the code under test). The floor
    tau >= 1/log10(n) is the documented safeguard (common practice).
    """
    n = len(x)
    rho = [1.0 - n / (n - 1) * (1.0 - v) for v in acf(x, nlags=n - 1, fft=False)]
    pairs: list[float] = []
    for k in range(n // 2):
        p = rho[2 * k] + rho[2 * k + 1]
        if p < 0:
            break
        if monotone and pairs:
            p = min(p, pairs[-1])
        pairs.append(p)
    return n / max(-1.0 + 2.0 * sum(pairs), 1.0 / math.log10(n))


@pytest.mark.parametrize("seed", [7, 10])
def test_ess_matches_hand_computation(seed):
    # Short series (seeds picked so that the monotone step changes the answer
    # by more than 5%; the check below makes sure it does).
    x = scipy.signal.lfilter([1.0], [1.0, -0.5], np.random.default_rng(seed).standard_normal(80))
    expected = hand_ess_one_chain(x)
    assert abs(hand_ess_one_chain(x, monotone=False) - expected) > 0.05 * expected
    assert ess(x) == pytest.approx(expected, rel=1e-10)
    assert ess(x[None, :]) == pytest.approx(expected, rel=1e-10)


def test_ess_antithetic_is_positive_and_capped():
    # An alternating series has rho_1 ~ -1; the estimate must stay positive and
    # below the safeguard cap M n log10(M n) (common practice, see module notes).
    x = np.tile([1.0, -1.0], 50) + 1e-3 * np.random.default_rng(0).standard_normal(100)
    value = ess(x)
    assert 0 < value <= 100 * math.log10(100) + 1e-9


# ---------------------------------------------------------------------------
# R-hat
# ---------------------------------------------------------------------------


def hand_split_rhat(chains: list[list[float]]) -> float:
    """Split R-hat by the textbook formula, written out with plain loops.

    Source: "Bayesian Data Analysis", 3rd ed. (2013), sec. 11.4: split each
    chain in halves, then B = n/(m-1) sum_j (mean_j - mean)^2,
    W = 1/m sum_j s_j^2, var+ = (n-1)/n W + B/n, R = sqrt(var+ / W).
    For odd lengths the middle draw is dropped (our documented choice).
    """
    halves = []
    for c in chains:
        h = len(c) // 2
        halves.append(c[:h])
        halves.append(c[len(c) - h :])
    m, n = len(halves), len(halves[0])
    means = [sum(c) / n for c in halves]
    grand = sum(means) / m
    b = n / (m - 1) * sum((mu - grand) ** 2 for mu in means)
    s2 = [sum((v - mu) ** 2 for v in c) / (n - 1) for c, mu in zip(halves, means)]
    w = sum(s2) / m
    var_plus = (n - 1) / n * w + b / n
    return math.sqrt(var_plus / w)


@pytest.mark.parametrize("length", [8, 9])
def test_plain_split_rhat_matches_textbook(length):
    rng = np.random.default_rng(3)
    draws = rng.normal(size=(3, length)) + np.array([[0.0], [0.3], [-0.5]])
    expected = hand_split_rhat(draws.tolist())
    assert plain_split_rhat(draws) == pytest.approx(expected, rel=1e-12)
    # several parameters at once give the same per parameter
    stacked = np.stack([draws, 2 * draws + 1], axis=-1)
    np.testing.assert_allclose(plain_split_rhat(stacked), [expected, expected], rtol=1e-12)


def test_rank_normalise_matches_formula():
    # Source: "Rank-normalization, folding, and localization" (2021), eq. for
    # normal scores z = Phi^{-1}((r - 3/8) / (S + 1/4)); reference quantile from
    # the standard library (statistics.NormalDist), ranks by sorting by hand,
    # ties given their average rank.
    draws = np.array([[0.3, -1.0, 2.0, 0.3], [5.0, 0.0, -2.0, 0.3]])
    flat = draws.ravel().tolist()
    s = len(flat)
    ordered = sorted(flat)
    ref = []
    for v in flat:
        positions = [i + 1 for i, u in enumerate(ordered) if u == v]
        r = sum(positions) / len(positions)
        ref.append(statistics.NormalDist().inv_cdf((r - 0.375) / (s + 0.25)))
    np.testing.assert_allclose(rank_normalise(draws).ravel(), ref, rtol=1e-12)


@settings(max_examples=60, deadline=None)
@given(
    st.integers(1, 40),
    st.integers(1, 4),
    st.sampled_from([2, 5, 1000]),
    st.integers(0, 2**31 - 1),
)
def test_average_ranks_match_scipy_rankdata(rows, cols, levels, seed):
    """Reference: scipy.stats.rankdata(method="average", axis=0), ties included (few levels
    give many ties, 1000 levels almost none)."""
    import scipy.stats

    a = np.random.default_rng(seed).integers(0, levels, size=(rows, cols)).astype(float)
    np.testing.assert_array_equal(average_ranks(a), scipy.stats.rankdata(a, method="average", axis=0))


def test_split_rhat_and_bulk_ess_together_equal_each():
    """The monitor's joint computation returns exactly what the two public functions do, for
    continuous draws and for draws with ties and a constant coordinate."""
    rng = np.random.default_rng(11)
    x = rng.standard_normal((8, 60, 3))
    x[:, :, 1] = np.round(x[:, :, 1])
    x[:, :, 2] = 1.5
    rhat, ess_value = split_rhat_and_bulk_ess(x)
    np.testing.assert_array_equal(rhat, split_rhat(x))
    np.testing.assert_array_equal(ess_value, bulk_ess(x))
    assert np.isnan(rhat[2]) and np.isnan(ess_value[2])


def test_split_rhat_iid_chains_pass():
    # Threshold 1.01: the recommendation of "Rank-normalization, folding, and
    # localization" (2021). For 8 split chains of 500 iid draws, R-hat - 1 is of
    # order (F - 1) / (2 n) with F ~ F(7, 3992): standard deviation about
    # 0.53 / 1000 ~ 5e-4, so 1.01 is ~ 20 standard deviations away.
    draws = np.random.default_rng(42).standard_normal((4, 1000, 3))
    values = split_rhat(draws)
    assert values.shape == (3,)
    assert np.all(values < 1.01)
    assert np.all(values > 0.99)
    assert np.all(plain_split_rhat(draws) < 1.01)


def test_split_rhat_flags_offset_chain():
    # One of 4 chains shifted by 2 sd. Population value of the classic split
    # R-hat (BDA3 sec. 11.4 formula): chain-mean variance over the 8 halves is
    # (6 * 0.5^2 + 2 * 1.5^2) / 7 = 6/7, W = 1, so R ~ sqrt(1 + 6/7) ~ 1.36;
    # rank normalisation shrinks this a little. Threshold 1.1 (common practice,
    # the older looser rule) is far below.
    draws = np.random.default_rng(42).standard_normal((4, 1000, 3))
    draws[0] += 2.0
    assert np.all(split_rhat(draws) > 1.1)
    assert np.all(plain_split_rhat(draws) > 1.1)


def test_split_rhat_folding_detects_scale_difference():
    # Chains with equal means but one with 3x the spread: the classic R-hat is
    # blind to it, the folded version is not. This is the motivating example of
    # "Rank-normalization, folding, and localization" (2021).
    draws = np.random.default_rng(5).standard_normal((4, 2000))
    draws[0] *= 3.0
    assert plain_split_rhat(draws) < 1.01
    assert split_rhat(draws) > 1.05


def test_split_rhat_detects_trend_in_single_chain():
    # A single chain drifting by 4 sd: its halves disagree. Splitting chains
    # exists to catch this ("Bayesian Data Analysis", 3rd ed. (2013), sec. 11.4).
    rng = np.random.default_rng(9)
    chain = rng.standard_normal(2000) + np.linspace(0.0, 4.0, 2000)
    assert split_rhat(chain[None, :]) > 1.1


def test_edge_cases():
    rng = np.random.default_rng(0)
    # fewer than 4 draws per chain -> nan (documented)
    short = rng.standard_normal((4, 3))
    for f in (split_rhat, plain_split_rhat, bulk_ess, ess):
        assert np.isnan(f(short))
    # every draw identical -> nan (documented convention)
    const = np.full((4, 50), 1.5)
    for f in (split_rhat, plain_split_rhat, bulk_ess, ess):
        assert np.isnan(f(const))
    # each chain constant but chains differ -> R-hat inf
    stuck = np.repeat(np.arange(4.0)[:, None], 50, axis=1)
    assert split_rhat(stuck) == np.inf
    assert plain_split_rhat(stuck) == np.inf
    # non-finite draws poison only their own parameter
    draws = rng.standard_normal((4, 100, 2))
    draws[1, 7, 0] = np.nan
    r = split_rhat(draws)
    e = bulk_ess(draws)
    assert np.isnan(r[0]) and np.isfinite(r[1])
    assert np.isnan(e[0]) and np.isfinite(e[1])
    # 1-D input: a single chain for ess, refused by R-hat (ambiguous)
    assert np.isfinite(ess(draws[0, :, 1]))
    with pytest.raises(ValueError, match=r"^draws: expected shape"):
        split_rhat(draws[0, :, 1])
    with pytest.raises(ValueError, match=r"^draws: expected shape"):
        bulk_ess(np.zeros((2, 3, 4, 5)))
    with pytest.raises(ValueError, match="at least one chain"):
        split_rhat(np.zeros((0, 10)))
    with pytest.raises(TypeError, match=r"^draws: expected real"):
        ess(np.array([["a", "b"]]))


# ---------------------------------------------------------------------------
# ThinnedTrail
# ---------------------------------------------------------------------------


def labelled_block(start: int, steps: int, m: int = 3, d: int = 2) -> np.ndarray:
    """Block whose entry [t, i, k] encodes global step, particle and coordinate."""
    t = np.arange(start, start + steps)[:, None, None]
    i = np.arange(m)[None, :, None]
    k = np.arange(d)[None, None, :]
    return (1000.0 * t + 10.0 * i + k).astype(np.float32)


def test_trail_thinning_phase_carries_across_pushes():
    trail = ThinnedTrail(capacity=100, thin=3)
    start = 0
    kept = []
    for steps in (2, 4, 5, 0, 1):
        kept.append(trail.push(labelled_block(start, steps)))
        start += steps
    # kept steps are the global indices 2, 5, 8, 11 (1-based counts 3, 6, 9, 12)
    steps_kept = trail.draws()[:, 0, 0] / 1000.0
    np.testing.assert_array_equal(steps_kept, [2, 5, 8, 11])
    assert kept == [0, 2, 1, 0, 1]  # blocks cover steps 0-1, 2-5, 6-10, -, 11
    assert trail.steps_seen == 12 and len(trail) == 4
    assert trail.draws().dtype == np.float32  # caller's dtype kept


@settings(max_examples=40, deadline=None)
@given(
    sizes=st.lists(st.integers(0, 9), min_size=1, max_size=8),
    thin=st.integers(1, 4),
    capacity=st.integers(1, 6),
)
def test_trail_pieces_equal_whole(sizes, thin, capacity):
    # Pushing a trajectory in pieces keeps what one push keeps: the last
    # `capacity` of the steps with 1-based count divisible by `thin`.
    total = sum(sizes)
    whole = labelled_block(0, total)
    trail = ThinnedTrail(capacity=capacity, thin=thin)
    start = 0
    for s in sizes:
        trail.push(whole[start : start + s])
        start += s
    expected = whole[thin - 1 :: thin][-capacity:] if total else whole[:0]
    np.testing.assert_array_equal(trail.draws(), expected)
    assert len(trail) <= capacity


def test_trail_capacity_drops_oldest():
    trail = ThinnedTrail(capacity=4, thin=1)
    trail.push(labelled_block(0, 3))
    trail.push(labelled_block(3, 3))
    np.testing.assert_array_equal(trail.draws()[:, 0, 0] / 1000.0, [2, 3, 4, 5])
    assert trail.push(labelled_block(6, 10)) == 10  # more than capacity in one block
    np.testing.assert_array_equal(trail.draws()[:, 0, 0] / 1000.0, [12, 13, 14, 15])
    assert trail.size == 4


def test_trail_group_layout():
    trail = ThinnedTrail(capacity=50, thin=2)
    trail.push(labelled_block(0, 10, m=7, d=2))
    chains = trail.groups()
    assert chains.shape == (7, 5, 2)  # (chains = particles, draws, d)
    # chain c is particle c, draws in time order, coordinates last
    for c in range(7):
        np.testing.assert_array_equal(chains[c, :, 1], 1000.0 * np.arange(1, 10, 2) + 10.0 * c + 1)
    grouped = trail.groups(3)  # 3 groups of 2 consecutive particles; particle 6 left out
    assert grouped.shape == (6, 5, 2)
    np.testing.assert_array_equal(grouped.reshape(3, 2, 5, 2)[2, 1], chains[5])
    # feeds straight into the diagnostics (each particle a chain)
    assert split_rhat(chains).shape == (2,)


def test_trail_bad_input():
    with pytest.raises(ValueError, match="capacity"):
        ThinnedTrail(capacity=0)
    with pytest.raises(TypeError, match="thin"):
        ThinnedTrail(capacity=5, thin=1.5)
    trail = ThinnedTrail(capacity=5)
    with pytest.raises(ValueError, match=r"^trail: expected a block pushed first"):
        trail.groups()
    with pytest.raises(ValueError, match=r"^block: expected shape"):
        trail.push(np.zeros((4, 3)))
    trail.push(np.zeros((4, 3, 2)))
    with pytest.raises(ValueError, match=r"^block: expected shape \(steps, 3, 2\)"):
        trail.push(np.zeros((4, 2, 2)))
    with pytest.raises(ValueError, match="n_groups"):
        trail.groups(4)
    trail.clear()
    assert trail.particle_shape is None and trail.steps_seen == 0
