"""Which metrics a holdout may rank by, and which way is better.

A pure table, no computation: for each metric name the scoring core reports, the tasks it
applies to, its direction (scikit-learn's naming law: ``*_score`` higher is better,
``*_error`` / ``*_loss`` lower is better; the short names here follow the same direction as
their scikit-learn functions), whether it needs class probabilities, whether its value is a
single row's residual, and the per-row loss whose seed-averaged values the service stores for
later paired comparisons and sweeps.

The service uses it to validate ``policy.primary_metric`` at registration, to refuse a
submission that cannot produce the primary metric (probabilities missing), and to rank
standings.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from types import MappingProxyType

REGRESSION = "regression"
BINARY = "binary"
MULTICLASS = "multiclass"
TASKS = (REGRESSION, BINARY, MULTICLASS)
CLASSIFICATION = frozenset({BINARY, MULTICLASS})


@dataclass(frozen=True)
class MetricInfo:
    """One metric of the scoring core's reports.

    ``row_loss`` names the per-row loss the service stores for a holdout ranked by this
    metric (``ROW_LOSSES``): the loss itself for a mean of per-row losses, the loss the
    metric is built on otherwise (squared error for every regression metric, the only
    per-row loss the regression core produces; zero-one for label metrics; Brier for
    ranking metrics, which need probabilities). ``reveals_row``: the value is one row's
    residual (an order statistic of the absolute errors: the maximum, or the median for an
    odd row count), so it is shown only to a holdout's owners and cannot rank it.
    """

    name: str
    tasks: frozenset[str]
    higher_is_better: bool
    needs_probabilities: bool
    row_loss: str
    description: str
    reveals_row: bool = False


def _m(
    name: str,
    tasks: frozenset[str] | set[str],
    higher: bool,
    probs: bool,
    row_loss: str,
    description: str,
    reveals_row: bool = False,
) -> MetricInfo:
    return MetricInfo(name, frozenset(tasks), higher, probs, row_loss, description, reveals_row)


_REG = {REGRESSION}
_BIN = {BINARY}
_CLS = set(CLASSIFICATION)

_METRICS = (
    _m("mse", _REG, False, False, "squared", "mean squared error"),
    _m("rmse", _REG, False, False, "squared", "square root of the mean squared error"),
    _m("mae", _REG, False, False, "squared", "mean absolute error"),
    _m(
        "median_absolute_error",
        _REG,
        False,
        False,
        "squared",
        "median absolute error",
        reveals_row=True,
    ),
    _m("max_error", _REG, False, False, "squared", "largest absolute error", reveals_row=True),
    _m("r2", _REG, True, False, "squared", "coefficient of determination"),
    _m("explained_variance", _REG, True, False, "squared", "explained variance"),
    _m("mape", _REG, False, False, "squared", "mean absolute percentage error (a fraction)"),
    _m("accuracy", _CLS, True, False, "zero_one", "share of rows predicted right"),
    _m("balanced_accuracy", _CLS, True, False, "zero_one", "mean recall over classes"),
    _m("precision", _BIN, True, False, "zero_one", "precision of the positive class"),
    _m("recall", _BIN, True, False, "zero_one", "recall of the positive class"),
    _m("f1", _BIN, True, False, "zero_one", "F1 of the positive class"),
    _m("precision_macro", _CLS, True, False, "zero_one", "precision, mean over classes"),
    _m("recall_macro", _CLS, True, False, "zero_one", "recall, mean over classes"),
    _m("f1_macro", _CLS, True, False, "zero_one", "F1, mean over classes"),
    _m("precision_weighted", _CLS, True, False, "zero_one", "precision, support-weighted"),
    _m("recall_weighted", _CLS, True, False, "zero_one", "recall, support-weighted"),
    _m("f1_weighted", _CLS, True, False, "zero_one", "F1, support-weighted"),
    _m("mcc", _CLS, True, False, "zero_one", "Matthews correlation coefficient"),
    _m("cohen_kappa", _CLS, True, False, "zero_one", "Cohen's kappa"),
    _m("log_loss", _CLS, False, True, "log", "mean negative log-likelihood"),
    _m(
        "brier",
        _CLS,
        False,
        True,
        "brier",
        "Brier score (binary: positive class; multiclass: summed over classes)",
    ),
    _m(
        "roc_auc",
        _CLS,
        True,
        True,
        "brier",
        "area under the ROC curve (multiclass: one-vs-rest macro average)",
    ),
    _m(
        "average_precision",
        _CLS,
        True,
        True,
        "brier",
        "average precision (multiclass: one-vs-rest macro average)",
    ),
    _m("ece", _CLS, False, True, "brier", "expected calibration error (15 bins)"),
)

METRICS: Mapping[str, MetricInfo] = MappingProxyType({m.name: m for m in _METRICS})
"""Every metric by name."""

REVEALS_ROW: frozenset[str] = frozenset(m.name for m in _METRICS if m.reveals_row)
"""Metrics whose value is a single row's residual (owners only)."""


