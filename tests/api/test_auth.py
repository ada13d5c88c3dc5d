"""Authorization matrix: every endpoint with no token, a wrong role, another owner or group.

Expected answers (issue contract; RFC 6750 for the Bearer challenge): no or bad token 401
with ``WWW-Authenticate: Bearer``; a role that may not call the endpoint 403; an object of
another owner or group 404, with the same body as for an id that does not exist.
"""

from __future__ import annotations

from typing import Any

import pytest
from apidata import Holdout, register, regression_body, regression_submission

PROBLEM = "application/problem+json"


def _assert_problem(r: Any, status: int) -> dict[str, Any]:
    assert r.status_code == status, r.get_json()
    assert r.mimetype == PROBLEM
    body = r.get_json()
    assert set(body) == {"type", "title", "status", "detail", "errors", "request_id"}
    assert body["status"] == status
    return body


@pytest.fixture
def world(owner: Any, submitter: Any, make_user: Any) -> dict[str, Any]:
    """Two holdouts of ``owner``: one open to all groups, one restricted to g1; a submission
    by g1 to each, the second one part of a sweep."""
    open_h = register(owner, regression_body("open"))
    only_g1 = register(owner, {**regression_body("only-g1", seed=9), "policy": {"groups": ["g1"]}})
    body, _ = regression_submission(open_h, sweep={"name": "depth", "complexity": 1})
    r = submitter.post(f"/v1/holdouts/{open_h.id}/submissions", json=body)
    assert r.status_code == 201, r.get_json()
    body, _ = regression_submission(only_g1)
    r2 = submitter.post(f"/v1/holdouts/{only_g1.id}/submissions", json=body)
    assert r2.status_code == 201, r2.get_json()
    return {"open": open_h, "only_g1": only_g1, "sub": r.get_json()["id"]}


def _endpoints(w: dict[str, Any]) -> list[tuple[str, str, dict[str, Any] | None]]:
    h: Holdout = w["open"]
    body, _ = regression_submission(h)
    return [
        ("POST", "/v1/holdouts", regression_body("new")),
        ("GET", "/v1/holdouts", None),
        ("GET", f"/v1/holdouts/{h.id}", None),
        ("GET", f"/v1/holdouts/{h.id}/ids", None),
        ("POST", f"/v1/holdouts/{h.id}/submissions", body),
        ("GET", f"/v1/submissions/{w['sub']}", None),
        ("GET", f"/v1/holdouts/{h.id}/submissions", None),
        ("GET", f"/v1/holdouts/{h.id}/standings", None),
        ("GET", f"/v1/holdouts/{h.id}/sweeps/depth", None),
    ]


def _call(client_or_user: Any, method: str, path: str, body: Any, headers: Any = None) -> Any:
    kwargs: dict[str, Any] = {"headers": headers} if headers else {}
    if body is not None:
        kwargs["json"] = body
    fn = client_or_user.post if method == "POST" else client_or_user.get
    return fn(path, **kwargs)


def test_every_endpoint_needs_a_token(client: Any, world: dict[str, Any]) -> None:
    for method, path, body in _endpoints(world):
        r = _call(client, method, path, body)
        _assert_problem(r, 401)
        assert r.headers["WWW-Authenticate"].startswith("Bearer")


@pytest.mark.parametrize(
    "header",
    [
        "Bearer hdt_not-a-real-token",
        "Bearer ",
        "Basic dXNlcjpwYXNz",
        "hdt_missing-scheme",
        "Bearer " + "x" * 500,
    ],
)
def test_bad_tokens_are_401(client: Any, world: dict[str, Any], header: str) -> None:
    for method, path, body in _endpoints(world):
        r = _call(client, method, path, body, headers={"Authorization": header})
        _assert_problem(r, 401)
        assert "Bearer" in r.headers["WWW-Authenticate"]


def test_revoked_token_is_401(store: Any, world: dict[str, Any], submitter: Any) -> None:
    path = f"/v1/holdouts/{world['open'].id}"
    assert submitter.get(path).status_code == 200
    store.revoke_token(submitter.token_id)
    r = submitter.get(path)
    _assert_problem(r, 401)
    assert 'error="invalid_token"' in r.headers["WWW-Authenticate"]


def test_wrong_roles_are_403(world: dict[str, Any], owner: Any, admin: Any, submitter: Any) -> None:
    h = world["open"]
    body, _ = regression_submission(h)
    # Submitters may not register holdouts.
    _assert_problem(submitter.post("/v1/holdouts", json=regression_body("mine")), 403)
    # Owners and admins may not submit.
    for user in (owner, admin):
        _assert_problem(user.post(f"/v1/holdouts/{h.id}/submissions", json=body), 403)


