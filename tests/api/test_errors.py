"""Every error is an RFC 9457 problem: ``application/problem+json`` with type, title, status,
detail and errors; an unexpected failure is a 500 that shows (and logs) no internals."""

from __future__ import annotations

import logging
from typing import Any

import pytest
from apidata import regression_body

from service import create_app

PROBLEM_KEYS = {"type", "title", "status", "detail", "errors", "request_id"}


def _problem(r: Any, status: int) -> dict[str, Any]:
    assert r.status_code == status, r.get_data(as_text=True)
    assert r.mimetype == "application/problem+json"
    body = r.get_json()
    assert set(body) == PROBLEM_KEYS and body["status"] == status
    assert body["type"].startswith("tag:heldout,2025:problem/")
    assert isinstance(body["detail"], str) and body["detail"]
    return body


def test_unknown_route_and_method(client: Any) -> None:
    _problem(client.get("/v1/nothing-here"), 404)
    r = client.delete("/v1/holdouts")
    _problem(r, 405)
    assert set(r.headers["Allow"].replace(" ", "").split(",")) >= {"GET", "POST"}


def test_body_problems(owner: Any) -> None:
    _problem(owner.post("/v1/holdouts", data=b"{", content_type="application/json"), 400)
    body = _problem(owner.post("/v1/holdouts", data=b"name=x"), 415)
    assert "application/json" in body["detail"]
    _problem(owner.post("/v1/holdouts", data=b"x", content_type="image/png"), 415)
    body = _problem(owner.post("/v1/holdouts", json=[1, 2]), 422)
    assert body["errors"][0]["field"] == "body"
    body = _problem(owner.post("/v1/holdouts", data=b"", content_type="application/json"), 400)


def test_problem_errors_have_the_documented_shape(owner: Any) -> None:
    body = _problem(owner.post("/v1/holdouts", json={"task": "regression"}), 422)
    assert body["errors"]
    for e in body["errors"]:
        assert set(e) == {"field", "message", "count", "examples"}
    assert {"name", "ids", "y_true"} <= {e["field"] for e in body["errors"]}


def test_body_over_the_limit_is_413(tmp_path: Any) -> None:
    app = create_app(
        {"DATABASE_URL": f"sqlite:///{tmp_path / 'db.sqlite3'}", "MAX_BODY_BYTES": 2000}
    )
    store = app.extensions["heldout_store"]
    store.init_schema()
    _, token = store.create_token("owner", "t")
    r = app.test_client().post(
        "/v1/holdouts", json=regression_body(n=200), headers={"Authorization": f"Bearer {token}"}
    )
    body = _problem(r, 413)
    assert "HELDOUT_MAX_BODY_BYTES" in body["detail"]
    store.dispose()


def test_unexpected_errors_show_no_internals(
    app: Any, client: Any, caplog: pytest.LogCaptureFixture
) -> None:
    def explode() -> None:
        raise RuntimeError("secret-value-" + str(8840 + 1))  # no literal in the frame text

    app.add_url_rule("/explode", "explode", explode)
    with caplog.at_level(logging.ERROR, logger="heldout"):
        r = client.get("/explode")
    body = _problem(r, 500)
    assert "secret-value-8841" not in r.get_data(as_text=True)
    assert "RuntimeError" not in body["detail"]
    assert "RuntimeError" in caplog.text  # the type and the frames are logged...
    assert "secret-value-8841" not in caplog.text  # ...but never the message


def test_readiness_reports_an_unreachable_database(tmp_path: Any) -> None:
    app = create_app({"DATABASE_URL": f"sqlite:///{tmp_path / 'missing' / 'db.sqlite3'}"})
    client = app.test_client()
    assert client.get("/healthz").status_code == 200
    body = _problem(client.get("/readyz"), 503)
    assert "missing" not in body["detail"]
    # Any request that needs the database: 503 with Retry-After, no driver message.
    r = client.get("/v1/holdouts", headers={"Authorization": "Bearer hdt_x"})
    body = _problem(r, 503)
    assert r.headers["Retry-After"] == "5" and "sqlite" not in body["detail"].lower()


def test_responses_are_not_cached_or_sniffed(client: Any, owner: Any) -> None:
    for r in (client.get("/healthz"), owner.get("/v1/holdouts"), client.get("/v1/holdouts")):
        assert r.headers["Cache-Control"] == "no-store"
        assert r.headers["X-Content-Type-Options"] == "nosniff"
