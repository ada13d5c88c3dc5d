"""From a submission request to a stored report: arrays, alignment, scoring core.

The HTTP layer computes no metric: it converts the request into aligned arrays with
``service.ingest`` and hands them to ``service.scoring``. It also chooses which per-row
loss to keep (``catalog``), which the core computes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from service.ingest import (
    Limits,
    align_ids,
    float_matrix,
    id_array,
    label_matrix,
    probability_tensor,
    submission_from_table,
    target_vector,
)
from service.scoring import ScoringOptions, catalog, to_jsonable
from service.scoring.classification import classification_report, classification_row_losses
from service.scoring.regression import regression_report_with_row_losses
from service.store import HoldoutArrays, HoldoutRecord

from .errors import ValidationFailed, problem_error

_MAX_EXAMPLES = 10


@dataclass(frozen=True)
class TrainInput:
    """The submitter's own training rows (m of them)."""

    y_true: NDArray  # (m,) float64 or class indices
    predictions: NDArray[np.float64] | None  # (K, m) regression
    labels: NDArray[np.intp] | None  # (K, m)
    probabilities: NDArray[np.float64] | None  # (K, m, C)


@dataclass(frozen=True)
class SubmissionInput:
    """A submission after conversion, already in the holdout's row order."""

    model: str
    predictions: NDArray[np.float64] | None  # (K, n) regression
    labels: NDArray[np.intp] | None  # (K, n) classification
    probabilities: NDArray[np.float64] | None  # (K, n, C)
    seeds: list[str]
    train: TrainInput | None
    sweep: tuple[str, float] | None
    reference: str | None = None  # the submission to compare with, as named by the request

    @property
    def n_seeds(self) -> int:
        for a in (self.predictions, self.labels, self.probabilities):
            if a is not None:
                return int(a.shape[0])
        return 0


def _seed_count(*arrays: NDArray | None, field: str) -> int:
    counts = {int(a.shape[0]) for a in arrays if a is not None}
    if len(counts) > 1:
        raise ValidationFailed(
            "The prediction sets disagree on the number of seeds.",
            [
                problem_error(
                    field,
                    f"seed counts differ: {sorted(counts)}; give the same K seeds "
                    "for predictions and probabilities",
                )
            ],
        )
    return counts.pop() if counts else 0


def _seed_labels(seeds: list[str] | None, n_seeds: int) -> list[str]:
    if seeds is None:
        return [str(k) for k in range(n_seeds)]
    if len(seeds) != n_seeds:
        raise ValidationFailed(
            "seeds must name each prediction set.",
            [problem_error("seeds", f"{len(seeds)} seed labels for {n_seeds} prediction sets")],
        )
    return seeds


def class_indices(values: NDArray, classes: list[str], field: str) -> NDArray[np.intp]:
    """Map canonical class strings (the submitter's own) to indices; 422 for unknown ones."""
    arr = pa.array(values, type=pa.string())
    index = pc.index_in(arr, value_set=pa.array(classes, type=pa.string()))
    unknown_mask = pc.is_null(index)
    n_unknown = int(pc.sum(unknown_mask).as_py() or 0)
    if n_unknown:
        examples = pc.unique(arr.filter(unknown_mask)).to_pylist()[:_MAX_EXAMPLES]
        raise ValidationFailed(
            f"{field} holds classes the holdout does not have.",
            [
                problem_error(
                    field,
                    f"{n_unknown} values are not among the classes {classes}",
                    n_unknown,
                    [str(e) for e in examples],
                )
            ],
        )
    return index.to_numpy(zero_copy_only=False).astype(np.intp)


