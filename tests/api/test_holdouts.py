"""Registering holdouts: the response, idempotency, validation, the published ids."""

from __future__ import annotations

import csv
import io
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from apidata import CLASSES, TINY_POLICY, classification_body, register, regression_body

HOLDOUT_KEYS = {
    "id",
    "name",
    "task",
    "n_rows",
    "classes",
    "fingerprint",
    "policy",
    "owner",
    "created_at",
    "split",
    "closed_at",
    "salt",
}


def test_register_regression(owner: Any) -> None:
    body = regression_body()
    r = owner.post("/v1/holdouts", json=body)
    assert r.status_code == 201
    out = r.get_json()
    assert set(out) == HOLDOUT_KEYS
    assert out["task"] == "regression" and out["n_rows"] == len(body["ids"])
    assert out["classes"] is None
    assert out["policy"] == {
        "primary_metric": "rmse",
        "groups": None,
        "feedback_fraction": 0.3,
        "guard": "ladder",
        "decimals": 4,
        "daily_quota": None,
        "min_rows": 30,
        "gates": [],
    }
    assert out["closed_at"] is None and out["salt"] is None
    assert out["split"]["feedback_rows"] + out["split"]["reserve_rows"] == out["n_rows"]
    assert out["owner"] == "group:team-a"
    assert len(out["fingerprint"]) == 64 and int(out["fingerprint"], 16) >= 0
    assert r.headers["Location"] == f"/v1/holdouts/{out['id']}"
    assert owner.get(r.headers["Location"]).get_json() == out


def test_register_classification_defaults(owner: Any) -> None:
    body = classification_body()
    del body["classes"]
    out = register(owner, body).response
    assert out["classes"] == sorted(CLASSES)
    assert out["policy"]["primary_metric"] == "accuracy"


def test_numeric_class_labels_sort_numerically(owner: Any) -> None:
    body = {
        "name": "digits",
        "task": "multiclass",
        "ids": list("abcdef"),
        "y_true": [10, 2, 1, 2, 10, 1],
        "policy": TINY_POLICY,
    }
    assert register(owner, body).response["classes"] == ["1", "2", "10"]


def test_same_content_is_idempotent(owner: Any) -> None:
    body = {**regression_body(), "policy": {"primary_metric": "mae", "groups": ["g2", "g1"]}}
    first = owner.post("/v1/holdouts", json=body)
    again = owner.post("/v1/holdouts", json=body)
    assert first.status_code == 201 and again.status_code == 200
    assert again.get_json() == first.get_json()
    # Policy given in another order or with defaults spelled out is the same policy.
    same = {**body, "policy": {"groups": ["g1", "g2", "g1"], "primary_metric": "mae"}}
    assert owner.post("/v1/holdouts", json=same).get_json()["id"] == first.get_json()["id"]


@pytest.mark.parametrize(
    "change, field",
    [
        (lambda b: {**b, "y_true": [*b["y_true"][:-1], b["y_true"][-1] + 1e-9]}, "ids"),
        (lambda b: {**b, "ids": [*b["ids"][:-1], "row-new"]}, "ids"),
        (lambda b: {**b, "ids": b["ids"][::-1], "y_true": b["y_true"][::-1]}, "ids"),
        (lambda b: {**b, "policy": {"primary_metric": "mae"}}, "policy"),
        (lambda b: {**b, "policy": {"groups": ["g1"]}}, "policy"),
    ],
)
def test_same_name_other_content_is_409(owner: Any, change: Any, field: str) -> None:
    body = regression_body()
    first = register(owner, body)
    r = owner.post("/v1/holdouts", json=change(body))
    assert r.status_code == 409
    problem = r.get_json()
    assert first.id in problem["detail"]
    assert [e["field"] for e in problem["errors"]] == [field]


def test_other_owner_may_reuse_a_name(owner: Any, other_owner: Any) -> None:
    body = regression_body()
    a = register(owner, body)
    b = register(other_owner, body)
    assert a.id != b.id
    assert a.response["fingerprint"] != b.response["fingerprint"]  # fresh salt each time


def test_task_change_is_409(owner: Any) -> None:
    body = classification_body(classes=["u", "v"])
    register(owner, body)
    r = owner.post("/v1/holdouts", json={**body, "task": "multiclass", "classes": ["u", "v", "w"]})
    assert r.status_code == 409
    assert {e["field"] for e in r.get_json()["errors"]} == {"task", "classes"}


def _errors(r: Any) -> dict[str, dict[str, Any]]:
    assert r.status_code == 422, r.get_json()
    assert r.mimetype == "application/problem+json"
    return {e["field"]: e for e in r.get_json()["errors"]}


def test_validation_names_every_bad_field(owner: Any) -> None:
    r = owner.post(
        "/v1/holdouts", json={"name": "", "task": "ranking", "ids": "a,b", "surprise": 1}
    )
    errors = _errors(r)
    assert {"name", "task", "ids", "y_true", "surprise"} <= set(errors)


