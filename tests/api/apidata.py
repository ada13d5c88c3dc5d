"""Holdout data for the API tests: distinctive labels, registered through the API.

Regression labels have 16-17 significant digits and class names are random-looking
strings, so a label found in a response cannot be there by chance. Row counts are primes
that no other dimension of a response takes (seeds, classes, metrics), so a list of that
length in a response would be a per-row array.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

N_REGRESSION = 107
N_CLASSIFICATION = 109
CLASSES = ["qx7-heron", "qx7-marten", "qx7-osprey"]
BINARY_CLASSES = ["zv3-negative", "zv3-positive"]
# For registration tests with a handful of rows: slices of one row, no Ladder (which needs two
# feedback rows). The default policy refuses slices under 30 rows.
TINY_POLICY = {"min_rows": 1, "guard": "none"}


@dataclass
class Holdout:
    id: str
    body: dict[str, Any]  # what was registered
    response: dict[str, Any]

    @property
    def ids(self) -> list[str]:
        return list(self.body["ids"])

    @property
    def y(self) -> list[Any]:
        return list(self.body["y_true"])


def regression_body(name: str = "prices", n: int = N_REGRESSION, seed: int = 7) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    y = (rng.normal(size=n) * 1000.0 + 5000.0 + rng.random(n) * 1e-9).tolist()
    ids = [f"row-{i:04d}" for i in rng.permutation(n)]
    return {"name": name, "task": "regression", "ids": ids, "y_true": y}


def classification_body(
    name: str = "species", n: int = N_CLASSIFICATION, classes: list[str] = CLASSES, seed: int = 11
) -> dict[str, Any]:
    rng = np.random.default_rng(seed)
    y = [classes[int(i)] for i in rng.integers(0, len(classes), size=n)]
    y[: len(classes)] = classes  # every class present
    ids = [f"item-{i:03d}" for i in rng.permutation(n)]
    task = "binary" if len(classes) == 2 else "multiclass"
    return {"name": name, "task": task, "ids": ids, "y_true": y, "classes": list(classes)}


def register(user: Any, body: dict[str, Any]) -> Holdout:
    r = user.post("/v1/holdouts", json=body)
    assert r.status_code == 201, r.get_json()
    return Holdout(r.get_json()["id"], body, r.get_json())


def regression_submission(
    holdout: Holdout, *, n_seeds: int = 3, seed: int = 1, shuffle: bool = True, **extra: Any
) -> tuple[dict[str, Any], np.ndarray]:
    """A submission body (ids shuffled) and its predictions in holdout row order (K, n)."""
    rng = np.random.default_rng(seed)
    y = np.asarray(holdout.y)
    preds = y + rng.normal(scale=300.0, size=(n_seeds, y.size))
    order = rng.permutation(y.size) if shuffle else np.arange(y.size)
    body = {
        "model": extra.pop("model", "forest"),
        "ids": [holdout.ids[i] for i in order],
        "predictions": preds[:, order].tolist(),
        **extra,
    }
    return body, preds


def probability_submission(
    holdout: Holdout, *, n_seeds: int = 2, seed: int = 3, shuffle: bool = True, **extra: Any
) -> tuple[dict[str, Any], np.ndarray]:
    """Probabilities (K, n, C) in holdout order, and the body with shuffled ids."""
    rng = np.random.default_rng(seed)
    classes = holdout.response["classes"]
    n = len(holdout.ids)
    probs = rng.dirichlet(np.ones(len(classes)), size=(n_seeds, n))
    order = rng.permutation(n) if shuffle else np.arange(n)
    body = {
        "model": extra.pop("model", "boosted"),
        "ids": [holdout.ids[i] for i in order],
        "probabilities": probs[:, order, :].tolist(),
        **extra,
    }
    return body, probs
