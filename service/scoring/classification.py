"""Classification metrics for K seeds of one model, with intervals, in the manner of sklearn.

Naming law (as ``sklearn.metrics``): ``*_score`` and bare metric names (``accuracy``,
``f1``, ``roc_auc``, ...) are higher-is-better; ``*_loss`` / ``*_error`` are
lower-is-better, and so are ``brier`` and ``ece`` (``LOWER_IS_BETTER`` lists them).

Conventions
-----------
- Classes are indices 0..C-1 in the holdout's stated class order. Binary means C == 2 and
  the positive class is index 1.
- Labels may be given, probabilities may be given, or both. Without labels, a seed's label
  is the argmax of its probabilities, ties to the smaller class index (for C == 2: class 1
  exactly when its probability exceeds class 0's). With both, label metrics use the given
  labels and probability metrics the probabilities.
- Metrics match ``sklearn.metrics`` (1.9) with its default arguments:

  * ``precision`` / ``recall`` / ``f1``: binary only, of the positive class
    (``average="binary"``). ``*_macro``: unweighted mean over the classes present in
    ``y_true`` or in the seed's labels (sklearn's default ``labels=None``); ``*_weighted``:
    mean weighted by each class's (weighted) support. A 0/0 ratio is 0, sklearn's
    ``zero_division="warn"`` value (we do not warn).
  * ``balanced_accuracy``: mean recall over the classes present in ``y_true``.
  * ``mcc``: 0.0 when its denominator is 0 (sklearn). ``cohen_kappa``: NaN when undefined
    (sklearn's ``replace_undefined_by=np.nan``), with a note in ``details``.
  * ``log_loss``: probabilities clipped into ``[eps, 1 - eps]``, ``eps`` of float64, as
    sklearn clips; no renormalization.
  * ``brier``: binary, ``brier_score_loss`` of the positive-class probability,
    ``mean (p1 - y)^2`` in [0, 1]; multiclass, sklearn's default for more than two classes
    (``scale_by_half="auto"``): ``mean sum_c (p_c - [y = c])^2`` in [0, 2].
  * ``roc_auc``: binary on the positive-class probability; multiclass one-vs-rest macro
    (``multi_class="ovr", average="macro"``). NaN (with a note) when ``y_true`` lacks a
    class, as sklearn returns NaN with a warning.
  * ``average_precision``: binary on the positive-class probability; multiclass macro over
    one-vs-rest columns. We differ from sklearn in one edge case: without positive rows
    sklearn returns 0.0 with a warning, we return NaN (with a note), since precision at
    any recall is undefined then and 0.0 would read as a real, bad score.
  * ``ece``: expected calibration error, common practice (Naeini, Cooper & Hauskrecht
    2015; Guo, Pleiss, Sun & Weinberger 2017): ``ECE_BINS`` = 15 equal-width bins of the
    top-class confidence ``max_c p_c``, bin ``b`` holding confidences in
    ``((b-1)/15, b/15]`` (the first bin includes 0; the binning of
    ``sklearn.calibration.calibration_curve(strategy="uniform")``), and
    ``ECE = sum_b (W_b / W) * |accuracy_b - mean confidence_b|`` where accuracy is that of
    the argmax label. Weighted by ``sample_weight``.

- Confusion matrices come from one ``np.bincount`` of ``y * C + label`` per seed (int64
  counts), and every count-based metric is computed in float64 from the counts, so
  nothing overflows at a million rows (integer MCC products of counts near 1e6 exceed
  2**63).
- ROC AUC, average precision and DeLong's variance come from one sort per seed and class
  (``_binary_curves``).

Intervals (``classification_report``)
-------------------------------------
- ``accuracy``: one seed, Wilson (1927); K seeds, the normal interval of the per-row mean
  correctness over seeds (the score is the mean over rows of that value).
- ``log_loss``, ``brier``: normal interval of the per-row loss averaged over seeds.
- Count-based metrics (balanced accuracy, precision/recall/F1 and their averages, MCC,
  kappa): bootstrap that draws the confusion-matrix cells from a multinomial with the
  observed cell shares: the same distribution as the cell counts of a row bootstrap, hence
  exact for these statistics, at a cost independent of n. Percentile or BCa (Efron 1987)
  per ``ScoringOptions.bootstrap_method``; BCa's jackknife removes one row of each cell,
  weighted by the cell's size (exactly the row jackknife). With sample weights a
  resampled cell's weight is its drawn count times the cell's mean weight plus a normal
  term for the spread of weights within the cell (a large-sample approximation of the
  weighted row bootstrap).
- ``roc_auc``: DeLong, DeLong & Clarke-Pearson (1988) variance, ``AUC +- z sd`` clipped to
  [0, 1]. Multiclass: the per-class intervals' endpoints averaged, conservative for the
  macro mean under any dependence between classes (Minkowski, as ``seed_mean_interval``).
- ``average_precision``: the logit interval of Boyd, Eng & Page (2013, ECML PKDD, "Area
  under the precision-recall curve: point estimates and confidence intervals"), from
  memory: ``expit(logit(AP) +- z / sqrt(n_pos AP (1 - AP)))`` with ``n_pos`` the
  (effective) number of positives; reported with ``method="delta"`` (it is the delta
  method on the logit scale). Its coverage is checked by simulation in the tests.
  Multiclass: endpoints averaged over classes as for AUC.
- ``ece``: no interval (see ``_ECE_NO_INTERVAL``).
- K > 1 for everything but accuracy, log loss and Brier: each seed's interval, combined
  with ``intervals.seed_mean_interval`` (conservative).

Every resampling uses ``ScoringOptions.seed``; each seed's bootstrap restarts from it, so
the intervals do not depend on the order of the seeds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from ._binary_curves import RankingStats, ranking_stats, roc_auc_placements
from ._checks import (
    ScoringInputError,
    as_class_indices,
    as_seed_probabilities,
    as_weights,
)
from .intervals import (
    no_interval,
    normal_interval,
    percentile_interval,
    seed_mean_interval,
    wilson_interval,
    z_value,
)
from .options import ScoringOptions
from .results import Decomposition, Interval, Report, Spread

__all__ = [
    "COUNT_METRICS",
    "ECE_BINS",
    "LOWER_IS_BETTER",
    "PROBABILITY_METRICS",
    "classification_report",
    "classification_row_losses",
    "confusion_matrices",
    "count_bootstrap_intervals",
    "expected_calibration_error",
    "metrics_from_confusion",
    "predicted_labels",
    "roc_auc_placements",
    "seed_metrics",
]

ECE_BINS = 15
"""Equal-width bins of the top-class confidence for ``ece`` (common practice)."""

LOWER_IS_BETTER = frozenset({"log_loss", "brier", "ece"})
"""Classification scores where lower is better; every other score is higher-is-better."""

COUNT_METRICS = (
    "accuracy",
    "balanced_accuracy",
    "precision",
    "recall",
    "f1",
    "precision_macro",
    "recall_macro",
    "f1_macro",
    "precision_weighted",
    "recall_weighted",
    "f1_weighted",
    "mcc",
    "cohen_kappa",
)
"""Metrics that are functions of the confusion matrix (``precision``, ``recall``, ``f1``
only for binary tasks)."""

PROBABILITY_METRICS = ("log_loss", "brier", "roc_auc", "average_precision", "ece")
"""Metrics that need class probabilities."""

_BINARY_ONLY = frozenset({"precision", "recall", "f1"})

_EPS = float(np.finfo(np.float64).eps)
"""Probability clip of ``sklearn.metrics.log_loss`` for float64 input."""

_ECE_NO_INTERVAL = (
    "no interval for ECE: the binned plug-in estimate is biased upward by sampling noise "
    "within bins (it is positive even for a perfectly calibrated model), so neither a "
    "normal nor a bootstrap interval around it would cover the true calibration error"
)

_LABEL_SOURCE_ARGMAX = "argmax of probabilities, ties to the smaller class index"


# ----------------------------------------------------------------------------- inputs


@dataclass(frozen=True)
class _Inputs:
    """Validated, canonical inputs: y (n,), labels (K, n), probabilities (K, n, C) or None."""

    y: NDArray[np.intp]
    n_classes: int
    labels: NDArray[np.intp]
    labels_given: bool
    probabilities: NDArray[np.float64] | None
    weights: NDArray[np.float64] | None

    @property
    def n_rows(self) -> int:
        return int(self.y.size)

    @property
    def n_seeds(self) -> int:
        return int(self.labels.shape[0])

    @property
    def binary(self) -> bool:
        return self.n_classes == 2


def _check_n_classes(n_classes: int) -> int:
    if isinstance(n_classes, bool) or not isinstance(n_classes, (int, np.integer)):
        raise ScoringInputError("n_classes", f"expected an integer, got {n_classes!r}")
    if n_classes < 2:
        raise ScoringInputError("n_classes", f"needs at least 2 classes, got {n_classes!r}")
    return int(n_classes)


def _as_y(y_true: ArrayLike, n_classes: int, name: str) -> NDArray[np.intp]:
    y = as_class_indices(y_true, n_classes, name=name)
    if y.ndim != 1:
        raise ScoringInputError(name, f"expected shape (n,), got {y.shape}")
    return y


def _as_seed_labels(labels: ArrayLike, n_rows: int, n_classes: int, name: str) -> NDArray[np.intp]:
    lab = as_class_indices(labels, n_classes, name=name)
    if lab.ndim == 1:
        lab = lab[np.newaxis]
    if lab.ndim != 2 or lab.shape[1] != n_rows:
        raise ScoringInputError(
            name, f"expected shape (n,) or (K, n) with n={n_rows}, got {lab.shape}"
        )
    return lab


def _prepare(
    y_true: ArrayLike,
    n_classes: int,
    labels: ArrayLike | None,
    probabilities: ArrayLike | None,
    sample_weight: ArrayLike | None,
    prefix: str = "",
) -> _Inputs:
    n_cls = _check_n_classes(n_classes)
    y = _as_y(y_true, n_cls, prefix + "y_true")
    n = y.size
    if labels is None and probabilities is None:
        raise ScoringInputError(
            prefix + "labels", "give labels, probabilities or both (neither was given)"
        )
    probs = None
    if probabilities is not None:
        probs = as_seed_probabilities(probabilities, n, n_cls, name=prefix + "probabilities")
    if labels is not None:
        lab = _as_seed_labels(labels, n, n_cls, prefix + "labels")
        if probs is not None and probs.shape[0] != lab.shape[0]:
            raise ScoringInputError(
                prefix + "labels",
                f"has {lab.shape[0]} seeds but {prefix}probabilities has {probs.shape[0]}; "
                "give one label set per probability set",
            )
    else:
        assert probs is not None
        lab = predicted_labels(probs)
    try:
        w = as_weights(sample_weight, n)
    except ScoringInputError as err:
        raise ScoringInputError(prefix + "sample_weight", err.message) from err
    return _Inputs(y, n_cls, lab, labels is not None, probs, w)


def _argmax_and_top(
    probabilities: NDArray[np.float64],
) -> tuple[NDArray[np.intp], NDArray[np.float64]]:
    """Argmax over the class axis (ties to the smaller index) and the top probability.

    A loop over the (few) class columns: numpy's reductions over a short last axis are
    several times slower than elementwise passes.
    """
    n_cls = probabilities.shape[-1]
    top = probabilities[..., 0].copy()
    arg = np.zeros(top.shape, dtype=np.intp)
    for c in range(1, n_cls):
        column = probabilities[..., c]
        better = column > top
        arg[better] = c
        np.maximum(top, column, out=top)
    return arg, top


def predicted_labels(probabilities: ArrayLike) -> NDArray[np.intp]:
    """Labels from probabilities: argmax over classes, ties to the smaller class index.

    Parameters
    ----------
    probabilities : array-like of shape (K, n, C) or (n, C)

    Returns
    -------
    ndarray of int, shape (K, n) (or (n,) for (n, C) input)
    """
    p = np.asarray(probabilities, dtype=np.float64)
    if p.ndim not in (2, 3):
        raise ScoringInputError(
            "probabilities", f"expected shape (n, C) or (K, n, C), got {p.shape}"
        )
    if p.shape[-1] == 2:
        return (p[..., 1] > p[..., 0]).astype(np.intp)
    return _argmax_and_top(p)[0]


# ------------------------------------------------------------------- confusion matrices


def _confusion(
    y: NDArray[np.intp],
    labels: NDArray[np.intp],
    n_classes: int,
    weights: NDArray[np.float64] | None,
) -> tuple[NDArray[np.int64], NDArray[np.float64] | None, NDArray[np.float64] | None]:
    """(K, C, C) row counts, and with weights the weighted counts and sums of squared weights.

    Entry [k, i, j] counts rows of true class i that seed k labels j (sklearn's layout).
    """
    n_seeds, n = labels.shape
    cc = n_classes * n_classes
    base = y * n_classes
    index = np.empty(n, dtype=np.intp)  # one n-long buffer, reused for every seed
    counts = np.empty((n_seeds, cc), dtype=np.int64)
    weighted = None if weights is None else np.empty((n_seeds, cc))
    squared = None if weights is None else np.empty((n_seeds, cc))
    w_sq = None if weights is None else weights * weights
    for k in range(n_seeds):
        np.add(base, labels[k], out=index)
        counts[k] = np.bincount(index, minlength=cc)
        if weighted is not None and squared is not None:
            weighted[k] = np.bincount(index, weights=weights, minlength=cc)
            squared[k] = np.bincount(index, weights=w_sq, minlength=cc)
    shape = (n_seeds, n_classes, n_classes)
    if weighted is None or squared is None:
        return counts.reshape(shape), None, None
    return counts.reshape(shape), weighted.reshape(shape), squared.reshape(shape)


def confusion_matrices(
    y_true: ArrayLike,
    labels: ArrayLike,
    n_classes: int,
    *,
    sample_weight: ArrayLike | None = None,
) -> NDArray[Any]:
    """One confusion matrix per seed, as ``sklearn.metrics.confusion_matrix`` lays it out.

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        True class indices in [0, n_classes).
    labels : array-like of int, shape (K, n) or (n,)
        Predicted class indices per seed.
    n_classes : int
    sample_weight : array-like of shape (n,), optional

    Returns
    -------
    ndarray of shape (K, C, C)
        Entry [k, i, j]: rows of true class i labelled j by seed k; int64 counts, or float64
        weighted counts with ``sample_weight``.
    """
    n_cls = _check_n_classes(n_classes)
    y = _as_y(y_true, n_cls, "y_true")
    lab = _as_seed_labels(labels, y.size, n_cls, "labels")
    w = as_weights(sample_weight, y.size)
    counts, weighted, _ = _confusion(y, lab, n_cls, w)
    return counts if weighted is None else weighted


def _per_class(cm: NDArray[np.float64]) -> dict[str, NDArray[np.float64]]:
    """Per-class precision, recall, F1 and support of (..., C, C) matrices (0/0 -> 0)."""
    tp = np.diagonal(cm, axis1=-2, axis2=-1)
    true_sum = cm.sum(axis=-1)
    pred_sum = cm.sum(axis=-2)
    both = true_sum + pred_sum
    with np.errstate(divide="ignore", invalid="ignore"):
        precision = np.where(pred_sum > 0, tp / pred_sum, 0.0)
        recall = np.where(true_sum > 0, tp / true_sum, 0.0)
        f1 = np.where(both > 0, 2.0 * tp / both, 0.0)
    return {"precision": precision, "recall": recall, "f1": f1, "support": true_sum}


def metrics_from_confusion(
    counts: ArrayLike, *, present: ArrayLike | None = None
) -> dict[str, NDArray[np.float64]]:
    """Every count-based metric of a stack of confusion matrices, vectorized.

    Parameters
    ----------
    counts : array-like of shape (..., C, C)
        Confusion matrices (true class on rows), counts or weighted counts.
    present : array-like of shape (..., C, C), optional
        Unweighted row counts, used only to decide which classes count as present for the
        macro averages (sklearn's ``labels=None``: classes seen in ``y_true`` or ``y_pred``,
        whatever their weight). Defaults to ``counts``.

    Returns
    -------
    dict of str to ndarray of shape (...)
        ``COUNT_METRICS`` (``precision``, ``recall``, ``f1`` only when C == 2), each equal
        to the ``sklearn.metrics`` function of the same name on the rows behind the counts.
        Computed in float64 from the counts: no integer overflow.
    """
    cm = np.asarray(counts, dtype=np.float64)
    n_cls = cm.shape[-1]
    pres = cm if present is None else np.asarray(present, dtype=np.float64)
    per = _per_class(cm)
    tp = np.diagonal(cm, axis1=-2, axis2=-1)
    true_sum = per["support"]
    pred_sum = cm.sum(axis=-2)
    n_correct = tp.sum(axis=-1)
    n_total = true_sum.sum(axis=-1)
    out: dict[str, NDArray[np.float64]] = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        out["accuracy"] = n_correct / n_total
        has_true = true_sum > 0
        out["balanced_accuracy"] = (per["recall"] * has_true).sum(axis=-1) / has_true.sum(
            axis=-1
        )
        if n_cls == 2:
            out["precision"] = per["precision"][..., 1]
            out["recall"] = per["recall"][..., 1]
            out["f1"] = per["f1"][..., 1]
        seen = (pres.sum(axis=-1) + pres.sum(axis=-2)) > 0
        n_seen = seen.sum(axis=-1)
        for name in ("precision", "recall", "f1"):
            out[name + "_macro"] = (per[name] * seen).sum(axis=-1) / n_seen
        for name in ("precision", "recall", "f1"):
            out[name + "_weighted"] = (per[name] * true_sum).sum(axis=-1) / n_total
        # sklearn.metrics.matthews_corrcoef, in float64
        cov_ytyp = n_correct * n_total - (true_sum * pred_sum).sum(axis=-1)
        cov_ypyp = n_total**2 - (pred_sum * pred_sum).sum(axis=-1)
        cov_ytyt = n_total**2 - (true_sum * true_sum).sum(axis=-1)
        product = cov_ypyp * cov_ytyt
        out["mcc"] = np.where(product == 0, 0.0, cov_ytyp / np.sqrt(product))
        # sklearn.metrics.cohen_kappa_score: 1 - observed / expected disagreement
        expected = pred_sum[..., :, np.newaxis] * true_sum[..., np.newaxis, :]
        expected = expected / n_total[..., np.newaxis, np.newaxis]
        off = 1.0 - np.eye(n_cls)
        disagree_expected = (off * expected).sum(axis=(-2, -1))
        disagree_observed = (off * cm).sum(axis=(-2, -1))
        out["cohen_kappa"] = np.where(
            disagree_expected == 0, np.nan, 1.0 - disagree_observed / disagree_expected
        )
    return out


# ---------------------------------------------------------------- probability metrics


def _row_mean(values: NDArray[np.float64], weights: NDArray[np.float64] | None) -> NDArray:
    """(Weighted) mean over the last axis, as ``np.average`` computes it."""
    if weights is None:
        return values.mean(axis=-1)
    return (values * weights).sum(axis=-1) / weights.sum()


def _true_class_probability(y: NDArray[np.intp], probs: NDArray[np.float64]) -> NDArray:
    """(..., n) probability given to the true class, from (..., n, C) probabilities."""
    if probs.shape[-1] == 2:
        return np.where(y == 1, probs[..., 1], probs[..., 0])
    index = y.reshape((1,) * (probs.ndim - 2) + (-1, 1))
    return np.take_along_axis(probs, index, axis=-1)[..., 0]


def _row_log_losses(y: NDArray[np.intp], probs: NDArray[np.float64]) -> NDArray[np.float64]:
    """(..., n) log loss on each row, clipped as sklearn clips, from (..., n, C)."""
    true_p = _true_class_probability(y, probs)
    np.clip(true_p, _EPS, 1.0 - _EPS, out=true_p)
    np.log(true_p, out=true_p)
    np.negative(true_p, out=true_p)
    return true_p


def _row_brier(y: NDArray[np.intp], probs: NDArray[np.float64]) -> NDArray[np.float64]:
    """(..., n) Brier loss on each row (binary: positive class; else summed over classes)."""
    if probs.shape[-1] == 2:
        diff = probs[..., 1] - y
        return np.multiply(diff, diff, out=diff)
    diff = probs.copy()
    index = y.reshape((1,) * (probs.ndim - 2) + (-1, 1))
    true_p = np.take_along_axis(diff, index, axis=-1)
    np.put_along_axis(diff, index, true_p - 1.0, axis=-1)
    np.multiply(diff, diff, out=diff)
    total = diff[..., 0].copy()
    for c in range(1, diff.shape[-1]):
        total += diff[..., c]
    return total


def _confidence_bins(confidence: NDArray[np.float64], n_bins: int) -> NDArray[np.intp]:
    """Bin of each confidence, equal to ``np.searchsorted(edges[1:-1], confidence)``.

    ``edges = np.linspace(0, 1, n_bins + 1)``; bin b holds ``(edges[b], edges[b + 1]]``.
    Arithmetic first guess (floor of ``confidence * n_bins``), then a one-step correction
    against the edges themselves (the guess can be one off only within rounding of an
    edge): several times faster than a
    binary search per value.
    """
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    edges[0], edges[-1] = -np.inf, np.inf
    bins = (confidence * n_bins).astype(np.intp)  # floor, as confidence >= 0
    np.minimum(bins, n_bins - 1, out=bins)
    bins -= confidence <= np.take(edges, bins)
    bins += confidence > np.take(edges[1:], bins)
    return bins


def _ece_one(
    y: NDArray[np.intp],
    top_label: NDArray,
    confidence: NDArray[np.float64],
    weights: NDArray[np.float64] | None,
    n_bins: int,
) -> float:
    """ECE of one seed from its argmax labels and top-class confidences (module docstring)."""
    bins = _confidence_bins(confidence, n_bins)
    correct = top_label == y
    if weights is None:
        # integer counts of (bin, correct) pairs: no float copy of the correctness
        code = bins * 2
        code += correct
        hits = np.bincount(code, minlength=2 * n_bins)[1::2]
        mass = np.bincount(bins, weights=confidence, minlength=n_bins)
        total = float(y.size)
    else:
        hits = np.bincount(bins, weights=np.where(correct, weights, 0.0), minlength=n_bins)
        mass = np.bincount(bins, weights=weights * confidence, minlength=n_bins)
        total = float(weights.sum())
    return float(np.abs(hits - mass).sum()) / total


def expected_calibration_error(
    y_true: ArrayLike,
    probabilities: ArrayLike,
    *,
    sample_weight: ArrayLike | None = None,
    n_bins: int = ECE_BINS,
) -> NDArray[np.float64]:
    """Expected calibration error of each seed's top-class confidence (lower is better).

    Says how far stated confidence is from achieved accuracy; 0 is perfectly calibrated.
    Binning as in the module docstring (equal width, ``(a, b]`` bins, common practice).

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
    probabilities : array-like of shape (K, n, C) or (n, C)
    sample_weight : array-like of shape (n,), optional
    n_bins : int, default 15

    Returns
    -------
    ndarray of shape (K,)
    """
    p = np.asarray(probabilities, dtype=np.float64)
    if p.ndim not in (2, 3):
        raise ScoringInputError(
            "probabilities", f"expected shape (n, C) or (K, n, C), got {p.shape}"
        )
    if isinstance(n_bins, bool) or not isinstance(n_bins, (int, np.integer)) or n_bins < 1:
        raise ScoringInputError("n_bins", f"expected a positive integer, got {n_bins!r}")
    n_cls = p.shape[-1]
    y = _as_y(y_true, max(n_cls, 2), "y_true")
    probs = as_seed_probabilities(p, y.size, n_cls)
    w = as_weights(sample_weight, y.size)
    return np.array([_ece_one(y, *_argmax_and_top(probs[k]), w, int(n_bins))
                     for k in range(probs.shape[0])])


# ------------------------------------------------------------------------ seed results


@dataclass
class _SeedStats:
    """Everything the report needs from one (y, labels, probabilities) set, per seed."""

    metrics: dict[str, NDArray[np.float64]]
    per_class: dict[str, NDArray[np.float64]]  # (K, C)
    counts: NDArray[np.int64]  # (K, C, C) row counts
    weighted: NDArray[np.float64] | None  # (K, C, C) weighted counts
    squared: NDArray[np.float64] | None  # (K, C, C) sums of squared weights
    ranking: list[list[RankingStats]] = field(default_factory=list)  # [seed][column]
    row_zero_one: NDArray[np.float64] | None = None  # (n,) mean over seeds
    row_log: NDArray[np.float64] | None = None
    row_brier: NDArray[np.float64] | None = None


def _seed_stats(inp: _Inputs, *, rows: bool) -> _SeedStats:
    """Per-seed metrics and, with ``rows``, per-row losses averaged over seeds.

    One pass per seed over n-long arrays: at a million rows a (K, n) temporary is tens of
    megabytes, which the allocator maps fresh (and the kernel zero-fills) every time, while
    n-long buffers are reused from the heap.
    """
    y, w = inp.y, inp.weights
    n_seeds, n_cls = inp.n_seeds, inp.n_classes
    counts, weighted, squared = _confusion(y, inp.labels, n_cls, w)
    cm = counts if weighted is None else weighted
    metrics = metrics_from_confusion(cm, present=counts)
    per_class = _per_class(np.asarray(cm, dtype=np.float64))
    stats_out = _SeedStats(metrics, per_class, counts, weighted, squared)
    if rows:
        wrong_rows = np.zeros(inp.n_rows, dtype=np.int64)
        for k in range(n_seeds):
            wrong_rows += inp.labels[k] != y
        stats_out.row_zero_one = wrong_rows / n_seeds
    probs = inp.probabilities
    if probs is None:
        return stats_out

    log_loss = np.empty(n_seeds)
    brier = np.empty(n_seeds)
    ece = np.empty(n_seeds)
    log_rows = np.zeros(inp.n_rows) if rows else None
    brier_rows = np.zeros(inp.n_rows) if rows else None
    columns = [1] if inp.binary else list(range(n_cls))
    positives = [y == c for c in columns]
    ranking: list[list[RankingStats]] = []
    for k in range(n_seeds):
        probs_k = probs[k]
        losses = _row_log_losses(y, probs_k)
        log_loss[k] = _row_mean(losses, w)
        if log_rows is not None:
            log_rows += losses
        losses = _row_brier(y, probs_k)
        brier[k] = _row_mean(losses, w)
        if brier_rows is not None:
            brier_rows += losses
        del losses
        ranking.append([
            ranking_stats(pos, probs_k[:, c], w)
            for pos, c in zip(positives, columns, strict=True)
        ])
        if inp.binary:
            top = np.maximum(probs_k[:, 0], probs_k[:, 1])
            arg = inp.labels[k] if not inp.labels_given else probs_k[:, 1] > probs_k[:, 0]
        else:
            arg, top = _argmax_and_top(probs_k)
        ece[k] = _ece_one(y, arg, top, w, ECE_BINS)
    metrics["log_loss"] = log_loss
    metrics["brier"] = brier
    if log_rows is not None and brier_rows is not None:
        stats_out.row_log = log_rows / n_seeds
        stats_out.row_brier = brier_rows / n_seeds

    stats_out.ranking = ranking
    auc = np.array([[r.roc_auc for r in seed] for seed in ranking])
    ap = np.array([[r.average_precision for r in seed] for seed in ranking])
    metrics["roc_auc"] = auc.mean(axis=1)  # NaN if any class's AUC is undefined (sklearn)
    metrics["average_precision"] = ap.mean(axis=1)
    if not inp.binary:
        per_class["roc_auc"] = auc
        per_class["average_precision"] = ap
    metrics["ece"] = ece
    return stats_out


def seed_metrics(
    y_true: ArrayLike,
    n_classes: int,
    *,
    labels: ArrayLike | None = None,
    probabilities: ArrayLike | None = None,
    sample_weight: ArrayLike | None = None,
) -> dict[str, NDArray[np.float64]]:
    """Every classification metric for each seed, vectorized over seeds.

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        True class indices in [0, n_classes).
    n_classes : int
        C >= 2; C == 2 is a binary task with positive class 1.
    labels : array-like of int, shape (K, n) or (n,), optional
        Predicted class per seed. Default: argmax of ``probabilities``.
    probabilities : array-like of shape (K, n, C) or (n, C), optional
        Class probabilities per seed (rows sum to 1). Enables the probability metrics.
    sample_weight : array-like of shape (n,), optional

    Returns
    -------
    dict of str to ndarray of shape (K,)
        ``COUNT_METRICS`` (``precision``/``recall``/``f1`` binary only) and, with
        probabilities, ``log_loss``, ``brier``, ``roc_auc``, ``average_precision``, ``ece``.
        Definitions and sklearn equivalents in the module docstring.
    """
    inp = _prepare(y_true, n_classes, labels, probabilities, sample_weight)
    return _seed_stats(inp, rows=False).metrics


def classification_row_losses(
    y_true: ArrayLike,
    *,
    labels: ArrayLike | None = None,
    probabilities: ArrayLike | None = None,
    loss: str = "log",
    n_classes: int | None = None,
) -> NDArray[np.float64]:
    """Per-row loss averaged over seeds, for paired comparisons, flags and storage.

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
    labels : array-like of int, shape (K, n) or (n,), optional
        Used by ``loss="zero_one"``; default: argmax of ``probabilities``.
    probabilities : array-like of shape (K, n, C) or (n, C), optional
        Required by ``"log"`` and ``"brier"``.
    loss : {"log", "brier", "zero_one"}
        ``log``: ``-log p_true`` clipped as ``sklearn.metrics.log_loss``; ``brier``:
        ``(p1 - y)^2`` for C == 2, ``sum_c (p_c - [y = c])^2`` otherwise (the scaling of
        the ``brier`` score); ``zero_one``: 1 where the label is wrong.
    n_classes : int, optional
        C; default: the probabilities' last axis, else ``max(y_true, labels) + 1`` (at
        least 2).

    Returns
    -------
    ndarray of shape (n,)
        The mean of these over rows (weighted by the caller's weights) is the headline
        score (``log_loss``, ``brier``, ``1 - accuracy``) averaged over seeds.
    """
    if loss not in ("log", "brier", "zero_one"):
        raise ScoringInputError(
            "loss", f"expected 'log', 'brier' or 'zero_one', got {loss!r}"
        )
    if loss != "zero_one" and probabilities is None:
        raise ScoringInputError("probabilities", f"loss={loss!r} needs probabilities")
    if n_classes is None:
        if probabilities is not None:
            n_classes = int(np.shape(probabilities)[-1])
        else:
            y_arr = np.asarray(y_true)
            lab_arr = np.asarray(labels)
            top = max(int(y_arr.max()) if y_arr.size else 0,
                      int(lab_arr.max()) if lab_arr.size else 0)
            n_classes = max(2, top + 1)
    inp = _prepare(
        y_true, n_classes, labels if loss == "zero_one" else None, probabilities, None
    )
    if loss == "zero_one":
        return (inp.labels != inp.y).sum(axis=0) / inp.n_seeds
    assert inp.probabilities is not None
    if loss == "log":
        return _row_log_losses(inp.y, inp.probabilities).mean(axis=0)
    return _row_brier(inp.y, inp.probabilities).mean(axis=0)


# -------------------------------------------------------------------------- intervals


def _bca_weighted_jackknife(
    replicates: NDArray[np.float64],
    point: float,
    jackknife: NDArray[np.float64],
    multiplicity: NDArray[np.float64],
    level: float,
) -> Interval:
    """``intervals.bca_interval`` with a jackknife given as distinct values and multiplicities.

    Equal to ``bca_interval(replicates, point, np.repeat(jackknife, multiplicity), level)``
    without building the n-long array.
    """
    if not np.isfinite(jackknife).all():
        return percentile_interval(replicates, level)
    finite = replicates[np.isfinite(replicates)]
    if finite.size < 2 or not math.isfinite(point):
        return no_interval(level, "bootstrap replicates are undefined")
    share_below = (
        np.count_nonzero(finite < point) + 0.5 * np.count_nonzero(finite == point)
    ) / finite.size
    share_below = min(max(share_below, 1.0 / (finite.size + 1)), finite.size / (finite.size + 1))
    z0 = float(stats.norm.ppf(share_below))
    mean = float(np.dot(multiplicity, jackknife)) / float(multiplicity.sum())
    dev = mean - jackknife
    denom = 6.0 * float(np.dot(multiplicity, dev**2)) ** 1.5
    accel = float(np.dot(multiplicity, dev**3)) / denom if denom > 0 else 0.0
    alpha = (1.0 - level) / 2.0
    quantiles = []
    for z_alpha in (stats.norm.ppf(alpha), stats.norm.ppf(1.0 - alpha)):
        adjusted = z0 + (z0 + z_alpha) / (1.0 - accel * (z0 + z_alpha))
        quantiles.append(float(stats.norm.cdf(adjusted)))
    low, high = np.quantile(finite, quantiles)
    return Interval(float(low), float(high), level, "bootstrap_bca")


def count_bootstrap_intervals(
    counts: NDArray[np.int64],
    options: ScoringOptions,
    *,
    weighted: NDArray[np.float64] | None = None,
    squared: NDArray[np.float64] | None = None,
    names: tuple[str, ...] | None = None,
) -> dict[str, Interval]:
    """Bootstrap intervals of count-based metrics from one confusion matrix.

    Draws ``options.n_resamples`` tables from Multinomial(n, observed cell shares): the
    distribution of the cell counts under the row bootstrap, so the intervals are those of
    the row bootstrap at O(C^2) cost per replicate.

    Parameters
    ----------
    counts : ndarray of int, shape (C, C)
        Row counts (true class on rows).
    options : ScoringOptions
        ``level``, ``n_resamples``, ``bootstrap_method``, ``seed``.
    weighted, squared : ndarray of shape (C, C), optional
        Weighted counts and sums of squared weights per cell, with sample weights.
    names : tuple of str, optional
        Metrics to return; default every ``metrics_from_confusion`` key.
    """
    level = options.level
    flat = np.asarray(counts, dtype=np.int64).reshape(-1)
    n_cls = int(round(math.sqrt(flat.size)))
    n_rows = int(flat.sum())
    rng = np.random.default_rng(options.seed)
    draws = rng.multinomial(n_rows, flat / n_rows, size=options.n_resamples)
    if weighted is None:
        replicate_tables = draws
        point_table = flat.astype(np.float64)
        mean_w = np.ones(flat.size)
    else:
        w_flat = np.asarray(weighted, dtype=np.float64).reshape(-1)
        sq_flat = np.asarray(squared, dtype=np.float64).reshape(-1)
        safe = np.maximum(flat, 1)
        mean_w = w_flat / safe
        var_w = np.maximum(sq_flat / safe - mean_w**2, 0.0)
        noise = rng.standard_normal(draws.shape)
        replicate_tables = draws * mean_w + np.sqrt(draws * var_w) * noise
        np.maximum(replicate_tables, 0.0, out=replicate_tables)
        point_table = w_flat
    shape = (n_cls, n_cls)
    point = metrics_from_confusion(point_table.reshape(shape), present=flat.reshape(shape))
    replicates = metrics_from_confusion(
        replicate_tables.reshape((-1, *shape)), present=draws.reshape((-1, *shape))
    )
    wanted = names if names is not None else tuple(point)
    jack = None
    if options.bootstrap_method == "bca":
        cells = np.flatnonzero(flat)
        loo = np.repeat(point_table[np.newaxis], cells.size, axis=0)
        loo[np.arange(cells.size), cells] -= mean_w[cells]
        loo_rows = np.repeat(flat[np.newaxis], cells.size, axis=0)
        loo_rows[np.arange(cells.size), cells] -= 1
        jack = metrics_from_confusion(
            loo.reshape((-1, *shape)), present=loo_rows.reshape((-1, *shape))
        )
        multiplicity = flat[cells].astype(np.float64)
    out: dict[str, Interval] = {}
    for name in wanted:
        value = float(point[name])
        if not math.isfinite(value):
            out[name] = no_interval(level, f"{name} is undefined on these rows")
        elif jack is None:
            out[name] = percentile_interval(replicates[name], level)
        else:
            out[name] = _bca_weighted_jackknife(
                replicates[name], value, jack[name], multiplicity, level
            )
    return out


def _auc_interval(seed_ranking: list[RankingStats], level: float) -> Interval:
    """DeLong interval of one seed's AUC; multiclass: class endpoints averaged."""
    lows, highs = [], []
    z = z_value(level)
    for r in seed_ranking:
        if not math.isfinite(r.roc_auc):
            return no_interval(level, "ROC AUC is undefined: y_true holds only one class")
        if not math.isfinite(r.roc_auc_variance):
            return no_interval(
                level, "DeLong's variance needs at least two rows of each class"
            )
        half = z * math.sqrt(max(r.roc_auc_variance, 0.0))
        lows.append(max(0.0, r.roc_auc - half))
        highs.append(min(1.0, r.roc_auc + half))
    return Interval(float(np.mean(lows)), float(np.mean(highs)), level, "delong")


def _ap_interval(seed_ranking: list[RankingStats], level: float) -> Interval:
    """Logit interval of one seed's average precision (Boyd, Eng & Page 2013)."""
    lows, highs = [], []
    z = z_value(level)
    for r in seed_ranking:
        ap = r.average_precision
        if not math.isfinite(ap):
            return no_interval(
                level, "average precision is undefined: a class has no positive rows"
            )
        if not 0.0 < ap < 1.0:
            return no_interval(
                level, f"average precision is {ap:g}: the logit interval is degenerate"
            )
        centre = math.log(ap / (1.0 - ap))
        half = z / math.sqrt(r.positive_effective * ap * (1.0 - ap))
        lows.append(1.0 / (1.0 + math.exp(-(centre - half))))
        highs.append(1.0 / (1.0 + math.exp(-(centre + half))))
    return Interval(float(np.mean(lows)), float(np.mean(highs)), level, "delta")


def _kish(weights: NDArray[np.float64]) -> float:
    return float(weights.sum()) ** 2 / float(np.dot(weights, weights))


def _intervals(inp: _Inputs, st: _SeedStats, options: ScoringOptions) -> dict[str, Interval]:
    level = options.level
    n_seeds = inp.n_seeds
    w = inp.weights
    out: dict[str, Interval] = {}

    accuracy = st.metrics["accuracy"]
    if n_seeds == 1:
        if w is None:
            out["accuracy"] = wilson_interval(float(st.counts[0].trace()), inp.n_rows, level)
        else:
            n_eff = _kish(w)
            out["accuracy"] = wilson_interval(float(accuracy[0]) * n_eff, n_eff, level)
    else:
        assert st.row_zero_one is not None
        out["accuracy"] = normal_interval(1.0 - st.row_zero_one, w, level)

    names = tuple(name for name in COUNT_METRICS if name != "accuracy" and name in st.metrics)
    per_seed: dict[str, list[Interval]] = {name: [] for name in names}
    for k in range(n_seeds):
        seed_out = count_bootstrap_intervals(
            st.counts[k],
            options,
            weighted=None if st.weighted is None else st.weighted[k],
            squared=None if st.squared is None else st.squared[k],
            names=names,
        )
        for name in names:
            per_seed[name].append(seed_out[name])
    for name in names:
        out[name] = seed_mean_interval(per_seed[name], level)

    if inp.probabilities is not None:
        assert st.row_log is not None and st.row_brier is not None
        out["log_loss"] = normal_interval(st.row_log, w, level)
        out["brier"] = normal_interval(st.row_brier, w, level)
        out["roc_auc"] = seed_mean_interval([_auc_interval(r, level) for r in st.ranking], level)
        out["average_precision"] = seed_mean_interval(
            [_ap_interval(r, level) for r in st.ranking], level
        )
        out["ece"] = no_interval(level, _ECE_NO_INTERVAL)
    return out


# ----------------------------------------------------------------------------- report


def _spread(values: NDArray[np.float64]) -> Spread:
    sd = float(values.std(ddof=1)) if values.size > 1 else 0.0
    return Spread(float(values.mean()), sd, float(values.min()), float(values.max()))


def _ensemble_inputs(inp: _Inputs) -> _Inputs:
    """The seed-combined prediction as a one-seed input."""
    if inp.probabilities is not None:
        mean = inp.probabilities.mean(axis=0)[np.newaxis]
        return _Inputs(inp.y, inp.n_classes, predicted_labels(mean), False, mean, inp.weights)
    n = inp.n_rows
    votes = np.bincount(
        (np.arange(n, dtype=np.intp) * inp.n_classes + inp.labels).reshape(-1),
        minlength=n * inp.n_classes,
    ).reshape(n, inp.n_classes)
    majority = votes.argmax(axis=1)[np.newaxis]  # first maximum: ties to the smallest index
    return _Inputs(inp.y, inp.n_classes, majority, True, None, inp.weights)


def _bias_variance(inp: _Inputs) -> dict[str, Decomposition]:
    from .decomposition import (
        log_loss_decomposition,
        squared_loss_decomposition,
        zero_one_decomposition,
    )

    out = {
        "zero_one": zero_one_decomposition(
            inp.y, inp.labels, n_classes=inp.n_classes, sample_weight=inp.weights
        )
    }
    probs = inp.probabilities
    if probs is not None:
        out["log"] = log_loss_decomposition(inp.y, probs, sample_weight=inp.weights)
        if inp.binary:
            # positive-class form: expected_loss equals the binary ``brier`` score
            out["squared"] = squared_loss_decomposition(
                inp.y.astype(np.float64), probs[..., 1], sample_weight=inp.weights
            )
        else:
            one_hot = np.zeros((inp.n_rows, inp.n_classes))
            one_hot[np.arange(inp.n_rows), inp.y] = 1.0
            out["squared"] = squared_loss_decomposition(
                one_hot, probs, sample_weight=inp.weights
            )
    return out


def _class_frequencies(y: NDArray[np.intp], n_classes: int, w: NDArray | None) -> NDArray:
    freq = np.bincount(y, weights=w, minlength=n_classes).astype(np.float64)
    return freq / freq.sum()


def _baseline_loss(
    y: NDArray[np.intp], w: NDArray[np.float64] | None, freq: NDArray[np.float64], loss: str
) -> float:
    """Loss of the trivial predictor: the class frequencies (log), or their mode (0-1)."""
    if loss == "log":
        per_row = -np.log(np.clip(freq, _EPS, 1.0 - _EPS))[y]
    else:
        per_row = (y != int(np.argmax(freq))).astype(np.float64)
    return float(np.average(per_row, weights=w))


def _details(
    inp: _Inputs, st: _SeedStats, ensemble: _Inputs, notes: list[str]
) -> dict[str, Any]:
    n_seeds = inp.n_seeds
    per_class = {
        name: values.mean(axis=0).tolist()
        for name, values in st.per_class.items()
        if name != "support"
    }
    per_class["support"] = st.counts[0].sum(axis=1).tolist()
    if inp.weights is not None:
        assert st.weighted is not None
        per_class["support_weight"] = st.weighted[0].sum(axis=1).tolist()
    cm = st.counts if st.weighted is None else st.weighted
    if n_seeds == 1:
        matrix = cm[0].tolist()
        kind = "counts" if st.weighted is None else "weighted counts"
    else:
        matrix = cm.mean(axis=0).tolist()
        kind = "mean over seeds of the " + (
            "counts" if st.weighted is None else "weighted counts"
        )
    details: dict[str, Any] = {
        "n_classes": inp.n_classes,
        "binary": inp.binary,
        "label_source": "given" if inp.labels_given else _LABEL_SOURCE_ARGMAX,
        "per_class": per_class,
        "confusion_matrix": matrix,
        "confusion_matrix_kind": kind + " (rows: true class, columns: predicted class)",
    }
    if inp.probabilities is not None:
        details["ece_bins"] = ECE_BINS
    if inp.binary and ensemble.probabilities is not None:
        from .decomposition import brier_partition

        details["brier_partition"] = brier_partition(
            inp.y, ensemble.probabilities[0, :, 1], sample_weight=inp.weights
        )
        details["brier_partition_of"] = (
            "the seed" if n_seeds == 1 else "the ensemble (mean of the seeds' probabilities)"
        )
    details["notes"] = notes
    return details


def _notes(inp: _Inputs, st: _SeedStats) -> list[str]:
    notes: list[str] = []
    metrics = st.metrics
    if "roc_auc" in metrics and np.isnan(metrics["roc_auc"]).any():
        notes.append(
            "roc_auc is undefined (NaN): y_true does not hold every class, and the AUC of a "
            "class against the rest needs rows of both (sklearn returns NaN with a warning)"
        )
    if "average_precision" in metrics and np.isnan(metrics["average_precision"]).any():
        notes.append(
            "average_precision is undefined (NaN): a class has no positive rows in y_true "
            "(sklearn returns 0.0 with a warning)"
        )
    if np.isnan(metrics["cohen_kappa"]).any():
        notes.append(
            "cohen_kappa is undefined (NaN) for a seed: y_true and its labels share a single "
            "class, so chance agreement is 1 (sklearn returns NaN with a warning)"
        )
    return notes


def classification_report(
    y_true: ArrayLike,
    n_classes: int,
    *,
    labels: ArrayLike | None = None,
    probabilities: ArrayLike | None = None,
    sample_weight: ArrayLike | None = None,
    train_y_true: ArrayLike | None = None,
    train_labels: ArrayLike | None = None,
    train_probabilities: ArrayLike | None = None,
    train_sample_weight: ArrayLike | None = None,
    options: ScoringOptions = ScoringOptions(),  # noqa: B008 (frozen, so safe to share)
) -> Report:
    """Score K seeds of a classifier on the held-out rows: metrics, intervals, bias-variance.

    Parameters
    ----------
    y_true : array-like of int, shape (n,)
        True class indices in [0, n_classes).
    n_classes : int
        C >= 2; C == 2 is binary with positive class 1.
    labels : array-like of int, shape (K, n) or (n,), optional
        Predicted classes per seed; default: argmax of ``probabilities``.
    probabilities : array-like of shape (K, n, C) or (n, C), optional
        Class probabilities per seed. At least one of labels and probabilities is needed.
    sample_weight : array-like of shape (n,), optional
    train_y_true, train_labels, train_probabilities, train_sample_weight : optional
        The same for the submitter's own training rows (any number of rows), for
        ``train_scores`` and the generalization-gap flag.
    options : ScoringOptions

    Returns
    -------
    Report
        ``task="classification"``. ``scores``: mean over seeds of each metric of
        ``seed_metrics``; ``intervals``: one per score (module docstring);
        ``seed_spread``; ``ensemble``: metrics of the mean probabilities (or of the
        majority vote of labels, ties to the smallest index, without probabilities);
        ``bias_variance``: ``zero_one`` always, ``log`` and ``squared`` (Brier, in the
        scaling of ``brier``) with probabilities, for K == 1 too; ``details``:
        ``n_classes``, per-class precision/recall/F1 (mean over seeds) and support,
        the confusion matrix (counts for K == 1, the mean over seeds for K > 1), Murphy's
        Brier partition (binary) of the ensemble forecast, whose ``brier`` is
        ``ensemble["brier"]`` (one partition, not K: grouping a million distinct forecasts
        costs a sort each), ``per_seed`` (each metric's K per-seed values, NaN where
        undefined), notes on undefined metrics; ``flags``
        on the primary loss: ``log`` with probabilities, else ``zero_one``.
    """
    inp = _prepare(y_true, n_classes, labels, probabilities, sample_weight)
    st = _seed_stats(inp, rows=True)
    metrics = st.metrics
    scores = {name: float(values.mean()) for name, values in metrics.items()}
    spread = {name: _spread(values) for name, values in metrics.items()}
    intervals = _intervals(inp, st, options)
    ensemble_inp = _ensemble_inputs(inp)
    ens = _seed_stats(ensemble_inp, rows=False).metrics
    ensemble = {name: float(values[0]) for name, values in ens.items()}
    bias_variance = _bias_variance(inp)
    notes = _notes(inp, st)
    details = _details(inp, st, ensemble_inp, notes)
    # Each seed's value of every metric (as regression's report): the seed-spread chart's dots.
    details["per_seed"] = {name: values.tolist() for name, values in metrics.items()}

    primary = "log" if inp.probabilities is not None else "zero_one"
    if primary == "log":
        assert st.row_log is not None
        test_rows = st.row_log
        seed_losses = metrics["log_loss"]
    else:
        assert st.row_zero_one is not None
        test_rows = st.row_zero_one
        seed_losses = 1.0 - metrics["accuracy"]

    train_scores = None
    train_rows = None
    train_inp = None
    if train_y_true is not None:
        train_inp = _prepare(
            train_y_true,
            inp.n_classes,
            train_labels,
            train_probabilities,
            train_sample_weight,
            prefix="train_",
        )
        train_st = _seed_stats(train_inp, rows=True)
        train_scores = {name: float(v.mean()) for name, v in train_st.metrics.items()}
        train_rows = train_st.row_log if primary == "log" else train_st.row_zero_one
    elif train_labels is not None or train_probabilities is not None:
        raise ScoringInputError(
            "train_y_true", "train labels or probabilities were given without train_y_true"
        )

    if train_inp is not None:
        freq = _class_frequencies(train_inp.y, inp.n_classes, train_inp.weights)
        baseline_train = _baseline_loss(train_inp.y, train_inp.weights, freq, primary)
    else:
        freq = _class_frequencies(inp.y, inp.n_classes, inp.weights)
        baseline_train = None
    baseline_test = _baseline_loss(inp.y, inp.weights, freq, primary)

    from .flags import overfitting_flags

    flags = overfitting_flags(
        loss=primary,
        test_row_losses=test_rows,
        train_row_losses=train_rows,
        baseline_test_loss=baseline_test,
        baseline_train_loss=baseline_train if train_rows is not None else None,
        decomposition=bias_variance[primary],
        seed_losses=seed_losses,
        sample_weight=inp.weights,
        train_sample_weight=(
            train_inp.weights if (train_inp is not None and train_rows is not None) else None
        ),
        thresholds=options.thresholds,
    )
    return Report(
        task="classification",
        n_rows=inp.n_rows,
        n_seeds=inp.n_seeds,
        scores=scores,
        intervals=intervals,
        seed_spread=spread,
        ensemble=ensemble,
        bias_variance=bias_variance,
        flags=flags,
        train_scores=train_scores,
        details=details,
    )