@pytest.mark.parametrize(
    "body, field, count",
    [
        ({"ids": ["a", "b", "a"], "y_true": [1.0, 2.0, 3.0]}, "ids", 1),
        ({"ids": ["a", "b"], "y_true": [1.0]}, "y_true", 0),
        ({"ids": ["a", "b\x1fc"], "y_true": [1.0, 2.0]}, "ids", 1),
        ({"ids": ["a", "b"], "y_true": [1.0, 2.0], "classes": ["x", "y"]}, "classes", 0),
        (
            {"ids": ["a", "b"], "y_true": [1.0, 2.0], "policy": {"primary_metric": "accuracy"}},
            "policy.primary_metric",
            0,
        ),
        (
            {"ids": ["a", "b"], "y_true": [1.0, 2.0], "policy": {"primary_metric": "max_error"}},
            "policy.primary_metric",
            0,
        ),
        (
            {"ids": ["a", "b"], "y_true": [1.0, 2.0], "policy": {"groups": ["bad group!"]}},
            "policy.groups.0",
            0,
        ),
        ({"ids": [], "y_true": []}, "ids", None),
    ],
)
def test_invalid_regression_holdouts(owner: Any, body: dict, field: str, count: Any) -> None:
    r = owner.post("/v1/holdouts", json={"name": "bad", "task": "regression", **body})
    errors = _errors(r)
    assert field in errors, errors
    if count is not None:
        assert errors[field]["count"] == count


@pytest.mark.parametrize(
    "task, y, classes, field",
    [
        ("binary", ["a", "b", "c"], None, "y_true"),
        ("multiclass", ["a", "b", "a"], None, "y_true"),
        ("binary", ["a", "b", "z"], ["a", "b"], "y_true"),
        ("multiclass", ["a", "b", "c"], ["a", "b", "c", "a"], "classes"),
        ("binary", ["a", "b", "b"], ["a", "b"], None),
        ("binary", ["a", "a", "a"], ["a", "b"], None),
    ],
)
def test_classification_classes(owner: Any, task: str, y: list, classes: Any, field: Any) -> None:
    body = {"name": "c", "task": task, "ids": ["r1", "r2", "r3"], "y_true": y}
    body["policy"] = TINY_POLICY
    if classes is not None:
        body["classes"] = classes
    r = owner.post("/v1/holdouts", json=body)
    if field is None:
        assert r.status_code == 201, r.get_json()
        assert r.get_json()["classes"] == classes
    else:
        assert field in _errors(r)


def test_unknown_label_examples_come_from_the_request(owner: Any) -> None:
    body = {
        "name": "c",
        "task": "binary",
        "ids": ["r1", "r2", "r3", "r4"],
        "y_true": ["a", "b", "zz-1", "zz-2"],
        "classes": ["a", "b"],
    }
    error = _errors(owner.post("/v1/holdouts", json=body))["y_true"]
    assert error["count"] == 2 and sorted(error["examples"]) == ["zz-1", "zz-2"]


def test_ids_as_json_are_sorted(reg_holdout: Any, submitter: Any) -> None:
    r = submitter.get(f"/v1/holdouts/{reg_holdout.id}/ids")
    assert r.status_code == 200 and r.mimetype == "application/json"
    out = r.get_json()
    assert out["ids"] == sorted(reg_holdout.ids)
    assert out["n_rows"] == len(reg_holdout.ids) and out["order"] == "ascending"
    assert out["holdout_id"] == reg_holdout.id
    assert "Accept" in r.headers["Vary"]


def test_ids_as_csv(owner: Any, submitter: Any) -> None:
    ids = ["plain", "with,comma", 'with"quote', "ünïcode", "12", " padded "]
    h = register(
        owner,
        {
            "name": "odd-ids",
            "task": "regression",
            "ids": ids,
            "y_true": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
            "policy": TINY_POLICY,
        },
    )
    r = submitter.get(f"/v1/holdouts/{h.id}/ids", headers={"Accept": "text/csv"})
    assert r.status_code == 200 and r.mimetype == "text/csv"
    rows = list(csv.reader(io.StringIO(r.data.decode("utf-8"))))  # reference: Python's csv
    assert rows[0] == ["id"]
    assert [row[0] for row in rows[1:]] == sorted(ids)


def test_ids_accept_negotiation(reg_holdout: Any, submitter: Any) -> None:
    path = f"/v1/holdouts/{reg_holdout.id}/ids"
    r = submitter.get(path, headers={"Accept": "text/csv;q=0.5, application/json;q=0.9"})
    assert r.mimetype == "application/json"
    r = submitter.get(path, headers={"Accept": "*/*"})
    assert r.mimetype == "application/json"
    r = submitter.get(path, headers={"Accept": "application/xml"})
    assert r.status_code == 406 and r.mimetype == "application/problem+json"


