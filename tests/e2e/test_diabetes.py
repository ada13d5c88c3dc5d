"""End to end on scikit-learn's diabetes data: five bootstrap-trained trees, submitted with
their training predictions; the bias-variance numbers returned equal the scoring core's, the
textbook formulas computed here with numpy, and mlxtend's decomposition.

References:
- ``service.scoring.regression.regression_report`` on the same arrays (the core);
- Geman, Bienenstock & Doursat (1992) / ESL 2nd ed. section 7.3, written out with numpy:
  expected loss = mean_k,i (p - y)^2, bias = mean_i (pbar - y)^2, variance = mean_i var_k(p);
- ``mlxtend.evaluate.bias_variance_decomp(loss="mse")`` with the same bootstrap draws (its
  ``np.random.RandomState(random_seed).choice`` draws, reproduced below) and estimator;
- ``sklearn.metrics.mean_squared_error`` for the headline MSE.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import orjson
import pytest
from mlxtend.evaluate import bias_variance_decomp
from sklearn.datasets import load_diabetes
from sklearn.metrics import mean_squared_error
from sklearn.model_selection import train_test_split
from sklearn.tree import DecisionTreeRegressor

from service.scoring import ScoringOptions, to_jsonable
from service.scoring.regression import regression_report

N_SEEDS = 5
RANDOM_SEED = 20


def _bootstrap_predictions() -> dict[str, Any]:
    X, y = load_diabetes(return_X_y=True)
    X_train, X_test, y_train, y_test = train_test_split(X, y, test_size=0.3, random_state=0)
    rng = np.random.RandomState(RANDOM_SEED)  # mlxtend's draws: one RandomState, in order
    test_pred, train_pred = [], []
    for _ in range(N_SEEDS):
        idx = rng.choice(np.arange(X_train.shape[0]), size=X_train.shape[0], replace=True)
        model = DecisionTreeRegressor(max_depth=4, random_state=0).fit(X_train[idx], y_train[idx])
        test_pred.append(model.predict(X_test))
        train_pred.append(model.predict(X_train))
    return {
        "X_train": X_train,
        "X_test": X_test,
        "y_train": y_train,
        "y_test": y_test,
        "test_pred": np.array(test_pred),
        "train_pred": np.array(train_pred),
    }


@pytest.fixture(scope="module")
def diabetes() -> dict[str, Any]:
    return _bootstrap_predictions()


def test_diabetes_bias_variance(
    diabetes: dict[str, Any], owner: Any, submitter: Any, app: Any
) -> None:
    d = diabetes
    y, p = d["y_test"], d["test_pred"]
    ids = [f"patient-{i}" for i in range(y.size)]
    r = owner.post(
        "/v1/holdouts",
        json={"name": "diabetes", "task": "regression", "ids": ids, "y_true": y.tolist()},
    )
    assert r.status_code == 201, r.get_json()
    holdout_id = r.get_json()["id"]
    order = np.random.default_rng(1).permutation(y.size)  # any row order
    body = {
        "model": "bagged-tree-depth-4",
        "ids": [ids[i] for i in order],
        "predictions": p[:, order].tolist(),
        "seeds": [f"bootstrap-{k}" for k in range(N_SEEDS)],
        "train": {"y_true": d["y_train"].tolist(), "predictions": d["train_pred"].tolist()},
    }
    r = submitter.post(f"/v1/holdouts/{holdout_id}/submissions", json=body)
    assert r.status_code == 201, r.get_json()
    # The owner's view holds the report on every holdout row (submitters see the feedback
    # slice only).
    out = owner.get(f"/v1/submissions/{r.get_json()['id']}").get_json()
    bv = out["bias_variance"]["squared"]

    # reference: the scoring core on the same arrays
    options = ScoringOptions(n_resamples=app.config["BOOTSTRAP_RESAMPLES"])
    report = regression_report(
        y, p, train_y_true=d["y_train"], train_predictions=d["train_pred"], options=options
    )
    expected = orjson.loads(orjson.dumps(to_jsonable(report)))
    assert out["bias_variance"] == expected["bias_variance"]
    assert out["flags"] == expected["flags"]
    assert out["train_scores"] == expected["train_scores"]

    # reference: the decomposition's defining formulas (Geman et al. 1992; ESL 7.3)
    pbar = p.mean(axis=0)
    assert bv["expected_loss"] == pytest.approx(np.mean((p - y) ** 2), rel=1e-12)
    assert bv["bias"] == pytest.approx(np.mean((pbar - y) ** 2), rel=1e-12)
    assert bv["variance"] == pytest.approx(np.mean(p.var(axis=0)), rel=1e-12)
    assert bv["expected_loss"] == pytest.approx(bv["bias"] + bv["variance"], rel=1e-12)

    # reference: mlxtend.evaluate.bias_variance_decomp, same draws and estimator
    loss, bias, var = bias_variance_decomp(
        DecisionTreeRegressor(max_depth=4, random_state=0),
        d["X_train"],
        d["y_train"],
        d["X_test"],
        y,
        loss="mse",
        num_rounds=N_SEEDS,
        random_seed=RANDOM_SEED,
    )
    assert bv["expected_loss"] == pytest.approx(loss, rel=1e-10)
    assert bv["bias"] == pytest.approx(bias, rel=1e-10)
    assert bv["variance"] == pytest.approx(var, rel=1e-10)

    # reference: sklearn.metrics.mean_squared_error, averaged over the seeds
    assert out["scores"]["mse"] == pytest.approx(
        np.mean([mean_squared_error(y, pk) for pk in p]), rel=1e-12
    )
    assert out["n_seeds"] == N_SEEDS and out["seeds"][0] == "bootstrap-0"
