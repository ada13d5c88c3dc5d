"""``details["per_seed"]`` of the classification report: each seed's metrics, one list per metric.

The seed-spread chart draws these values as dots, so each must be the metric of that seed's
predictions alone. Checked seed by seed against scikit-learn on scikit-learn's bundled
breast-cancer and wine data with tree models trained on bootstrap draws.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.model_selection import train_test_split
from sklearn.tree import DecisionTreeClassifier

from service.scoring.classification import classification_report

N_SEEDS = 4


def _bootstrap_probabilities(loader) -> tuple[np.ndarray, np.ndarray]:
    X, y = loader(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.4, random_state=0, stratify=y)
    rng = np.random.default_rng(5)
    probs = []
    for k in range(N_SEEDS):
        rows = rng.integers(0, X_tr.shape[0], X_tr.shape[0])
        model = DecisionTreeClassifier(max_depth=3, random_state=k).fit(X_tr[rows], y_tr[rows])
        p = np.zeros((X_te.shape[0], len(np.unique(y))))
        p[:, model.classes_] = model.predict_proba(X_te)
        probs.append(p)
    return y_te, np.array(probs)


@pytest.mark.parametrize("loader", [load_breast_cancer, load_wine], ids=["binary", "multiclass"])
def test_per_seed_metrics_match_sklearn(loader) -> None:
    y, probs = _bootstrap_probabilities(loader)
    n_classes = probs.shape[2]
    report = classification_report(y, n_classes, probabilities=probs)
    per_seed = report.details["per_seed"]
    assert set(per_seed) == set(report.scores)
    for name, values in per_seed.items():
        assert len(values) == N_SEEDS, name
        # the headline score is the mean over seeds of these values (report convention)
        assert report.scores[name] == pytest.approx(float(np.mean(values)), rel=1e-12)
    labels = range(n_classes)
    for k in range(N_SEEDS):
        pred = probs[k].argmax(axis=1)
        # reference: sklearn.metrics.accuracy_score
        assert per_seed["accuracy"][k] == pytest.approx(metrics.accuracy_score(y, pred))
        # reference: sklearn.metrics.balanced_accuracy_score
        assert per_seed["balanced_accuracy"][k] == pytest.approx(
            metrics.balanced_accuracy_score(y, pred)
        )
        # reference: sklearn.metrics.f1_score (macro)
        assert per_seed["f1_macro"][k] == pytest.approx(
            metrics.f1_score(y, pred, average="macro", zero_division=0)
        )
        # reference: sklearn.metrics.matthews_corrcoef
        assert per_seed["mcc"][k] == pytest.approx(metrics.matthews_corrcoef(y, pred))
        # reference: sklearn.metrics.cohen_kappa_score
        assert per_seed["cohen_kappa"][k] == pytest.approx(metrics.cohen_kappa_score(y, pred))
        # reference: sklearn.metrics.log_loss
        assert per_seed["log_loss"][k] == pytest.approx(
            metrics.log_loss(y, probs[k], labels=list(labels))
        )
        if n_classes == 2:
            # reference: sklearn.metrics.roc_auc_score on the positive-class probability
            assert per_seed["roc_auc"][k] == pytest.approx(metrics.roc_auc_score(y, probs[k, :, 1]))
        else:
            # reference: sklearn.metrics.roc_auc_score (one-vs-rest, macro)
            assert per_seed["roc_auc"][k] == pytest.approx(
                metrics.roc_auc_score(y, probs[k], multi_class="ovr", average="macro")
            )


def test_per_seed_with_labels_only() -> None:
    rng = np.random.default_rng(2)
    _, y = load_wine(return_X_y=True)
    labels = rng.integers(0, 3, size=(3, y.size))
    report = classification_report(y, 3, labels=labels)
    per_seed = report.details["per_seed"]
    assert "log_loss" not in per_seed
    for k in range(3):
        # reference: sklearn.metrics.accuracy_score and precision_score (weighted)
        assert per_seed["accuracy"][k] == pytest.approx(metrics.accuracy_score(y, labels[k]))
        assert per_seed["precision_weighted"][k] == pytest.approx(
            metrics.precision_score(y, labels[k], average="weighted", zero_division=0)
        )
