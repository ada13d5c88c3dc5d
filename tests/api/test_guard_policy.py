"""A holdout's reuse policy and its split: defaults, validation, the stored mask, immutability.

References: the split rule documented in ``service.scoring.split`` (``feedback_counts``,
``feedback_mask``), recomputed here from the split seed the owner can read; RFC 9457 for the
problem bodies.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from apidata import classification_body, register, regression_body
from guarddata import holdout_mask

from service.scoring.split import feedback_mask


def _errors(r: Any) -> dict[str, dict[str, Any]]:
    assert r.status_code == 422, r.get_json()
    assert r.mimetype == "application/problem+json"
    return {e["field"]: e for e in r.get_json()["errors"]}


def test_defaults_and_the_stored_split(owner: Any, submitter: Any, store: Any) -> None:
    h = register(owner, regression_body("defaults"))
    policy = h.response["policy"]
    assert {k: policy[k] for k in ("feedback_fraction", "guard", "decimals", "daily_quota")} == {
        "feedback_fraction": 0.3,
        "guard": "ladder",
        "decimals": 4,
        "daily_quota": None,
    }
    assert policy["min_rows"] == 30
    n = len(h.ids)
    # reference: service.scoring.split's rule: round(0.3 * n) rows in the feedback slice
    assert h.response["split"]["feedback_rows"] == int(np.floor(0.3 * n + 0.5))
    stored = store.holdout_arrays(h.id).feedback_mask
    np.testing.assert_array_equal(stored, holdout_mask(owner, h))
    # Submitters see the slice sizes, not the seed, while the holdout is open.
    seen = submitter.get(f"/v1/holdouts/{h.id}").get_json()
    assert seen["split"]["seed"] is None and seen["salt"] is None
    assert seen["split"]["feedback_rows"] == h.response["split"]["feedback_rows"]
    listed = submitter.get("/v1/holdouts").get_json()["holdouts"]
    assert [x["split"]["seed"] for x in listed] == [None]


def test_the_split_is_stratified_by_class_and_seeded(owner: Any, store: Any) -> None:
    body = {**classification_body("strata", n=300), "policy": {"feedback_fraction": 0.4}}
    h = register(owner, body)
    classes = h.response["classes"]
    y = np.array([classes.index(v) for v in h.y])
    seed = int(owner.get(f"/v1/holdouts/{h.id}").get_json()["split"]["seed"])
    # reference: service.scoring.split.feedback_mask with the stored seed, stratified by class
    expected = feedback_mask(len(y), feedback_fraction=0.4, seed=seed, strata=y)
    np.testing.assert_array_equal(store.holdout_arrays(h.id).feedback_mask, expected)
    for c in range(len(classes)):
        assert abs(expected[y == c].sum() - 0.4 * (y == c).sum()) < 1.0


def test_registering_again_keeps_the_split(owner: Any, store: Any) -> None:
    body = regression_body("again")
    first = register(owner, body)
    mask = store.holdout_arrays(first.id).feedback_mask.copy()
    again = owner.post("/v1/holdouts", json=body)
    assert again.status_code == 200 and again.get_json()["id"] == first.id
    assert again.get_json()["split"] == first.response["split"]
    np.testing.assert_array_equal(store.holdout_arrays(first.id).feedback_mask, mask)
    # The policy is part of the registered content: changing it is a conflict (immutable).
    changed = owner.post("/v1/holdouts", json={**body, "policy": {"guard": "none"}})
    assert changed.status_code == 409
    assert [e["field"] for e in changed.get_json()["errors"]] == ["policy"]


def test_spelling_out_the_defaults_is_the_same_policy(owner: Any) -> None:
    body = regression_body("spelled")
    first = register(owner, body)
    spelled = {
        "feedback_fraction": 0.3,
        "guard": "ladder",
        "decimals": 4,
        "daily_quota": None,
        "min_rows": 30,
    }
    r = owner.post("/v1/holdouts", json={**body, "policy": spelled})
    assert r.status_code == 200 and r.get_json()["id"] == first.id


@pytest.mark.parametrize(
    "policy, field",
    [
        ({"feedback_fraction": 0}, "policy.feedback_fraction"),
        ({"feedback_fraction": 1}, "policy.feedback_fraction"),
        ({"feedback_fraction": 1.5}, "policy.feedback_fraction"),
        ({"feedback_fraction": "half"}, "policy.feedback_fraction"),
        ({"guard": "thresholdout"}, "policy.guard"),
        ({"decimals": -1}, "policy.decimals"),
        ({"decimals": 2.5}, "policy.decimals"),
        ({"daily_quota": 0}, "policy.daily_quota"),
        ({"daily_quota": "10"}, "policy.daily_quota"),
        ({"min_rows": 0}, "policy.min_rows"),
        ({"ladder": True}, "policy.ladder"),
    ],
)
def test_invalid_policies_are_422(owner: Any, policy: dict[str, Any], field: str) -> None:
    r = owner.post("/v1/holdouts", json={**regression_body("bad"), "policy": policy})
    assert field in _errors(r)
    assert owner.get("/v1/holdouts").get_json()["holdouts"] == []


def test_every_bad_policy_field_is_named_at_once(owner: Any) -> None:
    policy = {"feedback_fraction": 2, "guard": "x", "decimals": -3, "daily_quota": -1}
    r = owner.post("/v1/holdouts", json={**regression_body("bad"), "policy": policy})
    assert {
        "policy.feedback_fraction",
        "policy.guard",
        "policy.decimals",
        "policy.daily_quota",
    } <= set(_errors(r))


def test_slices_smaller_than_min_rows_are_refused(owner: Any) -> None:
    # 107 rows at 0.3: 32 feedback and 75 reserve rows (the documented rounding).
    body = regression_body("small")
    error = _errors(owner.post("/v1/holdouts", json={**body, "policy": {"min_rows": 40}}))
    assert "32 feedback and 75 reserve rows" in error["policy.min_rows"]["message"]
    r = owner.post("/v1/holdouts", json={**body, "policy": {"min_rows": 32}})
    assert r.status_code == 201, r.get_json()
    small = {**regression_body("tiny", n=20)}
    assert "policy.min_rows" in _errors(owner.post("/v1/holdouts", json=small))


def test_the_ladder_needs_two_feedback_rows(owner: Any) -> None:
    body = {**regression_body("two", n=4), "policy": {"min_rows": 1, "feedback_fraction": 0.25}}
    assert "policy.guard" in _errors(owner.post("/v1/holdouts", json=body))
    body["policy"]["guard"] = "rounded"
    assert owner.post("/v1/holdouts", json=body).status_code == 201
