"""Submissions: what the service returns is what the scoring core computes on the same rows.

References: the scoring core itself (``service.scoring.regression.regression_report``,
``classification.classification_report``, ``sweep.complexity_sweep``) called on the arrays
in holdout row order, and scikit-learn's metrics for the headline numbers.
"""

from __future__ import annotations

import gzip
import io
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from apidata import (
    BINARY_CLASSES,
    classification_body,
    probability_submission,
    register,
    regression_body,
    regression_submission,
)
from sklearn.metrics import accuracy_score, log_loss, mean_squared_error

from service.scoring import to_jsonable
from service.scoring.classification import classification_report, classification_row_losses
from service.scoring.guard import round_nested
from service.scoring.regression import regression_report, regression_row_losses
from service.scoring.sweep import SweepInput, complexity_sweep

REPORT_KEYS = (
    "scores",
    "intervals",
    "seed_spread",
    "ensemble",
    "bias_variance",
    "flags",
    "train_scores",
    "details",
)
RESULT_KEYS = {
    "id",
    "holdout_id",
    "group",
    "model",
    "task",
    "n_rows",
    "n_seeds",
    "seeds",
    "created_at",
    "primary_metric",
    "primary_value",
    "scores",
    "intervals",
    "seed_spread",
    "ensemble",
    "bias_variance",
    "flags",
    "train_scores",
    "details",
    "sweep",
    "fingerprint",
    "slice",
    "guard",
    "views",
    "verdict",
    "verdicts_by_slice",
}
DECIMALS = 4  # the default policy's: submitters see every number rounded to it


def _json(value: Any) -> Any:
    """The JSON round trip a response goes through (NaN -> null)."""
    return orjson.loads(orjson.dumps(to_jsonable(value)))


def _submit(user: Any, holdout_id: str, body: dict[str, Any]) -> dict[str, Any]:
    r = user.post(f"/v1/holdouts/{holdout_id}/submissions", json=body)
    assert r.status_code == 201, r.get_json()
    return r.get_json()


def test_regression_result_is_the_cores_report(
    options: Any, reg_holdout: Any, submitter: Any, owner: Any
) -> None:
    rng = np.random.default_rng(5)
    train_y = rng.normal(size=60) * 1000.0
    train_p = train_y + rng.normal(scale=100.0, size=(3, 60))
    body, preds = regression_submission(
        reg_holdout,
        seeds=["s1", "s2", "s3"],
        train={"y_true": train_y.tolist(), "predictions": train_p.tolist()},
    )
    out = _submit(submitter, reg_holdout.id, body)
    assert set(out) == RESULT_KEYS
    y = np.asarray(reg_holdout.y)
    # reference: the scoring core on the same arrays in holdout row order
    report = regression_report(
        y, preds, train_y_true=train_y, train_predictions=train_p, options=options
    )
    full = owner.get(f"/v1/submissions/{out['id']}").get_json()
    expected = _json(report)
    for key in REPORT_KEYS:
        assert full[key] == expected[key], key
    # reference: sklearn.metrics.mean_squared_error, averaged over seeds
    mse = np.mean([mean_squared_error(y, p) for p in preds])
    assert full["scores"]["mse"] == pytest.approx(mse, rel=1e-12)
    assert out["n_seeds"] == 3 and out["seeds"] == ["s1", "s2", "s3"]
    assert full["primary_metric"] == "rmse" and full["primary_value"] == full["scores"]["rmse"]
    assert out["group"] == "g1" and out["model"] == "forest" and out["task"] == "regression"
    assert full["n_rows"] == y.size and out["fingerprint"] == reg_holdout.response["fingerprint"]
    assert out["sweep"] is None
    # Submitters get the feedback slice's report (a group's first submission: the Ladder
    # reports it), every number rounded, without the single-row metrics.
    shown = round_nested(full["views"]["feedback"], DECIMALS)
    assert out["slice"] == "feedback" and out["n_rows"] == shown["n_rows"] < y.size
    assert out["primary_value"] == shown["scores"]["rmse"]
    for key in ("scores", "intervals", "seed_spread", "ensemble", "train_scores"):
        assert set(out[key]) == set(shown[key]) - {"max_error", "median_absolute_error"}
        assert {k: shown[key][k] for k in out[key]} == out[key]
    assert out["bias_variance"] == shown["bias_variance"] and out["flags"] == shown["flags"]


