"""Interval helpers checked against statsmodels, scipy and each other's definitions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy import stats
from statsmodels.stats.proportion import proportion_confint
from statsmodels.stats.weightstats import DescrStatsW

from service.scoring.intervals import (
    bca_interval,
    bootstrap_interval,
    delta_ratio_from_sums,
    delta_ratio_interval,
    linearized_interval,
    mean_sd_effective_n,
    monotone_interval,
    no_interval,
    normal_interval,
    normal_interval_from_moments,
    order_statistic_interval,
    order_statistic_ranks,
    percentile_interval,
    sd_from_sum_of_squares,
    seed_mean_interval,
    select_order_statistics,
    weighted_quantile,
    wilson_interval,
)
from service.scoring.results import Interval

LEVELS = [0.8, 0.9, 0.95, 0.99]


# ------------------------------------------------------------------------------ normal


@pytest.mark.parametrize("level", LEVELS)
@pytest.mark.parametrize("n", [2, 3, 30, 1000, 200_000])
def test_normal_interval_matches_statsmodels_z_interval(n: int, level: float) -> None:
    rng = np.random.default_rng(n)
    x = rng.exponential(2.0, size=n)
    got = normal_interval(x, level=level)
    # reference: statsmodels.stats.weightstats.DescrStatsW.zconfint_mean (normal, not t)
    low, high = DescrStatsW(x).zconfint_mean(alpha=1 - level)
    assert got.method == "normal"
    assert got.low == pytest.approx(low, rel=1e-12, abs=1e-15)
    assert got.high == pytest.approx(high, rel=1e-12, abs=1e-15)


@pytest.mark.parametrize("n", [5, 300, 100_000])
def test_weighted_normal_interval_is_statsmodels_at_kish_effective_n(n: int) -> None:
    rng = np.random.default_rng(7 + n)
    x = rng.normal(3.0, 2.0, size=n)
    w = rng.uniform(0.0, 3.0, size=n)
    got = normal_interval(x, w, level=0.9)
    # reference: statsmodels DescrStatsW with weights rescaled to sum to Kish's effective
    # n = (sum w)^2 / sum w^2: its standard error sqrt(var_w / (sum w - 1)) is then ours
    n_eff = w.sum() ** 2 / (w**2).sum()
    low, high = DescrStatsW(x, weights=w * n_eff / w.sum()).zconfint_mean(alpha=0.1)
    assert got.low == pytest.approx(low, rel=1e-12)
    assert got.high == pytest.approx(high, rel=1e-12)


def test_normal_interval_with_one_row_or_one_effective_row_is_none() -> None:
    assert normal_interval(np.array([1.0])).method == "none"
    assert normal_interval(np.array([1.0, 2.0]), np.array([1.0, 0.0])).method == "none"


@pytest.mark.parametrize("weighted", [False, True])
def test_normal_interval_from_sums_is_statsmodels(weighted: bool) -> None:
    # the path the regression report takes: mean and sum of squared deviations from sums
    rng = np.random.default_rng(21 + weighted)
    n = 2000
    x = rng.gamma(2.0, size=n)
    w = rng.uniform(0.0, 3.0, size=n) if weighted else None
    wsum = float(n) if w is None else float(w.sum())
    n_eff = float(n) if w is None else wsum**2 / float((w**2).sum())
    mean = float(np.average(x, weights=w))
    ssd = float(np.sum((x - mean) ** 2 * (1.0 if w is None else w)))
    sd = sd_from_sum_of_squares(ssd, wsum, n_eff, weighted)
    got = normal_interval_from_moments(mean, sd, n_eff, 0.9, weighted=weighted)
    # reference: statsmodels DescrStatsW.zconfint_mean (weights rescaled to Kish's n)
    scaled = None if w is None else w * n_eff / wsum
    low, high = DescrStatsW(x, weights=scaled).zconfint_mean(alpha=0.1)
    assert got.method == "normal"
    assert (got.low, got.high) == pytest.approx((low, high), rel=1e-12)
    direct = normal_interval(x, w, level=0.9)  # the same formula from the values
    assert (got.low, got.high) == pytest.approx((direct.low, direct.high), rel=1e-13)


def test_normal_interval_from_moments_gives_the_same_reasons_for_none() -> None:
    assert math.isnan(sd_from_sum_of_squares(0.0, 1.0, 1.0, False))
    assert math.isnan(sd_from_sum_of_squares(1.0, 3.0, 1.5, True))
    one = normal_interval_from_moments(1.0, math.nan, 1.0, 0.95)
    assert one == normal_interval(np.array([1.0]))
    weighted = normal_interval_from_moments(1.0, math.nan, 1.0, 0.95, weighted=True)
    assert weighted == normal_interval(np.array([1.0, 2.0]), np.array([1.0, 0.0]))


def test_mean_sd_is_accurate_at_a_large_offset() -> None:
    # reference: NIST StRD NumAcc4-style data (from memory: offset 1e7, sample sd 0.1):
    # 1e7 + 0.2 followed by 500 pairs of 1e7 + 0.1 and 1e7 + 0.3; checked against numpy's
    # two-pass np.std rather than the recalled value.
    x = np.array([1e7 + 0.2] + [1e7 + 0.1, 1e7 + 0.3] * 500)
    mean, sd, n = mean_sd_effective_n(x)
    assert n == x.size
    assert mean == pytest.approx(float(np.mean(x)), rel=1e-15)
    assert sd == pytest.approx(float(np.std(x, ddof=1)), rel=1e-9)  # reference: numpy.std
    assert sd == pytest.approx(0.1, rel=1e-6)


# ------------------------------------------------------------------------------ wilson


@pytest.mark.parametrize("successes,total", [(0, 10), (3, 10), (10, 10), (517, 1000)])
@pytest.mark.parametrize("level", [0.9, 0.95])
def test_wilson_matches_statsmodels(successes: int, total: int, level: float) -> None:
    got = wilson_interval(successes, total, level)
    # reference: statsmodels.stats.proportion.proportion_confint(method="wilson")
    low, high = proportion_confint(successes, total, alpha=1 - level, method="wilson")
    assert got.low == pytest.approx(low, abs=1e-12)
    assert got.high == pytest.approx(high, abs=1e-12)


# ------------------------------------------------------------------------------ bootstrap


def _scipy_bootstrap(x: np.ndarray, method: str, level: float):
    return stats.bootstrap(
        (x,),
        np.mean,
        confidence_level=level,
        n_resamples=999,
        method=method,
        rng=np.random.default_rng(3),
    )


@pytest.mark.parametrize("level", [0.9, 0.95])
def test_percentile_interval_matches_scipy_on_the_same_replicates(level: float) -> None:
    x = np.random.default_rng(0).lognormal(size=60)
    res = _scipy_bootstrap(x, "percentile", level)
    got = percentile_interval(res.bootstrap_distribution, level)
    # reference: scipy.stats.bootstrap(method="percentile"), same bootstrap distribution
    assert got.low == pytest.approx(res.confidence_interval.low, rel=1e-12)
    assert got.high == pytest.approx(res.confidence_interval.high, rel=1e-12)


@pytest.mark.parametrize("level", [0.9, 0.95])
def test_bca_interval_matches_scipy_on_the_same_replicates(level: float) -> None:
    x = np.random.default_rng(1).lognormal(size=60)
    res = _scipy_bootstrap(x, "BCa", level)
    jack = np.array([np.delete(x, i).mean() for i in range(x.size)])
    got = bca_interval(res.bootstrap_distribution, float(x.mean()), jack, level)
    # reference: scipy.stats.bootstrap(method="BCa"), same bootstrap distribution and the
    # same leave-one-out jackknife (Efron & Tibshirani 1993, eq. 14.15 for the acceleration)
    assert got.method == "bootstrap_bca"
    assert got.low == pytest.approx(res.confidence_interval.low, rel=1e-12)
    assert got.high == pytest.approx(res.confidence_interval.high, rel=1e-12)


@pytest.mark.parametrize("method", ["percentile", "bca"])
def test_own_bootstrap_agrees_with_scipy_within_resampling_noise(method: str) -> None:
    x = np.random.default_rng(2).gamma(2.0, size=200)
    got = bootstrap_interval(
        lambda v: float(v.mean()), [x], level=0.95, n_resamples=2000, method=method, seed=5
    )
    # reference: scipy.stats.bootstrap with its own resamples. Different resamples, so the
    # tolerance is resampling noise: each endpoint within 10% of the interval's width.
    ref = stats.bootstrap(
        (x,), np.mean, n_resamples=2000, method=method, rng=np.random.default_rng(6)
    ).confidence_interval
    width = ref.high - ref.low
    assert abs(got.low - ref.low) < 0.1 * width
    assert abs(got.high - ref.high) < 0.1 * width


def test_bootstrap_is_reproducible_and_paired() -> None:
    rng = np.random.default_rng(4)
    a, b = rng.normal(size=80), rng.normal(size=80)

    def stat(u: np.ndarray, v: np.ndarray) -> float:
        return float(np.corrcoef(u, v)[0, 1])

    one = bootstrap_interval(stat, [a, b], n_resamples=300, seed=9)
    two = bootstrap_interval(stat, [a, b], n_resamples=300, seed=9)
    assert one == two
    # paired resampling keeps a perfect correlation perfect in every replicate
    same = bootstrap_interval(stat, [a, a], n_resamples=300, seed=9)
    assert same.low == pytest.approx(1.0) and same.high == pytest.approx(1.0)


def test_bootstrap_rejects_bad_input() -> None:
    with pytest.raises(ValueError, match="method"):
        bootstrap_interval(np.mean, [np.ones(5)], method="basic")
    with pytest.raises(ValueError, match="same number of rows"):
        bootstrap_interval(np.mean, [np.ones(5), np.ones(4)])
    assert bootstrap_interval(np.mean, [np.ones(1)]).method == "none"


# ------------------------------------------------------------------------------ order statistics


@pytest.mark.parametrize("level", LEVELS)
@pytest.mark.parametrize("quantile", [0.1, 0.5, 0.75])
@pytest.mark.parametrize("n", [6, 7, 20, 101, 1000, 10_001])
def test_order_statistic_interval_matches_scipy_quantile_test(
    n: int, quantile: float, level: float
) -> None:
    x = np.random.default_rng(n).standard_t(3, size=n)
    # reference: scipy.stats.quantile_test(...).confidence_interval (binomial ranks)
    ref = stats.quantile_test(x, p=quantile).confidence_interval(level)
    got = order_statistic_interval(x, quantile, level=level)
    if math.isnan(ref.low) or math.isnan(ref.high):
        assert got.method == "none"
        assert order_statistic_ranks(n, quantile, level) is None
        return
    assert (got.low, got.high) == (ref.low, ref.high)
    assert got.method == "order_statistic"


@pytest.mark.parametrize("n", [6, 25, 400, 5000])
def test_order_statistic_ranks_reach_the_level_by_the_binomial_law(n: int) -> None:
    ranks = order_statistic_ranks(n, 0.5, 0.95)
    assert ranks is not None
    low, high = ranks
    # reference: scipy.stats.binom. P(X_(low+1) <= median <= X_(high+1)) (1-based order
    # statistics) = P(low + 1 <= B <= high) with B ~ Binomial(n, 1/2)
    coverage = stats.binom.cdf(high, n, 0.5) - stats.binom.cdf(low, n, 0.5)
    assert coverage >= 0.95


def test_order_statistic_interval_is_none_for_too_few_rows() -> None:
    # reference: scipy.stats.binom: with 5 rows P(all above the median) = 1/32 > 0.025
    assert stats.binom.cdf(0, 5, 0.5) > 0.025
    assert order_statistic_interval(np.arange(5.0), 0.5, level=0.95).method == "none"


@settings(max_examples=100, derandomize=True, deadline=None)
@given(
    values=arrays(
        np.float64,
        st.integers(1, 300),
        elements=st.one_of(st.integers(-3, 3).map(float), st.floats(-1e6, 1e6)),
    ),
    data=st.data(),
)
def test_select_order_statistics_equals_sorting(values: np.ndarray, data) -> None:
    n = values.size
    ranks = data.draw(st.lists(st.integers(0, n - 1), min_size=1, max_size=6))
    found = select_order_statistics(values.copy(), ranks)
    ordered = np.sort(values)  # reference: numpy.sort (common practice)
    assert found == {r: float(ordered[r]) for r in set(ranks)}


def test_select_order_statistics_rejects_ranks_outside_the_sample() -> None:
    with pytest.raises(ValueError, match="ranks"):
        select_order_statistics(np.ones(3), [3])


def test_weighted_quantile_with_unit_weights_is_numpy_inverted_cdf() -> None:
    x = np.random.default_rng(8).normal(size=101)
    qs = [0.05, 0.3, 0.5, 0.97]
    # reference: numpy.quantile(method="inverted_cdf") (Hyndman & Fan 1996, definition 1)
    expected = np.quantile(x, qs, method="inverted_cdf")
    np.testing.assert_array_equal(weighted_quantile(x, np.ones_like(x), qs), expected)


def test_weighted_quantile_with_integer_weights_repeats_rows() -> None:
    rng = np.random.default_rng(9)
    x = rng.normal(size=40)
    w = rng.integers(0, 4, size=40).astype(float)
    qs = [0.1, 0.5, 0.9]
    # reference: numpy.quantile(method="inverted_cdf") of the rows repeated w times
    expected = np.quantile(np.repeat(x, w.astype(int)), qs, method="inverted_cdf")
    np.testing.assert_array_equal(weighted_quantile(x, w, qs), expected)


def test_woodruff_interval_with_unit_weights_is_near_the_binomial_interval() -> None:
    x = np.random.default_rng(10).exponential(size=4001)
    got = order_statistic_interval(x, 0.5, np.ones_like(x), level=0.95)
    # reference: scipy.stats.quantile_test (exact binomial ranks). Woodruff's interval is
    # the normal approximation of the same ranks: within two order statistics of it.
    ref = stats.quantile_test(x, p=0.5).confidence_interval(0.95)
    ordered = np.sort(x)
    rank = {v: i for i, v in enumerate(ordered)}
    assert abs(rank[got.low] - rank[ref.low]) <= 2
    assert abs(rank[got.high] - rank[ref.high]) <= 2
    assert "Woodruff" in got.note


# ------------------------------------------------------------------------------ delta method


def test_delta_ratio_interval_matches_a_bootstrap_reference() -> None:
    rng = np.random.default_rng(11)
    n = 3000
    b = rng.gamma(2.0, size=n)
    a = 0.4 * b + rng.gamma(1.0, size=n) * 0.3
    got = delta_ratio_interval(a, b, level=0.95)

    def ratio(u: np.ndarray, v: np.ndarray, axis: int = -1) -> np.ndarray:
        return np.mean(u, axis=axis) / np.mean(v, axis=axis)

    # reference: scipy.stats.bootstrap(paired=True), percentile method. Tolerance: the
    # delta method is first-order, the bootstrap has resampling noise: endpoints within 5%
    # of the interval's width and widths within 5%.
    ref = stats.bootstrap(
        (a, b), ratio, paired=True, n_resamples=4000, method="percentile",
        rng=np.random.default_rng(12),
    ).confidence_interval
    width = ref.high - ref.low
    assert got.method == "delta"
    assert (got.low + got.high) / 2 == pytest.approx(a.mean() / b.mean(), rel=1e-12)
    assert abs(got.low - ref.low) < 0.05 * width
    assert abs(got.high - ref.high) < 0.05 * width
    assert got.high - got.low == pytest.approx(width, rel=0.05)


def test_weighted_delta_ratio_matches_linearized_normal_interval() -> None:
    rng = np.random.default_rng(13)
    n = 500
    a, b, w = rng.gamma(2.0, size=n), rng.gamma(3.0, size=n), rng.uniform(0.1, 2, size=n)
    got = delta_ratio_interval(a, b, w, level=0.9)
    ratio = np.average(a, weights=w) / np.average(b, weights=w)
    influence = (a - ratio * b) / np.average(b, weights=w)
    # reference: the delta method written out: normal interval of the linearization
    # (statsmodels DescrStatsW at Kish's effective n, as in the normal-interval test)
    n_eff = w.sum() ** 2 / (w**2).sum()
    low, high = DescrStatsW(influence, weights=w * n_eff / w.sum()).zconfint_mean(alpha=0.1)
    half = (high - low) / 2
    assert got.low == pytest.approx(ratio - half, rel=1e-10)
    assert got.high == pytest.approx(ratio + half, rel=1e-10)
    same = linearized_interval(ratio, influence, w, level=0.9)
    assert (same.low, same.high) == pytest.approx((got.low, got.high), rel=1e-10)


def test_delta_ratio_with_zero_denominator_is_none() -> None:
    assert delta_ratio_interval(np.ones(4), np.zeros(4)).method == "none"
    assert delta_ratio_from_sums(1.0, 0.0, 1.0, 4.0, 4.0, False).method == "none"
    assert delta_ratio_from_sums(1.0, 1.0, 1.0, 4.0, 1.5, True).method == "none"


@pytest.mark.parametrize("weighted", [False, True])
def test_delta_ratio_from_sums_matches_the_linearized_normal_interval(weighted: bool) -> None:
    rng = np.random.default_rng(31 + weighted)
    n = 800
    a, b = rng.gamma(2.0, size=n), rng.gamma(3.0, size=n)
    w = rng.uniform(0.1, 2, size=n) if weighted else None
    wsum = float(n) if w is None else float(w.sum())
    n_eff = float(n) if w is None else wsum**2 / float((w**2).sum())
    a_mean, b_mean = float(np.average(a, weights=w)), float(np.average(b, weights=w))
    ratio = a_mean / b_mean
    ssd = float(np.sum((a - ratio * b) ** 2 * (1.0 if w is None else w)))
    got = delta_ratio_from_sums(a_mean, b_mean, ssd, wsum, n_eff, weighted, 0.9)
    # reference: the delta method written out: normal interval of the linearization
    # (a - R b) / mean(b) (statsmodels DescrStatsW at Kish's effective n)
    influence = (a - ratio * b) / b_mean
    scaled = None if w is None else w * n_eff / wsum
    low, high = DescrStatsW(influence, weights=scaled).zconfint_mean(alpha=0.1)
    half = (high - low) / 2
    assert got.method == "delta"
    assert (got.low, got.high) == pytest.approx((ratio - half, ratio + half), rel=1e-10)
    same = delta_ratio_interval(a, b, w, level=0.9)
    assert (same.low, same.high) == pytest.approx((got.low, got.high), rel=1e-12)


# ------------------------------------------------------------------------------ combining


def test_seed_mean_interval_averages_endpoints() -> None:
    ivs = [Interval(1.0, 3.0, 0.95, "normal"), Interval(2.0, 6.0, 0.95, "normal")]
    got = seed_mean_interval(ivs, 0.95)
    assert (got.low, got.high, got.method) == (1.5, 4.5, "seed_mean_conservative")
    assert seed_mean_interval(ivs[:1], 0.95) == ivs[0]
    assert seed_mean_interval([ivs[0], no_interval(0.95, "x")], 0.95).method == "none"


def test_monotone_interval_maps_and_flips() -> None:
    iv = Interval(4.0, 9.0, 0.95, "normal")
    assert monotone_interval(iv, math.sqrt) == Interval(2.0, 3.0, 0.95, "normal")
    flipped = monotone_interval(iv, lambda v: 1.0 - v, decreasing=True)
    assert (flipped.low, flipped.high) == (-8.0, -3.0)
    none = no_interval(0.95, "why")
    assert monotone_interval(none, math.sqrt) is none