def test_integer_ids_become_their_decimal_text(owner: Any, submitter: Any) -> None:
    h = register(
        owner,
        {
            "name": "ints",
            "task": "regression",
            "ids": [3, 1, 20],
            "y_true": [0.5, 1.5, 2.5],
            "policy": TINY_POLICY,
        },
    )
    assert submitter.get(f"/v1/holdouts/{h.id}/ids").get_json()["ids"] == ["1", "20", "3"]


def test_listing_is_per_owner(owner: Any, other_owner: Any) -> None:
    a = register(owner, regression_body("a"))
    b = register(owner, regression_body("b"))
    c = register(other_owner, regression_body("c"))
    assert [h["id"] for h in owner.get("/v1/holdouts").get_json()["holdouts"]] == [a.id, b.id]
    assert [h["id"] for h in other_owner.get("/v1/holdouts").get_json()["holdouts"]] == [c.id]


def _table(body: dict[str, Any]) -> pa.Table:
    return pa.table({"row": pa.array(body["ids"]), "target": pa.array(body["y_true"])})


def _csv_bytes(body: dict[str, Any]) -> bytes:
    lines = ["row,target"] + [
        f"{i},{y!r}" for i, y in zip(body["ids"], body["y_true"], strict=True)
    ]
    return ("\n".join(lines) + "\n").encode()


def test_register_from_csv_body_matches_json(owner: Any, other_owner: Any) -> None:
    body = regression_body()
    r = owner.post(
        "/v1/holdouts?name=prices&task=regression&id_column=row&target_column=target",
        data=_csv_bytes(body),
        content_type="text/csv",
    )
    assert r.status_code == 201, r.get_json()
    # The same rows as JSON under the same name are the same holdout (same fingerprint).
    again = owner.post("/v1/holdouts", json=body)
    assert again.status_code == 200 and again.get_json()["id"] == r.get_json()["id"]


def test_register_from_parquet_multipart(owner: Any) -> None:
    body = classification_body()
    sink = io.BytesIO()
    pq.write_table(_table(body), sink)
    r = owner.post(
        "/v1/holdouts",
        data={
            "name": body["name"],
            "task": body["task"],
            "id_column": "row",
            "target_column": "target",
            "classes": '["qx7-heron", "qx7-marten", "qx7-osprey"]',
            "policy": '{"primary_metric": "balanced_accuracy"}',
            "file": (io.BytesIO(sink.getvalue()), "holdout.parquet"),
        },
        content_type="multipart/form-data",
    )
    assert r.status_code == 201, r.get_json()
    out = r.get_json()
    assert out["classes"] == CLASSES and out["n_rows"] == len(body["ids"])
    assert out["policy"]["primary_metric"] == "balanced_accuracy"
    # Identical content as JSON: the same holdout.
    json_body = {**body, "policy": {"primary_metric": "balanced_accuracy"}}
    assert owner.post("/v1/holdouts", json=json_body).get_json()["id"] == out["id"]


def test_multipart_policy_errors_name_the_field(owner: Any) -> None:
    body = regression_body()
    r = owner.post(
        "/v1/holdouts",
        data={
            "name": "p",
            "task": "regression",
            "id_column": "row",
            "target_column": "target",
            "policy": '{"primary_metric": "rmse", "colour": "red"}',
            "file": (io.BytesIO(_csv_bytes(body)), "holdout.csv"),
        },
        content_type="multipart/form-data",
    )
    assert "policy.colour" in _errors(r)


def test_registration_leaves_nothing_on_failure(owner: Any) -> None:
    body = regression_body()
    bad = {**body, "ids": [*body["ids"][:-1], body["ids"][0]]}
    assert owner.post("/v1/holdouts", json=bad).status_code == 422
    assert owner.get("/v1/holdouts").get_json()["holdouts"] == []
    assert owner.post("/v1/holdouts", json=body).status_code == 201


def test_labels_are_stored_exactly(store: Any, owner: Any) -> None:
    body = regression_body()
    h = register(owner, body)
    arrays = store.holdout_arrays(h.id)
    assert arrays.ids.tolist() == body["ids"]
    np.testing.assert_array_equal(arrays.labels, np.asarray(body["y_true"]))
    assert len(arrays.salt) == 32


def test_cached_holdout_arrays_refuse_writes(store: Any, owner: Any) -> None:
    # One decoded copy serves every request of the process: numpy must refuse a write.
    h = register(owner, regression_body())
    arrays = store.holdout_arrays(h.id)
    assert store.holdout_arrays(h.id) is arrays  # the cached copy
    for array in (arrays.ids, arrays.labels, arrays.feedback_mask, arrays.sorted_ids):
        with pytest.raises(ValueError, match="read-only"):
            array[0] = array[1]