def _train_from_json(train: dict[str, Any], holdout: HoldoutRecord, limits: Limits) -> TrainInput:
    task = holdout.task
    y = target_vector(train["y_true"], field="train.y_true", task=catalog.kind(task))
    m = int(y.shape[0])
    if task == catalog.REGRESSION:
        if train["probabilities"] is not None:
            raise ValidationFailed(
                "Regression has no probabilities.",
                [problem_error("train.probabilities", "regression takes no probabilities")],
            )
        if train["predictions"] is None:
            raise ValidationFailed(
                "train needs predictions.",
                [problem_error("train.predictions", "required with train.y_true")],
            )
        preds = float_matrix(
            train["predictions"], field="train.predictions", n_rows=m, limits=limits
        )
        return TrainInput(np.asarray(y, dtype=np.float64), preds, None, None)
    classes = holdout.classes or []
    y_idx = class_indices(y, classes, "train.y_true")
    labels = probs = None
    if train["predictions"] is not None:
        labels = label_matrix(
            train["predictions"],
            field="train.predictions",
            classes=classes,
            n_rows=m,
            limits=limits,
        )
    if train["probabilities"] is not None:
        probs = probability_tensor(
            train["probabilities"],
            field="train.probabilities",
            n_rows=m,
            n_classes=len(classes),
            limits=limits,
        )
    if labels is None and probs is None:
        raise ValidationFailed(
            "train needs predictions or probabilities.",
            [problem_error("train.predictions", "give train.predictions or train.probabilities")],
        )
    _seed_count(labels, probs, field="train")
    return TrainInput(y_idx, None, labels, probs)


def _check_kinds(holdout: HoldoutRecord, has_predictions: bool, has_probabilities: bool) -> None:
    errors = []
    metric = catalog.METRICS[holdout.policy["primary_metric"]]
    if holdout.task == catalog.REGRESSION:
        if not has_predictions:
            errors.append(problem_error("predictions", "required for a regression holdout"))
        if has_probabilities:
            errors.append(problem_error("probabilities", "regression takes no probabilities"))
    else:
        if not (has_predictions or has_probabilities):
            errors.append(problem_error("predictions", "give predictions, probabilities or both"))
        elif metric.needs_probabilities and not has_probabilities:
            errors.append(
                problem_error(
                    "probabilities",
                    f"this holdout ranks by {metric.name}, which needs class probabilities",
                )
            )
    if errors:
        raise ValidationFailed("The submission does not fit the holdout.", errors)


def from_json(
    data: dict[str, Any], holdout: HoldoutRecord, arrays: HoldoutArrays, limits: Limits
) -> SubmissionInput:
    """Convert a ``SubmissionCreate``-validated body; rows end in the holdout's order."""
    _check_kinds(holdout, data["predictions"] is not None, data["probabilities"] is not None)
    ids = id_array(data["ids"], field="ids", limits=limits)
    order = align_ids(arrays.ids, ids, field="ids")
    n = int(ids.shape[0])
    predictions = labels = probabilities = None
    if holdout.task == catalog.REGRESSION:
        predictions = float_matrix(
            data["predictions"], field="predictions", n_rows=n, limits=limits
        )[:, order]
    else:
        classes = holdout.classes or []
        if data["predictions"] is not None:
            labels = label_matrix(
                data["predictions"], field="predictions", classes=classes, n_rows=n, limits=limits
            )[:, order]
        if data["probabilities"] is not None:
            probabilities = probability_tensor(
                data["probabilities"],
                field="probabilities",
                n_rows=n,
                n_classes=len(classes),
                limits=limits,
            )[:, order, :]
    n_seeds = _seed_count(predictions, labels, probabilities, field="probabilities")
    train = None if data["train"] is None else _train_from_json(data["train"], holdout, limits)
    if train is not None:
        train_seeds = _seed_count(
            train.predictions, train.labels, train.probabilities, field="train"
        )
        if train_seeds != n_seeds:
            raise ValidationFailed(
                "train must hold the same seeds as the held-out predictions.",
                [
                    problem_error(
                        "train.predictions",
                        f"{train_seeds} training prediction sets for {n_seeds} seeds",
                    )
                ],
            )
    sweep = data["sweep"]
    return SubmissionInput(
        model=data["model"],
        predictions=predictions,
        labels=labels,
        probabilities=probabilities,
        seeds=_seed_labels(data["seeds"], n_seeds),
        train=train,
        sweep=None if sweep is None else (sweep["name"], float(sweep["complexity"])),
        reference=data.get("reference"),
    )


