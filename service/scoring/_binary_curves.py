"""Rank statistics of one score against one binary truth, from a single sort.

ROC AUC, average precision and DeLong's variance of the AUC all depend on the scores only
through their order and their ties. One ascending sort, grouped into runs of equal score
("tie groups"), gives per group the (weighted) number of positives and negatives; every
statistic is then a few vectorized passes over the groups:

- ROC AUC (Mann-Whitney form with midranks): each positive scores 1 for every negative
  below it and 1/2 for every negative tied with it; normalized by P * N. Equal to the
  trapezoidal area under the ROC curve, which is what ``sklearn.metrics.roc_auc_score``
  computes.
- Average precision as ``sklearn.metrics.average_precision_score`` defines it (no
  interpolation): the sum over distinct thresholds, from the highest score down, of
  (increase in recall) * (precision at that threshold).
- DeLong, DeLong & Clarke-Pearson (1988), Biometrics 44(3): the structural components
  are V10 (for a positive: its share of negatives below it, ties counting 1/2) and V01
  (for a negative: its share of positives above it, ties counting 1/2);
  ``var(AUC) = S10 / m + S01 / n`` with S10, S01 their sample variances (ddof=1). Both
  components are constant within a tie group, so they come from the group counts as in
  the midrank algorithm of Sun & Xu (2014), IEEE Signal Processing Letters 21(11),
  without a second or third sort.

Without sample weights the sort key packs the label into the lowest bit of the score's
IEEE-754 bit pattern (for non-negative doubles the bit pattern orders like the value),
so a plain ``np.sort`` of one uint64 array replaces ``argsort`` plus gathers. With
weights the rows are ordered with ``argsort``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray


@dataclass(frozen=True)
class RankingStats:
    """ROC AUC, average precision and DeLong's variance for one score column.

    ``roc_auc`` and ``roc_auc_variance`` are NaN when the truth has only one class (or a
    zero total weight on one side); ``average_precision`` is NaN without positives.
    ``positive_total`` / ``negative_total`` are the (weighted) class totals and
    ``positive_effective`` Kish's effective number of positives, ``(sum w)^2 / sum w^2``.
    """

    roc_auc: float
    average_precision: float
    roc_auc_variance: float
    positive_total: float
    negative_total: float
    positive_effective: float


def _group_starts(sorted_values: NDArray) -> NDArray[np.intp]:
    """Start index of every run of equal values in a sorted array."""
    n = sorted_values.size
    change = np.empty(n, dtype=bool)
    change[0] = True
    np.not_equal(sorted_values[1:], sorted_values[:-1], out=change[1:])
    return np.flatnonzero(change)


def _sorted_labels(
    positive: NDArray[np.bool_], scores: NDArray[np.float64]
) -> tuple[NDArray[np.bool_], NDArray[np.uint64]]:
    """Labels in ascending score order and the sorted score bit patterns, from one sort."""
    # +0.0 turns -0.0 into 0.0 so both share one bit pattern (and one tie group).
    key = (scores + 0.0).view(np.uint64) << np.uint64(1)
    key |= positive.view(np.uint8)
    key.sort()
    label = (key & np.uint64(1)).astype(bool)
    key >>= np.uint64(1)
    return label, key


def ranking_stats(
    positive: NDArray[np.bool_],
    scores: NDArray[np.float64],
    weights: NDArray[np.float64] | None = None,
) -> RankingStats:
    """ROC AUC, average precision and DeLong's AUC variance of ``scores`` for ``positive``.

    Parameters
    ----------
    positive : ndarray of bool, shape (n,)
        True where the row belongs to the positive class.
    scores : ndarray of float64, shape (n,)
        Non-negative finite scores (probabilities); higher means more positive.
    weights : ndarray of float64, shape (n,), optional
        Non-negative row weights.
    """
    if scores.size and float(scores.min()) < 0.0:
        raise ValueError("ranking_stats needs non-negative scores (probabilities)")
    if weights is not None:
        return _ranking_stats_weighted(positive, scores, weights)
    n = scores.size
    label, key = _sorted_labels(positive, scores)
    if n > 1 and bool((key[1:] == key[:-1]).any()):
        starts = _group_starts(key)
        sizes = np.diff(starts, append=n)
        pos_g = np.add.reduceat(label.astype(np.int64), starts)
        return _ranking_stats_grouped(pos_g, sizes - pos_g)
    # No ties: every row is its own group, and only the positions of the positives and
    # of the negatives in the sorted order matter. (Few, in-place passes: at a million
    # rows the cost is memory traffic and page faults of temporaries, not arithmetic.)
    del key
    pos_at = np.flatnonzero(label)
    np.logical_not(label, out=label)
    neg_at = np.flatnonzero(label)
    del label
    big_p, big_n = pos_at.size, neg_at.size
    if big_p == 0 or big_n == 0:
        return _one_class_stats(float(big_p), float(big_n), float(big_p))
    # AUC: the j-th positive (from 0) at sorted position i_j has i_j - j negatives below it
    auc = (int(pos_at.sum()) - big_p * (big_p - 1) // 2) / (float(big_p) * big_n)
    # AP: at the j-th positive's threshold, P - j positives among the n - i_j rows above
    precision = np.arange(big_p, 0, -1, dtype=np.float64)
    precision /= np.subtract(n, pos_at, dtype=np.float64)
    ap = float(precision.sum()) / big_p
    del precision
    # DeLong: V10 = (negatives below) / N, V01 = (positives above) / P
    pos_at -= np.arange(big_p)
    neg_at -= np.arange(big_n)  # positives below the k-th negative
    if big_p < 2 or big_n < 2:
        variance = math.nan
    else:
        variance = float(pos_at.var(ddof=1)) / (float(big_n) ** 2 * big_p) + float(
            neg_at.var(ddof=1)
        ) / (float(big_p) ** 2 * big_n)
    return RankingStats(auc, ap, variance, float(big_p), float(big_n), float(big_p))


def _ranking_stats_grouped(pos_i: NDArray[np.int64], neg_i: NDArray[np.int64]) -> RankingStats:
    """Unweighted statistics from per-tie-group counts (ascending score)."""
    big_p = int(pos_i.sum())
    big_n = int(neg_i.sum())
    if big_p == 0 or big_n == 0:
        return _one_class_stats(float(big_p), float(big_n), float(big_p))
    # exact integer arithmetic for the AUC numerator (2 * sum of positive placements)
    neg_below = np.cumsum(neg_i) - neg_i
    auc = int(np.dot(pos_i, 2 * neg_below + neg_i)) / (2.0 * big_p * big_n)
    pos_g = pos_i.astype(np.float64)
    neg_g = neg_i.astype(np.float64)
    pos_below = (np.cumsum(pos_i) - pos_i).astype(np.float64)
    neg_below_f = neg_below.astype(np.float64)
    ap = _average_precision(pos_g, pos_below, neg_below_f, float(big_p), float(big_n))
    variance = _delong_variance(
        auc, pos_g, neg_g, pos_g, neg_g, pos_below, neg_below_f, float(big_p), float(big_n)
    )
    return RankingStats(auc, ap, variance, float(big_p), float(big_n), float(big_p))


def _ranking_stats_weighted(
    positive: NDArray[np.bool_], scores: NDArray[np.float64], weights: NDArray[np.float64]
) -> RankingStats:
    """Weighted statistics: argsort, then per-tie-group weight totals."""
    s = scores + 0.0
    order = np.argsort(s)
    s_sorted = s[order]
    w_sorted = weights[order]
    is_pos = positive[order]
    starts = _group_starts(s_sorted)
    wpos = np.where(is_pos, w_sorted, 0.0)
    wneg = w_sorted - wpos
    pos_g = np.add.reduceat(wpos, starts)
    neg_g = np.add.reduceat(wneg, starts)
    pos_sq_g = np.add.reduceat(wpos * wpos, starts)
    neg_sq_g = np.add.reduceat(wneg * wneg, starts)
    p_total = float(pos_g.sum())
    n_total = float(neg_g.sum())
    pos_eff = p_total * p_total / float(pos_sq_g.sum()) if p_total > 0 else 0.0
    if p_total == 0 or n_total == 0:
        return _one_class_stats(p_total, n_total, pos_eff)
    neg_below = np.cumsum(neg_g) - neg_g
    pos_below = np.cumsum(pos_g) - pos_g
    auc = float(np.dot(pos_g, neg_below + 0.5 * neg_g)) / (p_total * n_total)
    ap = _average_precision(pos_g, pos_below, neg_below, p_total, n_total)
    variance = _delong_variance(
        auc, pos_g, neg_g, pos_sq_g, neg_sq_g, pos_below, neg_below, p_total, n_total
    )
    return RankingStats(auc, ap, variance, p_total, n_total, pos_eff)


def _average_precision(
    pos_g: NDArray[np.float64],
    pos_below: NDArray[np.float64],
    neg_below: NDArray[np.float64],
    p_total: float,
    n_total: float,
) -> float:
    """Thresholds from the top: at group g everything scored >= g is predicted positive."""
    tps = p_total - pos_below
    predicted = tps + (n_total - neg_below)
    # groups of zero-weight rows at the top predict nothing (0/0) and carry no positives
    precision = np.divide(tps, predicted, out=np.zeros_like(tps), where=predicted > 0)
    return float(np.dot(pos_g, precision)) / p_total


def _one_class_stats(p_total: float, n_total: float, pos_eff: float) -> RankingStats:
    """Only positives or only negatives: AUC undefined; AP is 1 with only positives."""
    ap = 1.0 if (p_total > 0 and n_total == 0) else math.nan
    return RankingStats(math.nan, ap, math.nan, p_total, n_total, pos_eff)


def _delong_variance(
    auc: float,
    pos_g: NDArray[np.float64],
    neg_g: NDArray[np.float64],
    pos_sq_g: NDArray[np.float64],
    neg_sq_g: NDArray[np.float64],
    pos_below: NDArray[np.float64],
    neg_below: NDArray[np.float64],
    p_total: float,
    n_total: float,
) -> float:
    """DeLong's variance from tie-group totals (see module docstring).

    Unweighted this is exactly ``S10 / m + S01 / n`` with ddof=1 sample variances. With
    weights each structural component is weighted like its row, and the ddof=1 correction
    uses Kish's effective sizes (a linearization of the weighted two-sample U-statistic).
    """
    v10 = (neg_below + 0.5 * neg_g) / n_total  # placement of a positive in group g
    pos_above = p_total - pos_below - pos_g
    v01 = (pos_above + 0.5 * pos_g) / p_total  # placement of a negative in group g
    sum_sq_pos = float(pos_sq_g.sum())
    sum_sq_neg = float(neg_sq_g.sum())
    m_eff = p_total * p_total / sum_sq_pos
    n_eff = n_total * n_total / sum_sq_neg
    if m_eff <= 1.0 + 1e-12 or n_eff <= 1.0 + 1e-12:
        return math.nan
    d10 = v10 - auc
    d01 = v01 - auc
    var10 = float(np.dot(pos_sq_g, d10 * d10)) / (p_total * p_total) * m_eff / (m_eff - 1.0)
    var01 = float(np.dot(neg_sq_g, d01 * d01)) / (n_total * n_total) * n_eff / (n_eff - 1.0)
    return var10 + var01


def roc_auc_placements(
    positive: NDArray[np.bool_], scores: NDArray[np.float64]
) -> tuple[float, NDArray[np.float64]]:
    """ROC AUC and every row's DeLong placement, in the rows' own order.

    A positive row's placement is its share of negatives scored below it (ties 1/2), a
    negative row's the share of positives scored above it (ties 1/2): the structural
    components V10 and V01 of DeLong et al. (1988). The mean placement of the positives
    (and of the negatives) equals the AUC. Two score columns on the same rows give
    paired placements, from which the covariance of their AUCs follows (DeLong's test).

    Returns NaN and an all-NaN array when only one class is present.
    """
    n = scores.size
    s = scores + 0.0
    order = np.argsort(s)
    s_sorted = s[order]
    is_pos = positive[order]
    starts = _group_starts(s_sorted)
    sizes = np.diff(starts, append=n)
    pos_g = np.add.reduceat(is_pos.astype(np.int64), starts)
    neg_g = sizes - pos_g
    big_p, big_n = int(pos_g.sum()), int(neg_g.sum())
    if big_p == 0 or big_n == 0:
        return math.nan, np.full(n, math.nan)
    neg_below = np.cumsum(neg_g) - neg_g
    pos_above = big_p - np.cumsum(pos_g)
    v10 = (neg_below + 0.5 * neg_g) / big_n
    v01 = (pos_above + 0.5 * pos_g) / big_p
    group_of_sorted = np.repeat(np.arange(starts.size), sizes)
    placement_sorted = np.where(is_pos, v10[group_of_sorted], v01[group_of_sorted])
    placement = np.empty(n)
    placement[order] = placement_sorted
    auc = int(np.dot(pos_g, 2 * neg_below + neg_g)) / (2.0 * big_p * big_n)
    return auc, placement
