"""Paired comparisons of two prediction sets, A and B, scored on the same held-out rows.

Every result is a ``Comparison`` of A minus B: ``difference`` is metric(A) - metric(B), the
interval is for that difference and ``p_value`` is two-sided for H0: no difference. Which
test for which metric:

- a mean of per-row losses (squared error, absolute error, log loss, Brier):
  ``paired_loss_test``, the t test on the per-row loss differential (Diebold & Mariano 1995,
  Journal of Business & Economic Statistics 13(3); rows are independent, so the plain
  sample variance is the right one and no autocorrelation correction is needed);
- accuracy of two classifiers: ``mcnemar_test`` (McNemar 1947, Psychometrika 12;
  recommended by Dietterich 1998, Neural Computation 10(7)) with Newcombe's (1998)
  interval for the difference of paired proportions;
- anything not a mean over rows (R^2, F1, ROC AUC): ``paired_bootstrap`` (Efron &
  Tibshirani 1993, An Introduction to the Bootstrap), resampling the same rows for A and B.

``non_inferiority`` turns any of these into a one-sided decision against a margin.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from ._checks import ScoringInputError, as_targets, as_weights
from .intervals import (
    bca_interval,
    mean_sd_effective_n,
    no_interval,
    percentile_interval,
    wilson_interval,
)
from .options import DEFAULT_BOOTSTRAP_SEED
from .results import Comparison, Interval

MCNEMAR_EXACT_BELOW = 25
"""With fewer discordant pairs than this, ``mcnemar_test`` uses the exact binomial p-value.

