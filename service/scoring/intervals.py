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

import functools
import math
from collections.abc import Callable, Sequence

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from .options import DEFAULT_BOOTSTRAP_SEED
from .results import Interval


@functools.lru_cache(maxsize=64)
def z_value(level: float) -> float:
    """Two-sided standard normal quantile for a confidence level (cached: scipy's ppf is slow
    to call)."""
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
    mean, sd, n_eff = mean_sd_effective_n(values, weights)
    return normal_interval_from_moments(mean, sd, n_eff, level, weighted=weights is not None)


def normal_interval_from_moments(
    mean: float, sd: float, n_effective: float, level: float = 0.95, *, weighted: bool = False
) -> Interval:
    """``normal_interval`` from moments already computed (as ``mean_sd_effective_n`` gives
    them), for callers that get them from sums taken anyway; the same reasons for none."""
    if n_effective < 2 or not math.isfinite(sd):
        if not weighted:
            return no_interval(level, "needs at least two rows")
        return no_interval(level, "needs an effective sample size of at least two rows")
    return normal_from_moments(mean, sd, n_effective, level)


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


# --------------------------------------------------------------------------------------
# General helpers added for the regression metrics (usable by any task).
# --------------------------------------------------------------------------------------


_BLOCK = 65_536
"""Rows per block in the moment helpers: the block's temporary stays in cache."""


def _sum_sq_dev(
    values: NDArray[np.float64],
    centre: float,
    weights: NDArray[np.float64] | None,
    other: NDArray[np.float64] | None = None,
    factor: float = 0.0,
) -> float:
    """sum_i w_i (v_i - factor * o_i - centre)^2 in blocks: two-pass accuracy, no (n,) temporary."""
    n = values.size
    buf = np.empty(min(_BLOCK, n))
    total = 0.0
    for start in range(0, n, _BLOCK):
        stop = min(start + _BLOCK, n)
        t = buf[: stop - start]
        if other is None:
            np.subtract(values[start:stop], centre, out=t)
        else:
            np.multiply(other[start:stop], -factor, out=t)
            t += values[start:stop]
            t -= centre
        if weights is None:
            total += float(np.einsum("i,i->", t, t))
        else:
            sq = np.multiply(t, t, out=t)
            total += float(np.einsum("i,i->", sq, weights[start:stop]))
    return total


def mean_sd_effective_n(
    values: NDArray[np.float64], weights: NDArray[np.float64] | None = None
) -> tuple[float, float, float]:
    """(mean, sd, effective n) of per-row values, shape (n,), for a normal interval.

    Unweighted: the mean, the sample sd (ddof=1) and n. Weighted: the weighted mean, the
    weighted sd with the small-sample factor n_eff / (n_eff - 1), and Kish's effective n
    ``(sum w)^2 / sum w^2``. The sd is NaN below an effective n of 2. Computed in blocks
    (two passes, no temporary of n rows), so it costs two reads of ``values``.
    """
    if weights is None:
        n = values.size
        mean = float(values.mean())
        if n < 2:
            return mean, math.nan, float(n)
        ssd = _sum_sq_dev(values, mean, None)
        return mean, sd_from_sum_of_squares(ssd, float(n), float(n), False), float(n)
    wsum = float(weights.sum())
    mean = float(np.einsum("i,i->", weights, values)) / wsum
    n_eff = wsum * wsum / float(np.einsum("i,i->", weights, weights))
    if n_eff < 2:
        return mean, math.nan, n_eff
    ssd = _sum_sq_dev(values, mean, weights)
    return mean, sd_from_sum_of_squares(ssd, wsum, n_eff, True), n_eff


def sd_from_sum_of_squares(
    ssd: float, weight_sum: float, n_effective: float, weighted: bool
) -> float:
    """The sd of ``mean_sd_effective_n`` from ssd = sum_i w_i (v_i - mean)^2.

    Unweighted (``weight_sum`` = ``n_effective`` = n): sqrt(ssd / (n - 1)). Weighted: the
    weighted variance ssd / sum w times Kish's small-sample factor n_eff / (n_eff - 1).
    NaN below an effective n of 2.
    """
    if n_effective < 2:
        return math.nan
    if not weighted:
        return math.sqrt(ssd / (n_effective - 1.0))
    return math.sqrt(ssd / weight_sum * n_effective / (n_effective - 1.0))


def linearized_interval(
    point: float,
    influence: NDArray[np.float64],
    weights: NDArray[np.float64] | None = None,
    level: float = 0.95,
    method: str = "delta",
) -> Interval:
    """Normal interval ``point +/- z * sd(influence) / sqrt(n)`` from per-row influence values.

    The delta method (a first-order Taylor expansion of a smooth function of means) gives
    the large-sample standard error of the function as the standard error of the mean of
    its per-row linearization; ``influence`` holds that linearization, shape (n,). With
    weights, the weighted sd and Kish's effective n are used, as in ``normal_interval``.
    """
    _, sd, n_eff = mean_sd_effective_n(influence, weights)
    if n_eff < 2 or not math.isfinite(sd):
        return no_interval(level, "needs an effective sample size of at least two rows")
    return normal_from_moments(point, sd, n_eff, level, method)