@dataclass(frozen=True)
class RowLoss:
    """A per-row loss the service stores, and where the reports hold its companions.

    ``decomposition``: key of ``Report.bias_variance`` holding this loss's bias and
    variance; ``train_score``: key of ``Report.train_scores`` whose value is the mean of
    this loss on the training rows, or ``1 -`` that value when ``train_complement``
    (zero-one loss is ``1 - accuracy``).
    """

    name: str
    decomposition: str
    train_score: str
    train_complement: bool = False


ROW_LOSSES: Mapping[str, RowLoss] = MappingProxyType(
    {
        "squared": RowLoss("squared", "squared", "mse"),
        "zero_one": RowLoss("zero_one", "zero_one", "accuracy", train_complement=True),
        "log": RowLoss("log", "log", "log_loss"),
        "brier": RowLoss("brier", "squared", "brier"),
    }
)
"""The per-row losses, keyed by the names the scoring core's row-loss functions take."""


def train_loss(row_loss: str, train_scores: Mapping[str, float | None] | None) -> float | None:
    """Mean of ``row_loss`` on the training rows, read from a report's ``train_scores``."""
    if not train_scores:
        return None
    spec = ROW_LOSSES[row_loss]
    value = train_scores.get(spec.train_score)
    if value is None or not math.isfinite(value):
        return None
    return 1.0 - value if spec.train_complement else value


DEFAULT_PRIMARY_METRIC: Mapping[str, str] = MappingProxyType(
    {REGRESSION: "rmse", BINARY: "accuracy", MULTICLASS: "accuracy"}
)
"""Primary metric when a policy names none: one every submission can produce (accuracy needs
no probabilities; log loss would refuse label-only submissions)."""


def kind(task: str) -> str:
    """``regression`` or ``classification``: the task names the ingest and scoring layers use."""
    return REGRESSION if task == REGRESSION else "classification"


def metrics_for(task: str) -> list[MetricInfo]:
    """The metrics that apply to ``task``, in catalog order."""
    return [m for m in _METRICS if task in m.tasks]


def primary_metric(task: str, name: str | None) -> MetricInfo:
    """Validate a policy's primary metric for ``task`` (None: the task's default).

    Raises ``ValueError`` naming the metrics that do apply.
    """
    if task not in TASKS:
        raise ValueError(f"task must be one of {', '.join(TASKS)}; got {task!r}")
    chosen = DEFAULT_PRIMARY_METRIC[task] if name is None else name
    info = METRICS.get(chosen)
    allowed = ", ".join(m.name for m in metrics_for(task) if not m.reveals_row)
    if info is None or task not in info.tasks:
        raise ValueError(f"{chosen!r} is not a metric for task {task}; choose one of: {allowed}")
    if info.reveals_row:
        raise ValueError(
            f"{chosen!r} is one row's residual, which standings would reveal to every group; "
            f"choose one of: {allowed}"
        )
    return info


def ranking_key(metric: str, value: float | None) -> float:
    """Sort key, ascending = better; an undefined value (None, NaN) sorts last."""
    if value is None or not math.isfinite(value):
        return math.inf
    return -value if METRICS[metric].higher_is_better else value


__all__ = [
    "BINARY",
    "CLASSIFICATION",
    "DEFAULT_PRIMARY_METRIC",
    "METRICS",
    "MULTICLASS",
    "REGRESSION",
    "TASKS",
    "REVEALS_ROW",
    "ROW_LOSSES",
    "MetricInfo",
    "RowLoss",
    "kind",
    "metrics_for",
    "primary_metric",
    "ranking_key",
    "train_loss",
]