Common practice (b + c < 25); statsmodels' own documentation only says that the
chi-square form is the large-sample approximation.
"""

MAX_LEAVE_ONE_OUT_ROWS = 1000
"""Up to this many rows the BCa acceleration uses the leave-one-out jackknife; above it,
a leave-one-group-out jackknife over this many random groups of rows (the acceleration
depends on the skewness of the influence values, which group sums preserve up to the
group size, so the estimate stays consistent at O(n) rather than O(n^2) cost)."""

_INDEX_BUDGET = 1 << 22
"""Bootstrap indices drawn per chunk (32 MiB of int64), to bound memory for large n."""


def _t_p_value(estimate: float, se: float, df: float) -> tuple[float, float]:
    """Two-sided t test of estimate == 0: (statistic, p). se == 0 gives 0 or +-inf exactly."""
    if se > 0:
        statistic = estimate / se
        return statistic, float(2.0 * stats.t.sf(abs(statistic), df))
    if estimate == 0:
        return 0.0, 1.0
    return math.copysign(math.inf, estimate), 0.0


def _check_level(level: float) -> None:
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie in (0, 1), got {level!r}")


def paired_loss_test(
    loss_a: ArrayLike,
    loss_b: ArrayLike,
    *,
    metric: str,
    sample_weight: ArrayLike | None = None,
    level: float = 0.95,
) -> Comparison:
    """Compare two mean per-row losses on the same rows with a paired t test.

    The loss differential ``d = loss_a - loss_b`` is tested for mean zero (Diebold &
    Mariano 1995 with independent rows): ``t = mean(d) / (sd(d) / sqrt(n))`` against the t
    distribution with n - 1 degrees of freedom, which is what ``scipy.stats.ttest_rel``
    computes; with many rows it is the normal test of the original paper. The interval is
    the matching t interval ``mean +/- t_{n-1} * se``.

    With ``sample_weight`` the mean is weighted and n is replaced by Kish's effective sample
    size (``intervals.mean_sd_effective_n``), in line with the intervals of single metrics;
    this equals statsmodels' ``DescrStatsW`` with the weights rescaled to sum to that size.

    Parameters
    ----------
    loss_a, loss_b : array-like of shape (n_rows,)
        Per-row losses of A and B on the same rows (lower is better).
    metric : str
        Name of the loss, carried into the result.
    sample_weight : array-like of shape (n_rows,), optional
    level : float
        Confidence level of the two-sided interval.

    Returns
    -------
    Comparison
        ``difference`` = mean loss of A - mean loss of B (negative: A is better).
        With fewer than two (effective) rows there is no interval and the p-value is NaN.
        When every differential is the same value, the interval collapses to it and the
        p-value is 1 if that value is 0, else 0 (the limits of the t test; scipy returns NaN).
    """
    _check_level(level)
    a = as_targets(loss_a, name="loss_a")
    b = as_targets(loss_b, name="loss_b")
    if a.shape != b.shape:
        raise ScoringInputError(
            "loss_b", f"expected the same rows as loss_a, shape {a.shape}, got {b.shape}"
        )
    w = as_weights(sample_weight, a.size)
    d = a - b
    mean, sd, n_eff = mean_sd_effective_n(d, w)
    mean_a = float(np.average(a, weights=w))
    mean_b = float(np.average(b, weights=w))
    details = {"mean_a": mean_a, "mean_b": mean_b, "n_effective": n_eff}
    if not math.isfinite(sd):
        details.update(se=math.nan, statistic=math.nan, df=math.nan)
        return Comparison(
            metric, "paired_t", mean, no_interval(level, "needs at least two rows"), math.nan,
            int(d.size), details,
        )
    se = sd / math.sqrt(n_eff)
    df = n_eff - 1.0
    statistic, p_value = _t_p_value(mean, se, df)
    half = float(stats.t.ppf(0.5 + level / 2.0, df)) * se
    note = "" if se > 0 else "every row has the same loss difference"
    interval = Interval(mean - half, mean + half, level, "t", note)
    details.update(se=se, statistic=statistic, df=df)
    return Comparison(metric, "paired_t", mean, interval, p_value, int(d.size), details)


def _as_correctness(values: ArrayLike, *, name: str) -> NDArray[np.bool_]:
    c = np.asarray(values)
    if c.ndim != 1:
        raise ScoringInputError(name, f"expected shape (n,), got {c.shape}")
    if c.size == 0:
        raise ScoringInputError(name, "needs at least one row")
    if c.dtype != np.bool_:
        if not (np.issubdtype(c.dtype, np.number) and np.isin(c, (0, 1)).all()):
            raise ScoringInputError(name, "expected booleans (or 0/1): was each row right?")
        c = c.astype(bool)
    return c


def newcombe_paired_interval(
    n11: int, n10: int, n01: int, n00: int, level: float = 0.95
) -> Interval:
    """Interval for p(A right) - p(B right) from a paired 2x2 table.

    Newcombe's (1998) hybrid score interval for paired data (his method 10; Statistics in
    Medicine 17, 2635-2650): the Wilson intervals of the two marginal proportions combined by
    "square and add" with the correlation ``phi`` between them, corrected towards zero as in
    the paper (``phi`` uses ``max(n11 n00 - n10 n01 - n/2, 0)`` when that product is positive,
    and is 0 when a margin is empty). Unlike the Wald interval it keeps a non-zero width when
    there are no discordant pairs and stays within [-1, 1].

    Table cells: ``n11`` both right, ``n10`` only A right, ``n01`` only B right, ``n00``
    both wrong.
    """
    n = n11 + n10 + n01 + n00
    if n <= 0:
        return no_interval(level, "needs at least one row")
    p1 = (n11 + n10) / n
    p2 = (n11 + n01) / n
    w1 = wilson_interval(n11 + n10, n, level)
    w2 = wilson_interval(n11 + n01, n, level)
    margins = (n11 + n10) * (n01 + n00) * (n11 + n01) * (n10 + n00)
    phi = 0.0
    if margins > 0:
        cross = n11 * n00 - n10 * n01
        if cross > n / 2:
            phi = (cross - n / 2) / math.sqrt(margins)
        elif cross < 0:
            phi = cross / math.sqrt(margins)
    dl1, du1 = p1 - w1.low, w1.high - p1
    dl2, du2 = p2 - w2.low, w2.high - p2
    diff = p1 - p2
    low = diff - math.sqrt(max(dl1 * dl1 - 2 * phi * dl1 * du2 + du2 * du2, 0.0))
    high = diff + math.sqrt(max(dl2 * dl2 - 2 * phi * dl2 * du1 + du1 * du1, 0.0))
    return Interval(low, high, level, "newcombe_paired")


def mcnemar_test(
    correct_a: ArrayLike,
    correct_b: ArrayLike,
    *,
    level: float = 0.95,
    exact: bool | None = None,
) -> Comparison:
    """Compare the accuracy of two classifiers on the same rows (McNemar 1947).

    Only the discordant rows carry information: b rows where only A is right and c rows where
    only B is right. Under H0 each discordant row is A's with probability 1/2.

    - ``exact=True``: two-sided binomial p-value ``min(1, 2 * P(X <= min(b, c)))``,
      X ~ Binomial(b + c, 1/2);
    - ``exact=False``: chi-square with Edwards' continuity correction,
      ``(|b - c| - 1)^2 / (b + c)`` on one degree of freedom;
    - ``exact=None`` (default): exact when ``b + c < MCNEMAR_EXACT_BELOW``.

    Both match ``statsmodels.stats.contingency_tables.mcnemar(table, exact, correction=True)``
    with two deliberate differences: with no discordant pairs the p-value is 1 (statsmodels
    divides by zero in the chi-square form), and when b == c the correction is capped at the
    observed imbalance, ``max(|b - c| - 1, 0)``, so the p-value is 1 like the exact test's
    (statsmodels over-corrects to ``1 / (b + c)``; scipy's Yates correction in
    ``chi2_contingency`` is capped the same way).

    The interval is Newcombe's (1998) hybrid score interval (``newcombe_paired_interval``).

    Parameters
    ----------
    correct_a, correct_b : array-like of bool, shape (n_rows,)
        Whether A (B) got each row right.

    Returns
    -------
    Comparison
        ``difference`` = accuracy(A) - accuracy(B); ``details`` holds the four table cells,
        the statistic and whether the exact form was used.
    """
    _check_level(level)
    ca = _as_correctness(correct_a, name="correct_a")
    cb = _as_correctness(correct_b, name="correct_b")
    if ca.shape != cb.shape:
        raise ScoringInputError(
            "correct_b", f"expected the same rows as correct_a, shape {ca.shape}, got {cb.shape}"
        )
    n = int(ca.size)
    n11 = int(np.count_nonzero(ca & cb))
    n10 = int(np.count_nonzero(ca & ~cb))
    n01 = int(np.count_nonzero(~ca & cb))
    n00 = n - n11 - n10 - n01
    discordant = n10 + n01
    use_exact = discordant < MCNEMAR_EXACT_BELOW if exact is None else bool(exact)
    if discordant == 0:
        statistic, p_value = 0.0, 1.0
    elif use_exact:
        statistic = float(min(n10, n01))
        p_value = min(1.0, 2.0 * float(stats.binom.cdf(statistic, discordant, 0.5)))
    else:
        statistic = max(abs(n10 - n01) - 1.0, 0.0) ** 2 / discordant
        p_value = float(stats.chi2.sf(statistic, 1))
    details = {
        "both_right": float(n11),
        "only_a_right": float(n10),
        "only_b_right": float(n01),
        "both_wrong": float(n00),
        "statistic": statistic,
        "exact": float(use_exact),
    }
    return Comparison(
        "accuracy",
        "mcnemar_exact" if use_exact else "mcnemar_chi2",
        (n10 - n01) / n,
        newcombe_paired_interval(n11, n10, n01, n00, level),
        p_value,
        n,
        details,
    )


MetricFn = Callable[[NDArray[Any], NDArray[Any], NDArray[np.float64] | None], float]


def _difference_on(
    metric_fn: MetricFn,
    y: NDArray[Any],
    a: NDArray[Any],
    b: NDArray[Any],
    w: NDArray[np.float64] | None,
    rows: NDArray[np.intp] | NDArray[np.bool_],
) -> float:
    yr = y[rows]
    wr = None if w is None else w[rows]
    return float(metric_fn(yr, a[rows], wr)) - float(metric_fn(yr, b[rows], wr))


def _jackknife_differences(
    metric_fn: MetricFn,
    y: NDArray[Any],
    a: NDArray[Any],
    b: NDArray[Any],
    w: NDArray[np.float64] | None,
    rng: np.random.Generator,
) -> NDArray[np.float64]:
    """Leave-one-out (or leave-one-group-out, see MAX_LEAVE_ONE_OUT_ROWS) differences."""
    n = y.shape[0]
    if n <= MAX_LEAVE_ONE_OUT_ROWS:
        groups = np.arange(n)
        n_groups = n
    else:
        n_groups = MAX_LEAVE_ONE_OUT_ROWS
        groups = rng.permutation(n) % n_groups
    out = np.empty(n_groups)
    keep = np.empty(n, dtype=bool)
    for g in range(n_groups):
        np.not_equal(groups, g, out=keep)
        out[g] = _difference_on(metric_fn, y, a, b, w, keep)
    return out[np.isfinite(out)]


def paired_bootstrap(
    metric_fn: MetricFn,
    y_true: ArrayLike,
    pred_a: ArrayLike,
    pred_b: ArrayLike,
    *,
    metric: str,
    sample_weight: ArrayLike | None = None,
    n_resamples: int = 1000,
    level: float = 0.95,
    method: str = "percentile",
    seed: int = DEFAULT_BOOTSTRAP_SEED,
) -> Comparison:
    """Compare any metric of A and B on the same rows with a paired bootstrap.

    Each replicate draws n rows with replacement and evaluates
    ``metric_fn(y, pred_a, w) - metric_fn(y, pred_b, w)`` on the same drawn rows (Efron &
    Tibshirani 1993), so the correlation between A and B is kept. The interval is the
    percentile interval or BCa (Efron 1987, JASA 82) of the replicate differences.

    The p-value tests H0: no difference with the replicates centred at the observed
    difference d (Hall & Wilson 1991, "Two guidelines for bootstrap hypothesis testing",
    Biometrics 47): ``(1 + #{|d*_b - d| >= |d|}) / (B + 1)``, the add-one form that never
    reports 0 from finitely many replicates. Identical predictions give difference 0 and p 1.

    Parameters
    ----------
    metric_fn : callable ``(y_true, pred, sample_weight) -> float``
        The metric on a subset of rows. Return NaN (rather than raise) where it is undefined
        on a resample; such replicates are dropped and counted in ``details["n_undefined"]``.
    y_true : array-like of shape (n_rows, ...)
    pred_a, pred_b : array-like of shape (n_rows, ...)
        Predictions (labels, scores, or (n_rows, n_classes) probabilities), indexed by row.
    metric : str
        Name of the metric, carried into the result.
    sample_weight : array-like of shape (n_rows,), optional
        Resampled with the rows and passed to ``metric_fn``.
    n_resamples : int
        Number of bootstrap replicates B (at least 100).
    method : {"percentile", "bca"}
    seed : int
        Seed of the row draws; the same input and seed give the same result.

    Returns
    -------
    Comparison
        ``difference`` = metric(A) - metric(B) on all rows.
    """
    _check_level(level)
    if method not in ("percentile", "bca"):
        raise ValueError(f"method must be 'percentile' or 'bca', got {method!r}")
    if n_resamples < 100:
        raise ValueError(f"n_resamples must be at least 100, got {n_resamples!r}")
    y = np.asarray(y_true)
    a = np.asarray(pred_a)
    b = np.asarray(pred_b)
    if y.ndim == 0 or y.shape[0] < 2:
        raise ScoringInputError("y_true", "needs at least two rows")
    n = y.shape[0]
    for name, p in (("pred_a", a), ("pred_b", b)):
        if p.ndim == 0 or p.shape[0] != n:
            raise ScoringInputError(name, f"expected {n} rows like y_true, got shape {p.shape}")
    if a.shape != b.shape:
        raise ScoringInputError(
            "pred_b", f"expected the shape of pred_a, {a.shape}, got {b.shape}"
        )
    w = as_weights(sample_weight, n)
    metric_a = float(metric_fn(y, a, w))
    metric_b = float(metric_fn(y, b, w))
    difference = metric_a - metric_b

    rng = np.random.default_rng(seed)
    replicates = np.empty(n_resamples)
    chunk = max(1, _INDEX_BUDGET // n)
    for start in range(0, n_resamples, chunk):
        stop = min(start + chunk, n_resamples)
        indices = rng.integers(0, n, size=(stop - start, n))
        for j, rows in enumerate(indices):
            replicates[start + j] = _difference_on(metric_fn, y, a, b, w, rows)
    finite = replicates[np.isfinite(replicates)]

    if method == "percentile":
        interval = percentile_interval(finite, level)
    else:
        jackknife = _jackknife_differences(metric_fn, y, a, b, w, rng)
        interval = bca_interval(finite, difference, jackknife, level)
    if finite.size == 0 or not math.isfinite(difference):
        p_value = math.nan
    else:
        beyond = np.count_nonzero(np.abs(finite - difference) >= abs(difference))
        p_value = (1.0 + beyond) / (finite.size + 1.0)
    details = {
        "metric_a": metric_a,
        "metric_b": metric_b,
        "bootstrap_se": float(finite.std(ddof=1)) if finite.size >= 2 else math.nan,
        "n_resamples": float(n_resamples),
        "n_undefined": float(n_resamples - finite.size),
        "seed": float(seed),
    }
    return Comparison(metric, "paired_bootstrap", difference, interval, p_value, n, details)


def non_inferiority(
    comparison: Comparison, *, margin: float, higher_is_better: bool, alpha: float
) -> dict[str, Any]:
    """Decide whether A is not worse than B by more than ``margin``, one-sided at ``alpha``.

    Uses the one-sided (1 - alpha) confidence bound of the difference A - B, which is the
    matching end of a two-sided (1 - 2 alpha) interval:

    - higher is better (a score): the lower bound L; non-inferior when L > -margin,
      superior when L > 0;
    - lower is better (a loss): the upper bound U; non-inferior when U < margin,
      superior when U < 0.

    This is the confidence-interval form of the one-sided test (for a paired t comparison it
    agrees exactly with the t test of H0: difference = -+margin, e.g. statsmodels'
    ``ttost_paired`` one side).

    The bound is read from ``comparison.interval`` when its level is 1 - 2 alpha; otherwise a
    ``paired_t`` comparison is rescaled from its standard error and degrees of freedom. Any
    other comparison at another level raises ``ValueError``: recompute it with
    ``level = 1 - 2 * alpha``.

    Returns
    -------
    dict
        ``decision`` (non-inferior), ``superior``, ``bound``, ``bound_side`` ("lower" or
        "upper"), ``margin``, ``alpha``, ``higher_is_better``, ``difference``, ``metric`` and
        ``source`` ("interval" or "t_quantile"). Without a finite bound both decisions are
        False.
    """
    if not 0.0 < alpha < 0.5:
        raise ValueError(f"alpha must lie in (0, 0.5), got {alpha!r}")
    if not (math.isfinite(margin) and margin >= 0.0):
        raise ValueError(f"margin must be finite and non-negative, got {margin!r}")
    interval = comparison.interval
    if math.isclose(interval.level, 1.0 - 2.0 * alpha, rel_tol=0.0, abs_tol=1e-9):
        lower, upper, source = interval.low, interval.high, "interval"
    elif comparison.method == "paired_t":
        se = comparison.details.get("se", math.nan)
        df = comparison.details.get("df", math.nan)
        half = float(stats.t.ppf(1.0 - alpha, df)) * se if df > 0 else math.nan
        lower, upper, source = comparison.difference - half, comparison.difference + half, (
            "t_quantile"
        )
    else:
        raise ValueError(
            f"the {comparison.method} comparison has a {interval.level:g} interval; a "
            f"one-sided bound at alpha={alpha:g} needs level={1.0 - 2.0 * alpha:g}: "
            "recompute it with that level"
        )
    if higher_is_better:
        bound, side = float(lower), "lower"
        decision, superior = bound > -margin, bound > 0.0
    else:
        bound, side = float(upper), "upper"
        decision, superior = bound < margin, bound < 0.0
    finite = math.isfinite(bound)
    return {
        "decision": bool(decision and finite),
        "superior": bool(superior and finite),
        "bound": bound,
        "bound_side": side,
        "margin": float(margin),
        "alpha": float(alpha),
        "higher_is_better": bool(higher_is_better),
        "difference": float(comparison.difference),
        "metric": comparison.metric,
        "source": source,
    }


__all__ = [
    "MCNEMAR_EXACT_BELOW",
    "mcnemar_test",
    "newcombe_paired_interval",
    "non_inferiority",
    "paired_bootstrap",
    "paired_loss_test",
]
