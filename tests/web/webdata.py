"""A holdout for the page tests, registered and submitted through the API.

The labels are scikit-learn's bundled diabetes targets; the predictions come from ridge
regressions fitted on bootstrap draws of the training half (several seeds), so every number
on the pages is the service's own score of real predictions.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sklearn.datasets import load_diabetes
from sklearn.linear_model import Ridge
from sklearn.model_selection import train_test_split

SECRET_KEY = "page-tests-" + "k" * 40
MARKUP_MODEL = '<img src=x onerror="alert(1)"><b>bold-model</b>'
"""A model name with markup: the pages must show it as text."""


@dataclass
class Scenario:
    holdout_id: str
    own: list[str] = field(default_factory=list)  # g1's submission ids
    other: list[str] = field(default_factory=list)  # g2's submission ids
    other_model: str = "g2-private-model"


def _bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def build(post: Any, owner: str, g1: str, g2: str) -> Scenario:
    """Register a holdout (owner) and submit a depth sweep (g1) and one model (g2).

    ``post(path, json=..., headers=...)`` returns ``(status, body)``.
    """
    X, y = load_diabetes(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.5, random_state=3)
    ids = [f"patient-{i:03d}" for i in range(y_te.size)]
    status, holdout = post(
        "/v1/holdouts",
        json={
            "name": "diabetes-half",
            "task": "regression",
            "ids": ids,
            "y_true": y_te.tolist(),
            "policy": {"primary_metric": "rmse", "guard": "ladder"},
        },
        headers=_bearer(owner),
    )
    assert status == 201, holdout
    scenario = Scenario(holdout["id"])
    rng = np.random.default_rng(0)
    for alpha, token, bucket, model in (
        (10.0, g1, scenario.own, "ridge-10"),
        (1.0, g1, scenario.own, "ridge-1"),
        (0.01, g1, scenario.own, MARKUP_MODEL),
        (0.1, g2, scenario.other, scenario.other_model),
    ):
        preds, train = [], []
        for _ in range(3):
            rows = rng.integers(0, y_tr.size, y_tr.size)
            fit = Ridge(alpha=alpha).fit(X_tr[rows], y_tr[rows])
            preds.append(fit.predict(X_te).tolist())
            train.append(fit.predict(X_tr).tolist())
        body = {
            "model": model,
            "ids": ids,
            "predictions": preds,
            "train": {"y_true": y_tr.tolist(), "predictions": train},
        }
        if token == g1:
            body["sweep"] = {"name": "inverse-alpha", "complexity": 1.0 / alpha}
        status, sub = post(
            f"/v1/holdouts/{holdout['id']}/submissions", json=body, headers=_bearer(token)
        )
        assert status == 201, sub
        bucket.append(sub["id"])
    return scenario


CSRF_INPUT = re.compile(r'name="csrf_token" value="([^"]+)"')


def csrf_of(html: str) -> str:
    found = CSRF_INPUT.search(html)
    assert found, "no CSRF field on the page"
    return found.group(1)
