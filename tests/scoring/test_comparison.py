"""Paired comparisons of A against B, checked against scipy, statsmodels and published values."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.dummy import DummyRegressor
from sklearn.linear_model import LinearRegression, LogisticRegression
from sklearn.metrics import f1_score, r2_score, roc_auc_score
from sklearn.model_selection import train_test_split
from sklearn.naive_bayes import GaussianNB
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from statsmodels.stats.contingency_tables import mcnemar
from statsmodels.stats.weightstats import DescrStatsW, ttost_paired

from service.scoring import comparison
from service.scoring._checks import ScoringInputError
from service.scoring.comparison import (
    mcnemar_test,
    newcombe_paired_interval,
    non_inferiority,
    paired_bootstrap,
    paired_loss_test,
)

# ----------------------------------------------------------------------------- paired t test


@pytest.mark.parametrize("n", [5, 40, 500])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_paired_loss_test_matches_scipy_paired_t(n: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    loss_b = rng.gamma(2.0, 1.0, n)
    loss_a = loss_b + rng.normal(0.1, 0.8, n)
    result = paired_loss_test(loss_a, loss_b, metric="squared")
    d = loss_a - loss_b
    # reference: scipy.stats.ttest_rel and scipy.stats.ttest_1samp on the differences
    for ref in (stats.ttest_rel(loss_a, loss_b), stats.ttest_1samp(d, 0.0)):
        assert result.details["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
        assert result.p_value == pytest.approx(ref.pvalue, rel=1e-12, abs=1e-300)
        assert result.details["df"] == ref.df
    assert result.difference == pytest.approx(d.mean(), rel=1e-12)
    for level in (0.9, 0.95, 0.99):
        iv = paired_loss_test(loss_a, loss_b, metric="squared", level=level).interval
        # reference: scipy.stats.t.interval
        low, high = stats.t.interval(level, n - 1, loc=d.mean(), scale=stats.sem(d))
        assert (iv.low, iv.high) == pytest.approx((low, high), rel=1e-12)
        # reference: statsmodels DescrStatsW.tconfint_mean
        sm_low, sm_high = DescrStatsW(d).tconfint_mean(alpha=1 - level)
        assert (iv.low, iv.high) == pytest.approx((sm_low, sm_high), rel=1e-12)
        assert iv.method == "t" and iv.level == level


def test_paired_loss_test_weighted_matches_statsmodels_with_kish_weights() -> None:
    rng = np.random.default_rng(5)
    n = 60
    loss_a, loss_b = rng.exponential(1.0, n), rng.exponential(1.2, n)
    w = rng.uniform(0.2, 3.0, n)
    result = paired_loss_test(loss_a, loss_b, metric="absolute", sample_weight=w, level=0.9)
    n_eff = w.sum() ** 2 / (w**2).sum()
    # reference: statsmodels DescrStatsW, weights rescaled to sum to Kish's effective n
    ref = DescrStatsW(loss_a - loss_b, weights=w * n_eff / w.sum())
    t, p, df = ref.ttest_mean(0.0)
    assert result.details["statistic"] == pytest.approx(t, rel=1e-10)
    assert result.p_value == pytest.approx(p, rel=1e-10)
    assert result.details["df"] == pytest.approx(df, rel=1e-12)
    low, high = ref.tconfint_mean(alpha=0.1)
    assert (result.interval.low, result.interval.high) == pytest.approx((low, high), rel=1e-10)
    assert result.details["mean_a"] == pytest.approx(np.average(loss_a, weights=w), rel=1e-12)


def test_paired_loss_test_equal_weights_change_nothing() -> None:
    # common practice: a constant weight is no weight
    rng = np.random.default_rng(6)
    a, b = rng.normal(size=30), rng.normal(size=30)
    plain = paired_loss_test(a, b, metric="m")
    weighted = paired_loss_test(a, b, metric="m", sample_weight=np.full(30, 2.5))
    assert weighted.p_value == pytest.approx(plain.p_value, rel=1e-12)
    assert weighted.interval.low == pytest.approx(plain.interval.low, rel=1e-12)


def test_paired_loss_test_degenerate_inputs() -> None:
    same = np.array([0.5, 1.0, 2.0])
    tie = paired_loss_test(same, same.copy(), metric="m")
    assert tie.difference == 0.0 and tie.p_value == 1.0
    assert (tie.interval.low, tie.interval.high) == (0.0, 0.0)
    shifted = paired_loss_test(same + 1.0, same, metric="m")
    assert shifted.p_value == 0.0 and shifted.difference == pytest.approx(1.0)
    one = paired_loss_test([1.0], [2.0], metric="m")
    assert math.isnan(one.p_value) and one.interval.method == "none"
    with pytest.raises(ScoringInputError, match="loss_b"):
        paired_loss_test([1.0, 2.0], [1.0, 2.0, 3.0], metric="m")
    with pytest.raises(ScoringInputError, match="loss_a"):
        paired_loss_test([1.0, np.nan], [1.0, 2.0], metric="m")


# ----------------------------------------------------------------------------- McNemar


def _paired_correctness(
    n11: int, n10: int, n01: int, n00: int, seed: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    a = np.repeat([True, True, False, False], [n11, n10, n01, n00])
    b = np.repeat([True, False, True, False], [n11, n10, n01, n00])
    order = np.random.default_rng(seed).permutation(a.size)
    return a[order], b[order]


@settings(max_examples=150, derandomize=True, deadline=None)
@given(
    n11=st.integers(0, 60),
    n10=st.integers(0, 60),
    n01=st.integers(0, 60),
    n00=st.integers(0, 60),
)
def test_mcnemar_matches_statsmodels(n11: int, n10: int, n01: int, n00: int) -> None:
    if n11 + n10 + n01 + n00 == 0:
        return
    a, b = _paired_correctness(n11, n10, n01, n00)
    table = [[n11, n10], [n01, n00]]
    exact = mcnemar_test(a, b, exact=True)
    # reference: statsmodels.stats.contingency_tables.mcnemar, exact binomial form
    assert exact.p_value == pytest.approx(mcnemar(table, exact=True).pvalue, rel=1e-12)
    assert exact.method == "mcnemar_exact"
    assert exact.difference == pytest.approx((n10 - n01) / (n11 + n10 + n01 + n00), abs=1e-15)
    chi2 = mcnemar_test(a, b, exact=False)
    if n10 != n01:
        # reference: statsmodels mcnemar, chi-square with continuity correction
        ref = mcnemar(table, exact=False, correction=True)
        assert chi2.p_value == pytest.approx(ref.pvalue, rel=1e-12)
        assert chi2.details["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    else:
        # Documented difference: no imbalance, no correction; p is 1 like the exact test's.
        # reference: scipy.stats.binomtest on the discordant pairs
        expected = 1.0 if n10 == 0 else stats.binomtest(n10, n10 + n01).pvalue
        assert chi2.p_value == pytest.approx(expected, rel=1e-12)
    auto = mcnemar_test(a, b)
    assert auto.method == ("mcnemar_exact" if n10 + n01 < 25 else "mcnemar_chi2")
    iv = auto.interval
    assert -1.0 <= iv.low <= auto.difference <= iv.high <= 1.0
    assert iv.high > iv.low


def test_mcnemar_edge_cases_match_statsmodels() -> None:
    # no discordant pairs: no evidence of a difference
    a, b = _paired_correctness(30, 0, 0, 10)
    none = mcnemar_test(a, b)
    assert none.p_value == 1.0 and none.difference == 0.0
    # reference: statsmodels mcnemar (exact form is defined with no discordant pairs)
    assert none.p_value == mcnemar([[30, 0], [0, 10]], exact=True).pvalue
    assert none.interval.high > 0.0 > none.interval.low  # Newcombe keeps a width
    # all discordant one way, in both forms
    for n10, exact in ((10, True), (40, False)):
        a, b = _paired_correctness(5, n10, 0, 5)
        result = mcnemar_test(a, b, exact=exact)
        # reference: statsmodels.stats.contingency_tables.mcnemar
        ref = mcnemar([[5, n10], [0, 5]], exact=exact, correction=True)
        assert result.p_value == pytest.approx(ref.pvalue, rel=1e-12)
        assert result.difference == pytest.approx(n10 / (10 + n10))


def test_mcnemar_accepts_zero_one_and_rejects_other_values() -> None:
    a, b = _paired_correctness(10, 7, 2, 4)
    as_ints = mcnemar_test(a.astype(int), b.astype(int))
    assert as_ints.p_value == mcnemar_test(a, b).p_value
    with pytest.raises(ScoringInputError, match="correct_a"):
        mcnemar_test(a.astype(int) * 2, b)
    with pytest.raises(ScoringInputError, match="correct_b"):
        mcnemar_test(a, b[:-1])


def test_newcombe_interval_matches_published_example() -> None:
    # reference: Fagerland, Lydersen & Laake (2017), Statistical Analysis of Contingency
    # Tables, ch. 8, Cavo et al. (2012) table [[59, 6], [16, 80]]: Newcombe square-and-add
    # interval -0.0621 (-0.1186 to -0.0046), as printed by the authors' R package
    # contingencytables (tests/testthat/test-ch8.R).
    iv = newcombe_paired_interval(59, 6, 16, 80, 0.95)
    assert round(iv.low, 4) == -0.1186
    assert round(iv.high, 4) == -0.0046
    a, b = _paired_correctness(59, 6, 16, 80)
    result = mcnemar_test(a, b, exact=False)
    assert round(result.difference, 4) == -0.0621
    assert (result.interval.low, result.interval.high) == (iv.low, iv.high)
    # same source, same table: "McNemar test with continuity correction: P = 0.055009"
    assert round(result.p_value, 6) == 0.055009


def test_newcombe_interval_coverage_is_near_nominal() -> None:
    # Newcombe (1998) reports coverage close to nominal for this method (from memory);
    # Monte Carlo check at n = 80 rows with correlated correctness, 1500 draws (MC sd 0.006).
    rng = np.random.default_rng(11)
    cell_p = np.array([0.55, 0.15, 0.08, 0.22])  # both right, only A, only B, both wrong
    true_diff = cell_p[1] - cell_p[2]
    covered = 0
    draws = 1500
    for counts in rng.multinomial(80, cell_p, size=draws):
        iv = newcombe_paired_interval(*(int(c) for c in counts), 0.95)
        covered += iv.low <= true_diff <= iv.high
    assert 0.925 <= covered / draws <= 0.975


# ----------------------------------------------------------------------------- bootstrap


def _r2(y, p, w):
    resid = np.average((y - p) ** 2, weights=w)
    spread = np.average((y - np.average(y, weights=w)) ** 2, weights=w)
    return 1.0 - resid / spread


def _f1(y, p, w):
    w = np.ones(y.shape[0]) if w is None else w
    tp = np.sum(w * ((y == 1) & (p == 1)))
    wrong = np.sum(w * (y != p))
    return 2 * tp / (2 * tp + wrong)


def _auc(y, s, w):
    assert w is None
    pos = y == 1
    n_pos = int(pos.sum())
    n_neg = y.size - n_pos
    if n_pos == 0 or n_neg == 0:
        return math.nan
    ranks = stats.rankdata(s)
    return (ranks[pos].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg)


def _regression_pair():
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.3, random_state=0)
    full = LinearRegression().fit(X_tr, y_tr).predict(X_te)
    two = LinearRegression().fit(X_tr[:, [2, 8]], y_tr).predict(X_te[:, [2, 8]])
    dummy = DummyRegressor().fit(X_tr, y_tr).predict(X_te)
    return y_te, full, two, dummy


def _classification_pair():
    X, y = load_breast_cancer(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.3, random_state=0)
    logistic = make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000))
    logistic.fit(X_tr, y_tr)
    bayes = GaussianNB().fit(X_tr, y_tr)
    return y_te, logistic, bayes, X_te


def test_fast_metric_helpers_equal_sklearn() -> None:
    # The bootstrap checks below use numpy versions of R^2, F1 and ROC AUC for speed;
    # reference: sklearn.metrics.r2_score, f1_score, roc_auc_score on full data and resamples.
    y, full, two, _ = _regression_pair()
    yc, logistic, bayes, X_te = _classification_pair()
    scores = logistic.predict_proba(X_te)[:, 1]
    labels = bayes.predict(X_te)
    rng = np.random.default_rng(0)
    w = rng.uniform(0.5, 2.0, y.size)
    assert _r2(y, full, None) == pytest.approx(r2_score(y, full), rel=1e-12)
    assert _r2(y, two, w) == pytest.approx(r2_score(y, two, sample_weight=w), rel=1e-12)
    for _ in range(5):
        idx = rng.integers(0, yc.size, yc.size)
        assert _f1(yc[idx], labels[idx], None) == pytest.approx(
            f1_score(yc[idx], labels[idx]), rel=1e-12
        )
        assert _auc(yc[idx], scores[idx], None) == pytest.approx(
            roc_auc_score(yc[idx], scores[idx]), rel=1e-12
        )


def _scipy_paired_interval(metric_fn, y, a, b, method, n_resamples=2000):
    # reference: scipy.stats.bootstrap(..., paired=True) with the same statistic
    return stats.bootstrap(
        (y, a, b),
        lambda yy, aa, bb: metric_fn(yy, aa, None) - metric_fn(yy, bb, None),
        paired=True,
        vectorized=False,
        n_resamples=n_resamples,
        confidence_level=0.95,
        method=method,
        rng=np.random.default_rng(12345),
    )


# Monte Carlo tolerance: an endpoint is the 2.5% or 97.5% quantile of B replicates; for a
# roughly normal bootstrap distribution with sd s its Monte Carlo sd is about
# sqrt(q(1-q)/B) / phi(z_q) * s = 2.7 s / sqrt(B) (the asymptotic variance of a sample
# quantile), so two independent runs of B = 2000 differ by about 0.085 s in sd. We allow
# 0.3 s, about 3.5 of those sds, with s = scipy's bootstrap standard error.
MC_TOLERANCE_IN_SE = 0.3


@pytest.mark.parametrize("case", ["r2", "f1", "auc"])
def test_paired_bootstrap_percentile_agrees_with_scipy(case: str) -> None:
    if case == "r2":
        y, a, b, _ = _regression_pair()
        fn = _r2
        # reference: sklearn.metrics.r2_score for the full-row difference
        expected = r2_score(y, a) - r2_score(y, b)
    else:
        y, logistic, bayes, X_te = _classification_pair()
        if case == "f1":
            a, b, fn = logistic.predict(X_te), bayes.predict(X_te), _f1
            # reference: sklearn.metrics.f1_score
            expected = f1_score(y, a) - f1_score(y, b)
        else:
            a, b, fn = logistic.predict_proba(X_te)[:, 1], bayes.predict_proba(X_te)[:, 1], _auc
            # reference: sklearn.metrics.roc_auc_score
            expected = roc_auc_score(y, a) - roc_auc_score(y, b)
    ours = paired_bootstrap(fn, y, a, b, metric=case, n_resamples=2000)
    assert ours.difference == pytest.approx(expected, rel=1e-10, abs=1e-12)
    ref = _scipy_paired_interval(fn, y, a, b, "percentile")
    tol = MC_TOLERANCE_IN_SE * ref.standard_error
    assert ours.interval.low == pytest.approx(ref.confidence_interval.low, abs=tol)
    assert ours.interval.high == pytest.approx(ref.confidence_interval.high, abs=tol)
    assert ours.details["bootstrap_se"] == pytest.approx(ref.standard_error, rel=0.1)
    assert ours.interval.method == "bootstrap_percentile"


def test_paired_bootstrap_bca_agrees_with_scipy() -> None:
    y, a, b, _ = _regression_pair()
    ours = paired_bootstrap(_r2, y, a, b, metric="r2", n_resamples=2000, method="bca")
    ref = _scipy_paired_interval(_r2, y, a, b, "BCa")
    tol = MC_TOLERANCE_IN_SE * ref.standard_error
    assert ours.interval.method == "bootstrap_bca"
    assert ours.interval.low == pytest.approx(ref.confidence_interval.low, abs=tol)
    assert ours.interval.high == pytest.approx(ref.confidence_interval.high, abs=tol)


def test_paired_bootstrap_grouped_jackknife_above_the_row_limit(monkeypatch) -> None:
    # Leave-one-group-out acceleration (MAX_LEAVE_ONE_OUT_ROWS) still agrees with scipy's
    # leave-one-out BCa within Monte Carlo error.
    monkeypatch.setattr(comparison, "MAX_LEAVE_ONE_OUT_ROWS", 40)
    y, a, b, _ = _regression_pair()
    ours = paired_bootstrap(_r2, y, a, b, metric="r2", n_resamples=2000, method="bca")
    ref = _scipy_paired_interval(_r2, y, a, b, "BCa")
    tol = MC_TOLERANCE_IN_SE * ref.standard_error
    assert ours.interval.low == pytest.approx(ref.confidence_interval.low, abs=tol)
    assert ours.interval.high == pytest.approx(ref.confidence_interval.high, abs=tol)


def test_paired_bootstrap_in_small_chunks_agrees_with_scipy(monkeypatch) -> None:
    monkeypatch.setattr(comparison, "_INDEX_BUDGET", 500)  # 3 resamples per chunk
    y, a, b, _ = _regression_pair()
    ours = paired_bootstrap(_r2, y, a, b, metric="r2", n_resamples=2000)
    ref = _scipy_paired_interval(_r2, y, a, b, "percentile")
    tol = MC_TOLERANCE_IN_SE * ref.standard_error
    assert ours.interval.low == pytest.approx(ref.confidence_interval.low, abs=tol)
    assert ours.interval.high == pytest.approx(ref.confidence_interval.high, abs=tol)


def test_paired_bootstrap_p_value_behaves() -> None:
    y, full, two, dummy = _regression_pair()
    # a large real difference: a linear model against the training mean (R^2 about 0.4 vs 0)
    big = paired_bootstrap(_r2, y, full, dummy, metric="r2")
    assert big.difference > 0.2 and big.p_value < 0.01
    assert big.interval.low > 0.0
    # identical predictions: difference 0, p 1, a zero-width interval
    same = paired_bootstrap(_r2, y, full, full.copy(), metric="r2")
    assert same.difference == 0.0 and same.p_value == 1.0
    assert (same.interval.low, same.interval.high) == (0.0, 0.0)
    # the seed fixes the result; another seed moves it only by Monte Carlo error
    again = paired_bootstrap(_r2, y, full, dummy, metric="r2")
    assert again == big
    other = paired_bootstrap(_r2, y, full, dummy, metric="r2", seed=7)
    assert other.interval.low != big.interval.low


def test_paired_bootstrap_weights_and_undefined_replicates() -> None:
    y, full, two, _ = _regression_pair()
    w = np.random.default_rng(3).uniform(0.5, 2.0, y.size)
    weighted = paired_bootstrap(_r2, y, full, two, metric="r2", sample_weight=w)
    # reference: sklearn.metrics.r2_score with sample_weight
    expected = r2_score(y, full, sample_weight=w) - r2_score(y, two, sample_weight=w)
    assert weighted.difference == pytest.approx(expected, rel=1e-10)
    # AUC is undefined on a resample with one class: dropped and counted, not fatal
    y_small = np.array([1, 0, 0, 0, 0, 0, 0, 0, 0, 0])
    scores = np.linspace(0.9, 0.0, 10)
    result = paired_bootstrap(_auc, y_small, scores, scores[::-1], metric="auc")
    assert result.details["n_undefined"] > 0
    assert math.isfinite(result.interval.low)


def test_paired_bootstrap_rejects_bad_input() -> None:
    y = np.arange(5.0)
    with pytest.raises(ScoringInputError, match="pred_a"):
        paired_bootstrap(_r2, y, y[:4], y, metric="r2")
    with pytest.raises(ValueError, match="method"):
        paired_bootstrap(_r2, y, y, y, metric="r2", method="basic")
    with pytest.raises(ValueError, match="n_resamples"):
        paired_bootstrap(_r2, y, y, y, metric="r2", n_resamples=10)


# ----------------------------------------------------------------------------- non-inferiority


def _loss_pairs():
    rng = np.random.default_rng(21)
    for shift in (-0.3, -0.05, 0.0, 0.05, 0.2):
        b = rng.gamma(2.0, 1.0, 80)
        yield b + shift + rng.normal(0.0, 0.6, 80), b


@pytest.mark.parametrize("margin", [0.0, 0.1, 0.25])
@pytest.mark.parametrize("alpha", [0.025, 0.05])
def test_non_inferiority_agrees_with_statsmodels_one_sided_tests(
    margin: float, alpha: float
) -> None:
    outcomes = set()
    for loss_a, loss_b in _loss_pairs():
        cmp_ = paired_loss_test(loss_a, loss_b, metric="squared", level=0.95)
        d = loss_a - loss_b
        # lower is better: A non-inferior when mean(d) < margin
        res = non_inferiority(cmp_, margin=margin, higher_is_better=False, alpha=alpha)
        # reference: statsmodels ttost_paired, upper one-sided test (H0: mean(d) >= margin)
        _, _, (_, p_upper, _) = ttost_paired(loss_a, loss_b, -margin - 1.0, margin)
        assert res["decision"] == (p_upper < alpha)
        # reference: scipy.stats.ttest_1samp with the margin shifted, one-sided
        p_shift = stats.ttest_1samp(d, margin, alternative="less").pvalue
        assert res["decision"] == (p_shift < alpha)
        p_zero = stats.ttest_1samp(d, 0.0, alternative="less").pvalue
        assert res["superior"] == (p_zero < alpha)
        outcomes.add(res["decision"])
        # higher is better: the same numbers read as scores; A non-inferior when mean(d) > -m
        res_hi = non_inferiority(cmp_, margin=margin, higher_is_better=True, alpha=alpha)
        # reference: statsmodels ttost_paired, lower one-sided test (H0: mean(d) <= -margin)
        _, (_, p_lower, _), _ = ttost_paired(loss_a, loss_b, -margin, margin + 1.0)
        assert res_hi["decision"] == (p_lower < alpha)
        assert res_hi["bound_side"] == "lower" and res["bound_side"] == "upper"
        outcomes.add(res_hi["decision"])
    assert outcomes == {True, False}  # the cases exercise both decisions


def test_non_inferiority_reads_the_interval_at_the_matching_level() -> None:
    loss_a, loss_b = next(_loss_pairs())
    at_90 = paired_loss_test(loss_a, loss_b, metric="m", level=0.90)
    at_95 = paired_loss_test(loss_a, loss_b, metric="m", level=0.95)
    from_interval = non_inferiority(at_90, margin=0.1, higher_is_better=False, alpha=0.05)
    rescaled = non_inferiority(at_95, margin=0.1, higher_is_better=False, alpha=0.05)
    assert from_interval["source"] == "interval" and rescaled["source"] == "t_quantile"
    assert from_interval["bound"] == pytest.approx(rescaled["bound"], rel=1e-12)
    assert from_interval["bound"] == at_90.interval.high

    y, full, two, _ = _regression_pair()
    boot = paired_bootstrap(_r2, y, full, two, metric="r2", level=0.90)
    res = non_inferiority(boot, margin=0.02, higher_is_better=True, alpha=0.05)
    assert res["bound"] == boot.interval.low
    assert res["decision"] == (boot.interval.low > -0.02)
    with pytest.raises(ValueError, match="needs level=0.93"):
        non_inferiority(boot, margin=0.02, higher_is_better=True, alpha=0.05 / 2 + 0.01)
    with pytest.raises(ValueError, match="margin"):
        non_inferiority(boot, margin=-1.0, higher_is_better=True, alpha=0.05)


def test_non_inferiority_without_an_interval_decides_nothing() -> None:
    single = paired_loss_test([1.0], [0.5], metric="m", level=0.9)
    res = non_inferiority(single, margin=1.0, higher_is_better=False, alpha=0.05)
    assert res["decision"] is False and res["superior"] is False
    assert math.isnan(res["bound"])