def from_table(
    fields: dict[str, Any],
    table: pa.Table,
    holdout: HoldoutRecord,
    arrays: HoldoutArrays,
    limits: Limits,
) -> SubmissionInput:
    """Convert a CSV/Parquet submission (column layout in ``service.ingest.tables``)."""
    # Rows come back in holdout order: each column is gathered once into place.
    parsed = submission_from_table(
        table,
        task=catalog.kind(holdout.task),
        classes=holdout.classes,
        limits=limits,
        holdout_ids=arrays.ids,
    )
    _check_kinds(
        holdout,
        parsed.predictions is not None or parsed.labels is not None,
        parsed.probabilities is not None,
    )
    predictions, labels, probabilities = parsed.predictions, parsed.labels, parsed.probabilities
    n_seeds = _seed_count(predictions, labels, probabilities, field="columns")
    sweep = None
    if fields.get("sweep_name") is not None:
        sweep = (fields["sweep_name"], float(fields["sweep_complexity"]))
    return SubmissionInput(
        model=fields["model"],
        predictions=predictions,
        labels=labels,
        probabilities=probabilities,
        seeds=_seed_labels(list(parsed.seeds) or None, n_seeds),
        train=None,
        sweep=sweep,
        reference=fields.get("reference"),
    )


@dataclass(frozen=True)
class Evaluation:
    """What a scored submission stores: the report and the per-row losses (sealed)."""

    report: dict[str, Any]  # JSON form of the core's Report
    primary_value: float | None
    row_loss: str
    row_losses: NDArray[np.float64]  # (n,) mean over seeds, holdout row order


def options_from(config: dict[str, Any]) -> ScoringOptions:
    return ScoringOptions(
        level=config["CONFIDENCE_LEVEL"], n_resamples=config["BOOTSTRAP_RESAMPLES"]
    )


def evaluate(
    holdout: HoldoutRecord, arrays: HoldoutArrays, sub: SubmissionInput, options: ScoringOptions
) -> Evaluation:
    """Score the submission with the core and compute its stored per-row losses."""
    metric = catalog.METRICS[holdout.policy["primary_metric"]]
    row_loss = metric.row_loss
    if holdout.task == catalog.REGRESSION:
        assert sub.predictions is not None
        # one pass gives the report and the stored per-row losses
        report, rows = regression_report_with_row_losses(
            arrays.labels,
            sub.predictions,
            train_y_true=None if sub.train is None else sub.train.y_true,
            train_predictions=None if sub.train is None else sub.train.predictions,
            options=options,
        )
    else:
        n_classes = len(holdout.classes or [])
        report = classification_report(
            arrays.labels,
            n_classes,
            labels=sub.labels,
            probabilities=sub.probabilities,
            train_y_true=None if sub.train is None else sub.train.y_true,
            train_labels=None if sub.train is None else sub.train.labels,
            train_probabilities=None if sub.train is None else sub.train.probabilities,
            options=options,
        )
        rows = classification_row_losses(
            arrays.labels,
            labels=sub.labels,
            probabilities=sub.probabilities,
            loss=row_loss,
            n_classes=n_classes,
        )
    value = report.scores.get(metric.name)
    primary_value = None if value is None or not math.isfinite(value) else float(value)
    return Evaluation(to_jsonable(report), primary_value, row_loss, np.asarray(rows, np.float64))


__all__ = [
    "Evaluation",
    "SubmissionInput",
    "TrainInput",
    "class_indices",
    "evaluate",
    "from_json",
    "from_table",
    "options_from",
]