def test_one_flat_list_is_one_seed(
    options: Any, reg_holdout: Any, submitter: Any, owner: Any
) -> None:
    body, preds = regression_submission(reg_holdout, n_seeds=1)
    body["predictions"] = body["predictions"][0]
    out = _submit(submitter, reg_holdout.id, body)
    assert out["n_seeds"] == 1 and out["seeds"] == ["0"]
    report = regression_report(np.asarray(reg_holdout.y), preds[0], options=options)
    assert (
        owner.get(f"/v1/submissions/{out['id']}").get_json()["scores"]["mse"]
        == (report.scores["mse"])
    )


def test_stored_row_losses_are_the_cores(reg_holdout: Any, submitter: Any, store: Any) -> None:
    body, preds = regression_submission(reg_holdout, sweep={"name": "k", "complexity": 3})
    out = _submit(submitter, reg_holdout.id, body)
    [member] = store.sweep_members(reg_holdout.id, "g1", "k")
    assert member.submission.id == out["id"] and member.row_loss == "squared"
    # reference: service.scoring.regression.regression_row_losses (holdout row order)
    expected = regression_row_losses(np.asarray(reg_holdout.y), preds)
    np.testing.assert_array_equal(member.row_losses, expected)


def test_classification_result_is_the_cores_report(
    options: Any, cls_holdout: Any, submitter: Any, owner: Any
) -> None:
    body, probs = probability_submission(cls_holdout)
    classes = cls_holdout.response["classes"]
    labels = probs.argmax(axis=2)
    order = [cls_holdout.ids.index(i) for i in body["ids"]]
    body["predictions"] = [[classes[k] for k in seed[order]] for seed in labels]
    out = _submit(submitter, cls_holdout.id, body)
    y = np.array([classes.index(v) for v in cls_holdout.y])
    # reference: the scoring core on the same arrays
    report = classification_report(
        y, len(classes), labels=labels, probabilities=probs, options=options
    )
    full = owner.get(f"/v1/submissions/{out['id']}").get_json()
    expected = _json(report)
    shown = round_nested(full["views"]["feedback"], DECIMALS)
    for key in REPORT_KEYS:
        assert full[key] == expected[key], key
        assert out[key] == shown[key], key  # nothing to withhold for classification
    # reference: sklearn.metrics.accuracy_score and log_loss, averaged over seeds
    assert full["scores"]["accuracy"] == pytest.approx(
        np.mean([accuracy_score(y, lab) for lab in labels]), rel=1e-12
    )
    assert full["scores"]["log_loss"] == pytest.approx(
        np.mean([log_loss(y, p, labels=[0, 1, 2]) for p in probs]), rel=1e-9
    )
    assert out["primary_metric"] == "accuracy"


def test_class_labels_only(options: Any, owner: Any, submitter: Any, store: Any) -> None:
    # Owners see the full-set report; the feedback views are checked in test_guard_views.
    h = register(owner, classification_body("bin", classes=BINARY_CLASSES))
    rng = np.random.default_rng(2)
    labels = rng.integers(0, 2, size=(4, len(h.ids)))
    body = {
        "model": "votes",
        "ids": h.ids,
        "predictions": [[BINARY_CLASSES[k] for k in seed] for seed in labels],
    }
    out = owner.get(f"/v1/submissions/{_submit(submitter, h.id, body)['id']}").get_json()
    y = np.array([BINARY_CLASSES.index(v) for v in h.y])
    report = classification_report(y, 2, labels=labels, options=options)
    assert out["scores"] == _json(report.scores)
    assert set(out["bias_variance"]) == {"zero_one"}


