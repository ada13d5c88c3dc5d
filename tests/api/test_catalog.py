"""The metric catalog agrees with what the scoring core reports.

Reference for the directions: scikit-learn's naming law (``*_score`` higher is better,
``*_error`` / ``*_loss`` lower is better) and the core's own ``LOWER_IS_BETTER``.
"""

from __future__ import annotations

import numpy as np
import pytest

from service.scoring import catalog
from service.scoring.classification import LOWER_IS_BETTER, classification_report
from service.scoring.regression import regression_report


def _reports() -> dict[str, object]:
    rng = np.random.default_rng(0)
    y = rng.normal(size=30)
    p = y + rng.normal(size=(2, 30))
    out: dict[str, object] = {
        "regression": regression_report(y, p, train_y_true=y, train_predictions=p)
    }
    for task, c in (("binary", 2), ("multiclass", 3)):
        yc = np.arange(30) % c
        probs = rng.dirichlet(np.ones(c), size=(2, 30))
        out[task] = classification_report(
            yc, c, probabilities=probs, train_y_true=yc, train_probabilities=probs
        )
    return out


@pytest.fixture(scope="module")
def reports() -> dict[str, object]:
    return _reports()


@pytest.mark.parametrize("task", catalog.TASKS)
def test_catalog_names_exactly_the_reported_metrics(reports: dict, task: str) -> None:
    reported = set(reports[task].scores)
    assert {m.name for m in catalog.metrics_for(task)} == reported


def test_directions() -> None:
    for m in catalog.METRICS.values():
        if m.name.endswith(("_error", "_loss")) or m.name in ("mse", "rmse", "mae", "mape"):
            assert not m.higher_is_better, m.name
        if m.tasks & catalog.CLASSIFICATION:
            assert m.higher_is_better == (m.name not in LOWER_IS_BETTER), m.name
    assert catalog.ranking_key("rmse", 1.0) < catalog.ranking_key("rmse", 2.0)
    assert catalog.ranking_key("r2", 0.9) < catalog.ranking_key("r2", 0.1)
    assert catalog.ranking_key("r2", None) == catalog.ranking_key("rmse", float("nan"))


def test_row_losses_have_their_companions(reports: dict) -> None:
    for m in catalog.METRICS.values():
        spec = catalog.ROW_LOSSES[m.row_loss]
        for task in m.tasks:
            report = reports[task]
            assert spec.decomposition in report.bias_variance, (m.name, task)
            assert spec.train_score in report.train_scores, (m.name, task)


def test_primary_metric_rules() -> None:
    assert catalog.primary_metric("regression", None).name == "rmse"
    assert catalog.primary_metric("multiclass", None).name == "accuracy"
    with pytest.raises(ValueError, match="choose one of"):
        catalog.primary_metric("multiclass", "f1")  # binary only
    with pytest.raises(ValueError, match="one row's residual"):
        catalog.primary_metric("regression", "max_error")
    assert catalog.train_loss("zero_one", {"accuracy": 0.75}) == 0.25
    assert catalog.train_loss("squared", None) is None