def delta_ratio_interval(
    numerator_values: NDArray[np.float64],
    denominator_values: NDArray[np.float64],
    weights: NDArray[np.float64] | None = None,
    level: float = 0.95,
) -> Interval:
    """Delta-method interval for a ratio of means ``R = mean(a) / mean(b)``.

    The linearization of R at row i is ``(a_i - R b_i) / mean(b)`` (the delta method for a
    ratio estimator; Cochran, Sampling Techniques, 3rd ed., chapter 6), so the standard
    error is that of the mean of those values: ``sd(a - R b) / (mean(b) sqrt(n))``, with
    Kish's effective n and weighted moments when weights are given. ``a``, ``b``: shape (n,).
    """
    if weights is None:
        n_eff = float(numerator_values.size)
        a_mean = float(numerator_values.mean())
        b_mean = float(denominator_values.mean())
        wsum = n_eff
    else:
        wsum = float(weights.sum())
        n_eff = wsum * wsum / float(np.einsum("i,i->", weights, weights))
        a_mean = float(np.einsum("i,i->", weights, numerator_values)) / wsum
        b_mean = float(np.einsum("i,i->", weights, denominator_values)) / wsum
    if not b_mean > 0 or n_eff < 2:
        return delta_ratio_from_sums(a_mean, b_mean, math.nan, wsum, n_eff, False, level)
    ratio = a_mean / b_mean
    centre = a_mean - ratio * b_mean  # zero up to rounding
    ssd = _sum_sq_dev(numerator_values, centre, weights, denominator_values, ratio)
    return delta_ratio_from_sums(a_mean, b_mean, ssd, wsum, n_eff, weights is not None, level)


def delta_ratio_from_sums(
    a_mean: float,
    b_mean: float,
    ssd: float,
    weight_sum: float,
    n_effective: float,
    weighted: bool,
    level: float = 0.95,
) -> Interval:
    """``delta_ratio_interval`` from its moments, for callers that have them from sums.

    ``ssd`` = sum_i w_i (a_i - R b_i - c)^2 with R = a_mean / b_mean and c = a_mean -
    R b_mean (zero up to rounding); ``weight_sum`` = n and ``n_effective`` = n unweighted.
    """
    if not b_mean > 0:
        return no_interval(level, "the denominator's mean is zero")
    if n_effective < 2:
        return no_interval(level, "needs an effective sample size of at least two rows")
    ratio = a_mean / b_mean
    scale = (n_effective - 1.0) if not weighted else weight_sum * (n_effective - 1.0) / n_effective
    sd = math.sqrt(ssd / scale) / b_mean
    return normal_from_moments(ratio, sd, n_effective, level, "delta")


def monotone_interval(
    interval: Interval, func: Callable[[float], float], *, decreasing: bool = False, note: str = ""
) -> Interval:
    """Map an interval through a monotone function (e.g. RMSE = sqrt of the MSE interval).

    Coverage is preserved exactly by a monotone map; ``decreasing`` swaps the endpoints.
    """
    if interval.method == "none":
        return interval
    low, high = func(interval.low), func(interval.high)
    if decreasing:
        low, high = high, low
    return Interval(low, high, interval.level, interval.method, note or interval.note)


@functools.lru_cache(maxsize=256)
def order_statistic_ranks(n: int, quantile: float, level: float) -> tuple[int, int] | None:
    """0-based ranks (low, high) of the distribution-free interval for a population quantile.

    With B ~ Binomial(n, q) the number of rows below the q-quantile,
    P(X_(low) <= xi_q <= X_(high)) >= level when low = ppf(alpha/2) - 1 and
    high = isf(alpha/2) (0-based), alpha = 1 - level. These are the ranks
    ``scipy.stats.quantile_test(...).confidence_interval`` uses. Returns None when n is too
    small for the level (a rank would fall outside the sample).
    """
    if n < 1:
        return None
    alpha = (1.0 - level) / 2.0
    dist = stats.binom(n, quantile)
    low = int(dist.ppf(alpha)) - 1
    high = int(dist.isf(alpha))
    if low < 0 or high >= n:
        return None
    return low, high