def test_log_loss_holdout_requires_probabilities(
    options: Any, owner: Any, submitter: Any, store: Any
) -> None:
    body = {**classification_body(), "policy": {"primary_metric": "log_loss"}}
    h = register(owner, body)
    sub, probs = probability_submission(h, model="p")
    out = owner.get(f"/v1/submissions/{_submit(submitter, h.id, sub)['id']}").get_json()
    y = np.array([h.response["classes"].index(v) for v in h.y])
    assert (
        out["primary_value"]
        == classification_report(y, 3, probabilities=probs, options=options).scores["log_loss"]
    )
    [member] = [m for m in store.list_submissions(h.id)]
    assert member.primary_metric == "log_loss"
    del sub["probabilities"]
    sub["predictions"] = [h.response["classes"][0]] * len(h.ids)
    r = submitter.post(f"/v1/holdouts/{h.id}/submissions", json=sub)
    assert r.status_code == 422
    assert r.get_json()["errors"][0]["field"] == "probabilities"


def test_row_loss_follows_the_primary_metric(owner: Any, submitter: Any, store: Any) -> None:
    body = {**classification_body(), "policy": {"primary_metric": "brier"}}
    h = register(owner, body)
    sub, probs = probability_submission(h, sweep={"name": "s", "complexity": 1})
    _submit(submitter, h.id, sub)
    [member] = store.sweep_members(h.id, "g1", "s")
    y = np.array([h.response["classes"].index(v) for v in h.y])
    assert member.row_loss == "brier"
    # reference: service.scoring.classification.classification_row_losses
    np.testing.assert_array_equal(
        member.row_losses, classification_row_losses(y, probabilities=probs, loss="brier")
    )


def _problem_fields(r: Any) -> list[str]:
    assert r.status_code == 422, r.get_json()
    assert r.mimetype == "application/problem+json"
    return [e["field"] for e in r.get_json()["errors"]]


@pytest.mark.parametrize(
    "mutate, field",
    [
        (
            lambda b: {
                **b,
                "ids": b["ids"][:-1],
                "predictions": [p[:-1] for p in b["predictions"]],
            },
            "ids",
        ),
        (lambda b: {**b, "ids": [*b["ids"][:-1], "row-9999"]}, "ids"),
        (lambda b: {**b, "ids": [*b["ids"][:-1], b["ids"][0]]}, "ids"),
        (lambda b: {**b, "seeds": ["a", "b"]}, "seeds"),
        (lambda b: {**b, "seeds": ["a", "a", "b"]}, "seeds"),
        (lambda b: {**b, "predictions": None}, "predictions"),
        (lambda b: {**b, "probabilities": [[0.5, 0.5]] * len(b["ids"])}, "probabilities"),
        (
            lambda b: {**b, "predictions": [*b["predictions"][:-1], b["predictions"][-1][:-1]]},
            "predictions",
        ),
        (lambda b: {**b, "predictions": [[*p[:-1], "x"] for p in b["predictions"]]}, "predictions"),
        (lambda b: {**b, "train": {"y_true": [1.0, 2.0]}}, "train.predictions"),
        (
            lambda b: {**b, "train": {"y_true": [1.0, 2.0], "predictions": [1.0, 2.5, 3.0]}},
            "train.predictions",
        ),
        (lambda b: {**b, "sweep": {"name": "x"}}, "sweep.complexity"),
        (lambda b: {**b, "model": ""}, "model"),
        (lambda b: {**b, "colour": "red"}, "colour"),
        (lambda b: {k: v for k, v in b.items() if k != "ids"}, "ids"),
    ],
)
def test_invalid_submissions_change_nothing(
    reg_holdout: Any, submitter: Any, mutate: Any, field: str
) -> None:
    body, _ = regression_submission(reg_holdout)
    r = submitter.post(f"/v1/holdouts/{reg_holdout.id}/submissions", json=mutate(body))
    assert field in _problem_fields(r)
    listing = submitter.get(f"/v1/holdouts/{reg_holdout.id}/submissions").get_json()
    assert listing["total"] == 0


