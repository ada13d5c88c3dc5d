"""Confidence intervals for headline metrics.

Which method for which metric (see DEVELOPERS.md for the full table):

- a mean of per-row losses (MSE, MAE, MAPE, Brier, log loss): the normal interval from the
  sample standard deviation (central limit theorem);
- a proportion from one prediction set (accuracy): Wilson (1927), JASA 22;
- anything else: an analytic large-sample interval where one is published (delta method,
  order statistics, DeLong), otherwise a bootstrap (percentile, or BCa after Efron 1987,
  JASA 82) that resamples sufficient statistics instead of rows where that is exact.

With K > 1 seeds, a non-decomposable headline metric is the mean over seeds of a per-seed
metric. ``seed_mean_interval`` combines the per-seed intervals by averaging their
endpoints: the standard deviation of a mean of K dependent estimates is at most the mean
of their standard deviations (Minkowski's inequality), so the interval is conservative
whatever the dependence between seeds.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from .results import Interval


def z_value(level: float) -> float:
    """Two-sided standard normal quantile for a confidence level."""
    return float(stats.norm.ppf(0.5 + level / 2.0))


def no_interval(level: float, note: str) -> Interval:
    """An explicit 'no interval' with the reason, rather than a made-up one."""
    return Interval(math.nan, math.nan, level, "none", note)


def normal_from_moments(
    mean: float, sd: float, n_effective: float, level: float, method: str = "normal"
) -> Interval:
    """mean +/- z * sd / sqrt(n) from already computed moments (sd with ddof=1)."""
    if n_effective < 2 or not math.isfinite(sd):
        return no_interval(level, "needs at least two rows")
    half = z_value(level) * sd / math.sqrt(n_effective)
    return Interval(mean - half, mean + half, level, method)


def normal_interval(
    values: NDArray[np.float64], weights: NDArray[np.float64] | None = None, level: float = 0.95
) -> Interval:
    """Normal interval for the (weighted) mean of per-row values.

    With weights, the standard error uses Kish's effective sample size
    ``(sum w)^2 / sum w^2`` and the weighted standard deviation.
    """
    if weights is None:
        n = values.size
        if n < 2:
            return no_interval(level, "needs at least two rows")
        mean = float(values.mean())
        sd = float(values.std(ddof=1))
        return normal_from_moments(mean, sd, n, level)
    wsum = float(weights.sum())
    mean = float(np.dot(weights, values) / wsum)
    n_eff = wsum * wsum / float(np.dot(weights, weights))
    if n_eff < 2:
        return no_interval(level, "needs an effective sample size of at least two rows")
    var = float(np.dot(weights, (values - mean) ** 2) / wsum) * n_eff / (n_eff - 1.0)
    return normal_from_moments(mean, math.sqrt(var), n_eff, level)


def wilson_interval(successes: float, total: float, level: float = 0.95) -> Interval:
    """Wilson score interval for a proportion (Wilson 1927, JASA 22)."""
    if total <= 0:
        return no_interval(level, "needs at least one row")
    z = z_value(level)
    p = successes / total
    denom = 1.0 + z * z / total
    centre = (p + z * z / (2.0 * total)) / denom
    half = z * math.sqrt(p * (1.0 - p) / total + z * z / (4.0 * total * total)) / denom
    return Interval(max(0.0, centre - half), min(1.0, centre + half), level, "wilson")


def percentile_interval(replicates: NDArray[np.float64], level: float) -> Interval:
    """Percentile bootstrap interval from replicate statistics."""
    finite = replicates[np.isfinite(replicates)]
    if finite.size < 2:
        return no_interval(level, "bootstrap replicates are undefined")
    alpha = (1.0 - level) / 2.0
    low, high = np.quantile(finite, [alpha, 1.0 - alpha])
    return Interval(float(low), float(high), level, "bootstrap_percentile")


def bca_interval(
    replicates: NDArray[np.float64],
    point: float,
    jackknife: NDArray[np.float64],
    level: float,
) -> Interval:
    """Bias-corrected and accelerated bootstrap interval (Efron 1987, JASA 82).

    ``jackknife`` holds the leave-one-out (or leave-one-group-out) statistics used for the
    acceleration constant.
    """
    finite = replicates[np.isfinite(replicates)]
    if finite.size < 2 or not math.isfinite(point):
        return no_interval(level, "bootstrap replicates are undefined")
    share_below = (np.count_nonzero(finite < point) + 0.5 * np.count_nonzero(finite == point)) / (
        finite.size
    )
    share_below = min(max(share_below, 1.0 / (finite.size + 1)), finite.size / (finite.size + 1))
    z0 = float(stats.norm.ppf(share_below))
    dev = jackknife.mean() - jackknife
    denom = 6.0 * float(np.sum(dev**2)) ** 1.5
    accel = float(np.sum(dev**3)) / denom if denom > 0 else 0.0
    alpha = (1.0 - level) / 2.0
    quantiles = []
    for z_alpha in (stats.norm.ppf(alpha), stats.norm.ppf(1.0 - alpha)):
        adjusted = z0 + (z0 + z_alpha) / (1.0 - accel * (z0 + z_alpha))
        quantiles.append(float(stats.norm.cdf(adjusted)))
    low, high = np.quantile(finite, quantiles)
    return Interval(float(low), float(high), level, "bootstrap_bca")


def seed_mean_interval(per_seed: Sequence[Interval], level: float) -> Interval:
    """Interval for the mean over seeds of a metric, from each seed's own interval.

    Averages the endpoints: conservative under any dependence between seeds (module docstring).
    """
    if len(per_seed) == 1:
        return per_seed[0]
    lows = np.array([iv.low for iv in per_seed])
    highs = np.array([iv.high for iv in per_seed])
    if not (np.isfinite(lows).all() and np.isfinite(highs).all()):
        return no_interval(level, "a seed's interval is undefined")
    return Interval(float(lows.mean()), float(highs.mean()), level, "seed_mean_conservative")