def test_another_owners_objects_are_404(world: dict[str, Any], other_owner: Any) -> None:
    for method, path, body in _endpoints(world):
        if path == "/v1/holdouts":
            continue
        r = _call(other_owner, method, path, body)
        if method == "POST":
            _assert_problem(r, 403)  # owners never submit; the role check comes first
        else:
            _assert_problem(r, 404)
    listing = other_owner.get("/v1/holdouts").get_json()["holdouts"]
    assert listing == []


def test_a_group_not_admitted_gets_404(world: dict[str, Any], other_submitter: Any) -> None:
    h = world["only_g1"]
    for path in (
        f"/v1/holdouts/{h.id}",
        f"/v1/holdouts/{h.id}/ids",
        f"/v1/holdouts/{h.id}/submissions",
        f"/v1/holdouts/{h.id}/standings",
        f"/v1/holdouts/{h.id}/sweeps/depth",
    ):
        _assert_problem(other_submitter.get(path), 404)
    body, _ = regression_submission(h)
    _assert_problem(other_submitter.post(f"/v1/holdouts/{h.id}/submissions", json=body), 404)
    ids = [x["id"] for x in other_submitter.get("/v1/holdouts").get_json()["holdouts"]]
    assert h.id not in ids and world["open"].id in ids


def test_another_groups_submission_and_sweep_are_404(
    world: dict[str, Any], other_submitter: Any, submitter: Any
) -> None:
    h = world["open"]
    _assert_problem(other_submitter.get(f"/v1/submissions/{world['sub']}"), 404)
    _assert_problem(other_submitter.get(f"/v1/holdouts/{h.id}/sweeps/depth"), 404)
    _assert_problem(submitter.get(f"/v1/holdouts/{h.id}/sweeps/depth?group=g2"), 404)
    listing = other_submitter.get(f"/v1/holdouts/{h.id}/submissions").get_json()
    assert listing["submissions"] == [] and listing["total"] == 0
    # Standings show every group's value, but not another group's submission id or model.
    entries = other_submitter.get(f"/v1/holdouts/{h.id}/standings").get_json()["entries"]
    assert [e["group"] for e in entries] == ["g1"]
    assert entries[0]["submission_id"] is None and entries[0]["model"] is None


def test_hidden_and_missing_objects_answer_alike(world: dict[str, Any], other_owner: Any) -> None:
    real = world["open"].id
    fake = "ho_" + "a" * 16
    hidden = other_owner.get(f"/v1/holdouts/{real}").get_json()
    missing = other_owner.get(f"/v1/holdouts/{fake}").get_json()
    assert hidden["detail"].replace(real, "ID") == missing["detail"].replace(fake, "ID")
    # Each request has its own id; nothing else may tell them apart.
    assert {k: v for k, v in hidden.items() if k not in ("detail", "request_id")} == {
        k: v for k, v in missing.items() if k not in ("detail", "request_id")
    }


def test_admin_sees_every_owner(world: dict[str, Any], admin: Any) -> None:
    h = world["open"]
    assert admin.get(f"/v1/holdouts/{h.id}").status_code == 200
    assert admin.get(f"/v1/submissions/{world['sub']}").status_code == 200
    listed = {x["id"] for x in admin.get("/v1/holdouts").get_json()["holdouts"]}
    assert {h.id, world["only_g1"].id} <= listed
    r = admin.get(f"/v1/holdouts/{h.id}/sweeps/depth?group=g1")
    assert r.status_code == 200, r.get_json()


def test_owner_tokens_of_one_group_share_holdouts(world: dict[str, Any], make_user: Any) -> None:
    teammate = make_user("owner", "team-a")
    assert teammate.get(f"/v1/holdouts/{world['open'].id}").status_code == 200
    loner = make_user("owner", None)
    assert loner.get(f"/v1/holdouts/{world['open'].id}").status_code == 404
    h = register(loner, regression_body("loner"))
    assert h.response["owner"] == f"token:{loner.token_id}"


def test_unauthenticated_endpoints(client: Any) -> None:
    assert client.get("/healthz").get_json() == {"status": "ok"}
    assert client.get("/readyz").get_json() == {"status": "ok", "database": "ok"}
    assert client.get("/v1/openapi.json").get_json()["openapi"] == "3.1.0"