def test_non_finite_numbers_are_refused(reg_holdout: Any, submitter: Any) -> None:
    body, _ = regression_submission(reg_holdout)
    path = f"/v1/holdouts/{reg_holdout.id}/submissions"
    # JSON has no infinity: orjson refuses the overflowing literal, so the body is malformed.
    raw = orjson.dumps(body)[:-1] + b',"sweep":{"name":"x","complexity":1e999}}'
    r = submitter.post(path, data=raw, content_type="application/json")
    assert r.status_code == 400 and r.mimetype == "application/problem+json"
    # Spelled as text, it is a well-formed body with a bad value.
    r = submitter.post(path, json={**body, "sweep": {"name": "x", "complexity": "Infinity"}})
    assert "sweep.complexity" in _problem_fields(r)


def test_classification_errors(cls_holdout: Any, submitter: Any) -> None:
    body, _ = probability_submission(cls_holdout)
    path = f"/v1/holdouts/{cls_holdout.id}/submissions"
    wrong_k = {**body, "predictions": [[cls_holdout.response["classes"][0]] * len(body["ids"])]}
    assert "probabilities" in _problem_fields(submitter.post(path, json=wrong_k))
    unknown = {**body, "predictions": ["qx7-dodo"] * len(body["ids"])}
    del unknown["probabilities"]
    r = submitter.post(path, json=unknown)
    assert "predictions" in _problem_fields(r)
    bad_train = {
        **body,
        "train": {
            "y_true": ["qx7-heron", "not-a-class"],
            "predictions": ["qx7-heron", "qx7-heron"],
        },
    }
    r = submitter.post(path, json=bad_train)
    assert "train.y_true" in _problem_fields(r)
    assert r.get_json()["errors"][0]["examples"] == ["not-a-class"]


def test_listing_and_paging(
    reg_holdout: Any, submitter: Any, other_submitter: Any, owner: Any
) -> None:
    made = []
    for k, user in enumerate([submitter, other_submitter, submitter, submitter]):
        body, _ = regression_submission(reg_holdout, seed=k, model=f"m{k}")
        made.append((user.group, _submit(user, reg_holdout.id, body)["id"]))
    path = f"/v1/holdouts/{reg_holdout.id}/submissions"
    everyone = owner.get(path).get_json()
    assert [s["id"] for s in everyone["submissions"]] == [i for _, i in made]
    assert everyone["total"] == 4
    mine = submitter.get(f"{path}?limit=2&offset=1").get_json()
    assert [s["id"] for s in mine["submissions"]] == [i for g, i in made if g == "g1"][1:3]
    assert mine["total"] == 3 and mine["limit"] == 2 and mine["offset"] == 1
    assert "limit" in _problem_fields(submitter.get(f"{path}?limit=0"))
    assert "page" in _problem_fields(submitter.get(f"{path}?page=2"))


def test_standings_rank_groups_by_the_primary_metric(
    reg_holdout: Any, make_user: Any, owner: Any
) -> None:
    y = np.asarray(reg_holdout.y)
    users = {g: make_user("submitter", g) for g in ("ga", "gb", "gc")}
    values: dict[str, list[float]] = {}
    for g, noise in (("ga", [900.0, 100.0]), ("gb", [300.0]), ("gc", [600.0, 2000.0])):
        for k, scale in enumerate(noise):
            body, preds = regression_submission(reg_holdout, seed=k, n_seeds=2)
            preds = y + (preds - y) * scale / 300.0
            body["predictions"] = preds[:, [reg_holdout.ids.index(i) for i in body["ids"]]].tolist()
            out = _submit(users[g], reg_holdout.id, body)
            values.setdefault(g, []).append(out["primary_value"])
    table = owner.get(f"/v1/holdouts/{reg_holdout.id}/standings").get_json()
    assert table["primary_metric"] == "rmse" and table["higher_is_better"] is False
    # Submitters saw rounded feedback values (the Ladder repeats a group's best when a
    # submission does not improve); owners see the exact feedback values of the same bests.
    best = {g: min(v) for g, v in values.items()}  # rmse: lower is better
    assert [e["group"] for e in table["entries"]] == sorted(best, key=best.get)
    assert [round(e["value"], DECIMALS) for e in table["entries"]] == sorted(best.values())
    assert [e["rank"] for e in table["entries"]] == [1, 2, 3]
    assert {e["group"]: e["n_submissions"] for e in table["entries"]} == {"ga": 2, "gb": 1, "gc": 2}
    for e in table["entries"]:
        assert e["interval"]["low"] <= e["value"] <= e["interval"]["high"]