def select_order_statistics(scratch: NDArray[np.float64], ranks: Sequence[int]) -> dict[int, float]:
    """Exact order statistics (0-based ranks) of ``scratch``, which is reordered in place.

    One ``ndarray.partition`` with a single pivot per distinct rank, each on the shrinking
    segment left by the previous one (a single-pivot partition is much faster in numpy than
    one call with several pivots); a rank at a segment's edge is a ``min`` or ``max``.
    """
    wanted = sorted(set(int(r) for r in ranks))
    n = scratch.size
    if wanted and (wanted[0] < 0 or wanted[-1] >= n):
        raise ValueError(f"ranks must lie in [0, {n - 1}], got {wanted}")
    found: dict[int, float] = {}
    stack: list[tuple[int, int, list[int]]] = [(0, n, wanted)]
    while stack:
        lo, hi, todo = stack.pop()
        if not todo:
            continue
        segment = scratch[lo:hi]
        if len(todo) == 1 and todo[0] == hi - 1:
            found[todo[0]] = float(segment.max())
            continue
        if len(todo) == 1 and todo[0] == lo:
            found[todo[0]] = float(segment.min())
            continue
        pivot = todo[len(todo) // 2]
        segment.partition(pivot - lo)
        found[pivot] = float(scratch[pivot])
        stack.append((lo, pivot, [r for r in todo if r < pivot]))
        stack.append((pivot + 1, hi, [r for r in todo if r > pivot]))
    return found


def weighted_quantile(
    values: NDArray[np.float64], weights: NDArray[np.float64], quantiles: Sequence[float]
) -> NDArray[np.float64]:
    """Inverse of the weighted empirical distribution function (``inverted_cdf``).

    For each q, the smallest value whose cumulative weight share reaches q (Hyndman & Fan
    1996, definition 1, with weights). Rows of zero weight never get selected.
    """
    order = np.argsort(values, kind="stable")
    cum = np.cumsum(weights[order])
    total = cum[-1]
    positive = weights[order] > 0
    sorted_values = values[order]
    out = np.empty(len(quantiles))
    for j, q in enumerate(quantiles):
        idx = int(np.searchsorted(cum, q * total, side="left"))
        idx = min(max(idx, 0), values.size - 1)
        while idx < values.size - 1 and not positive[idx]:
            idx += 1
        out[j] = sorted_values[idx]
    return out


def order_statistic_interval(
    values: NDArray[np.float64],
    quantile: float = 0.5,
    weights: NDArray[np.float64] | None = None,
    level: float = 0.95,
) -> Interval:
    """Distribution-free interval for a population quantile from the sample's order statistics.

    Unweighted: the binomial ranks of ``order_statistic_ranks`` (exact coverage >= level for
    continuous data, no distributional assumption). Weighted: Woodruff's interval (Woodruff
    1952, JASA 47): the weighted quantiles at q -/+ z * sqrt(q (1 - q) / n_eff), with Kish's
    effective n (a large-sample approximation of the same binomial argument).
    """
    if weights is None:
        ranks = order_statistic_ranks(values.size, quantile, level)
        if ranks is None:
            return no_interval(level, f"too few rows for a {level:g} order-statistic interval")
        found = select_order_statistics(values.astype(np.float64, copy=True), ranks)
        return Interval(found[ranks[0]], found[ranks[1]], level, "order_statistic")
    wsum = float(weights.sum())
    n_eff = wsum * wsum / float(np.einsum("i,i->", weights, weights))
    half = z_value(level) * math.sqrt(quantile * (1.0 - quantile) / n_eff)
    if quantile - half <= 0.0 or quantile + half >= 1.0:
        return no_interval(level, f"too few rows for a {level:g} order-statistic interval")
    low, high = weighted_quantile(values, weights, [quantile - half, quantile + half])
    return Interval(
        float(low), float(high), level, "order_statistic", "Woodruff (1952) with Kish's n"
    )


def _jackknife_index_groups(n: int, max_groups: int) -> list[NDArray[np.intp]]:
    """Leave-one-out index sets (n <= max_groups) or max_groups contiguous groups."""
    if n <= max_groups:
        return [np.array([i]) for i in range(n)]
    return np.array_split(np.arange(n), max_groups)


def bootstrap_interval(
    statistic: Callable[..., float],
    data: Sequence[NDArray[np.float64]],
    *,
    level: float = 0.95,
    n_resamples: int = 1000,
    method: str = "percentile",
    seed: int = DEFAULT_BOOTSTRAP_SEED,
    max_jackknife_groups: int = 1000,
) -> Interval:
    """Row-resampling bootstrap interval for a statistic of one or more aligned arrays.

    The fallback where no analytic interval applies. Every array in ``data`` has the same
    first dimension n and is resampled with the same row indices (a paired bootstrap).
    ``method`` is ``percentile`` or ``bca`` (Efron 1987, JASA 82); BCa's acceleration uses
    the leave-one-out jackknife when n <= ``max_jackknife_groups`` and leave-one-group-out
    (contiguous groups) above, to bound the cost. ``seed`` fixes the resamples so the same
    input always gives the same interval.
    """
    if method not in ("percentile", "bca"):
        raise ValueError(f"method must be 'percentile' or 'bca', got {method!r}")
    arrays = [np.asarray(d) for d in data]
    n = arrays[0].shape[0]
    if any(a.shape[0] != n for a in arrays):
        raise ValueError("every array in data must have the same number of rows")
    if n < 2:
        return no_interval(level, "needs at least two rows")
    rng = np.random.default_rng(seed)
    replicates = np.empty(n_resamples)
    with np.errstate(all="ignore"):
        for b in range(n_resamples):
            idx = rng.integers(0, n, n)
            replicates[b] = statistic(*(a[idx] for a in arrays))
        if method == "percentile":
            return percentile_interval(replicates, level)
        point = float(statistic(*arrays))
        groups = _jackknife_index_groups(n, max_jackknife_groups)
        jack = np.array(
            [statistic(*(np.delete(a, g, axis=0) for a in arrays)) for g in groups]
        )
    return bca_interval(replicates, point, jack, level)