def test_equal_values_share_a_rank(owner: Any, make_user: Any) -> None:
    h = register(owner, {**regression_body(), "policy": {"primary_metric": "r2"}})
    body, _ = regression_submission(h)
    for g in ("ga", "gb"):
        _submit(make_user("submitter", g), h.id, body)
    worse, _ = regression_submission(h, seed=99)
    worse["predictions"] = (np.asarray(worse["predictions"]) * 1.5).tolist()
    _submit(make_user("submitter", "gc"), h.id, worse)
    table = owner.get(f"/v1/holdouts/{h.id}/standings").get_json()
    assert table["higher_is_better"] is True
    assert [e["rank"] for e in table["entries"]] == [1, 1, 3]
    assert [e["group"] for e in table["entries"]] == ["ga", "gb", "gc"]  # earliest first


def test_sweep_is_the_cores_complexity_sweep(
    options: Any, reg_holdout: Any, submitter: Any, owner: Any
) -> None:
    y = np.asarray(reg_holdout.y)
    rng = np.random.default_rng(4)
    train_y = rng.normal(size=50)
    points = []
    ids_by_complexity = {}
    for complexity, scale in ((1, 900.0), (2, 400.0), (4, 350.0), (8, 800.0), (2, 500.0)):
        body, preds = regression_submission(reg_holdout, seed=complexity, n_seeds=3)
        preds = y + (preds - y) * scale / 300.0
        body["predictions"] = preds[:, [reg_holdout.ids.index(i) for i in body["ids"]]].tolist()
        train_p = train_y + rng.normal(scale=1.0 / complexity, size=(3, 50))
        body["train"] = {"y_true": train_y.tolist(), "predictions": train_p.tolist()}
        body["sweep"] = {"name": "depth", "complexity": complexity}
        ids_by_complexity[float(complexity)] = _submit(submitter, reg_holdout.id, body)["id"]
        # reference: the core's row losses, decomposition and train MSE on the same arrays
        report = regression_report(
            y, preds, train_y_true=train_y, train_predictions=train_p, options=options
        )
        points = [p for p in points if p.complexity != complexity]  # the latest one counts
        points.append(
            SweepInput(
                float(complexity),
                regression_row_losses(y, preds),
                report.bias_variance["squared"].bias,
                report.bias_variance["squared"].variance,
                report.train_scores["mse"],
            )
        )
    expected = _json(complexity_sweep(points, loss="squared"))
    # Owners see the curve on all rows by default (submitters' feedback curves: test_guard_views).
    out = owner.get(f"/v1/holdouts/{reg_holdout.id}/sweeps/depth?group=g1").get_json()
    assert out["loss"] == "squared" and out["group"] == "g1" and out["name"] == "depth"
    assert out["best_complexity"] == expected["best_complexity"]
    assert out["one_se_complexity"] == expected["one_se_complexity"]
    assert [{k: p[k] for k in expected["points"][0]} for p in out["points"]] == expected["points"]
    assert [p["submission_id"] for p in out["points"]] == [
        ids_by_complexity[p["complexity"]] for p in out["points"]
    ]
    # Owners name the group; without it the request is incomplete.
    path = f"/v1/holdouts/{reg_holdout.id}/sweeps/depth"
    assert out["slice"] == "full" and submitter.get(path).get_json()["slice"] == "feedback"
    assert "group" in _problem_fields(owner.get(path))
    assert owner.get(f"{path}?group=g9").status_code == 404
    assert submitter.get(f"/v1/holdouts/{reg_holdout.id}/sweeps/width").status_code == 404


def test_gzip_json_body(options: Any, reg_holdout: Any, submitter: Any, owner: Any) -> None:
    body, preds = regression_submission(reg_holdout)
    r = submitter.post(
        f"/v1/holdouts/{reg_holdout.id}/submissions",
        data=gzip.compress(orjson.dumps(body)),
        headers={"Content-Encoding": "gzip", "Content-Type": "application/json"},
    )
    assert r.status_code == 201, r.get_json()
    report = regression_report(np.asarray(reg_holdout.y), preds, options=options)
    full = owner.get(f"/v1/submissions/{r.get_json()['id']}").get_json()
    assert full["scores"]["mse"] == report.scores["mse"]


def _prediction_table(holdout: Any, body: dict[str, Any]) -> pa.Table:
    columns = {"id": pa.array(body["ids"])}
    for k, seed in enumerate(body["predictions"]):
        columns[f"pred.s{k}"] = pa.array(seed, type=pa.float64())
    return pa.table(columns)


def test_parquet_and_csv_submissions_score_like_json(
    options: Any, reg_holdout: Any, submitter: Any, owner: Any
) -> None:
    def full_mse(r: Any) -> float:
        return owner.get(f"/v1/submissions/{r.get_json()['id']}").get_json()["scores"]["mse"]

    body, preds = regression_submission(reg_holdout)
    expected = regression_report(np.asarray(reg_holdout.y), preds, options=options).scores
    table = _prediction_table(reg_holdout, body)
    sink = io.BytesIO()
    pq.write_table(table, sink)
    path = f"/v1/holdouts/{reg_holdout.id}/submissions"
    r = submitter.post(
        f"{path}?model=forest", data=sink.getvalue(), content_type="application/vnd.apache.parquet"
    )
    assert r.status_code == 201, r.get_json()
    assert r.get_json()["seeds"] == ["s0", "s1", "s2"]
    assert full_mse(r) == expected["mse"]
    lines = ["id," + ",".join(f"pred.s{k}" for k in range(3))]
    for i, row_id in enumerate(body["ids"]):
        lines.append(row_id + "," + ",".join(repr(seed[i]) for seed in body["predictions"]))
    r = submitter.post(
        path,
        data={
            "model": "forest",
            "sweep_name": "d",
            "sweep_complexity": "2",
            "file": (io.BytesIO("\n".join(lines).encode()), "preds.csv"),
        },
        content_type="multipart/form-data",
    )
    assert r.status_code == 201, r.get_json()
    assert full_mse(r) == expected["mse"]
    assert r.get_json()["sweep"] == {"name": "d", "complexity": 2.0}


def test_classification_table_scores_like_json(cls_holdout: Any, submitter: Any) -> None:
    body, probs = probability_submission(cls_holdout)
    classes = cls_holdout.response["classes"]
    path = f"/v1/holdouts/{cls_holdout.id}/submissions"
    by_json = _submit(submitter, cls_holdout.id, body)
    columns: dict[str, Any] = {"id": pa.array(body["ids"])}
    for k, seed in enumerate(body["probabilities"]):
        for c, name in enumerate(classes):
            columns[f"prob.{k}.{name}"] = pa.array([row[c] for row in seed])
    sink = io.BytesIO()
    pq.write_table(pa.table(columns), sink)
    r = submitter.post(
        f"{path}?model=boosted", data=sink.getvalue(), content_type="application/vnd.apache.parquet"
    )
    assert r.status_code == 201, r.get_json()
    assert r.get_json()["scores"] == by_json["scores"]
    assert r.get_json()["bias_variance"] == by_json["bias_variance"]
