"""``/metrics`` counts what happened, and every request logs one JSON line with its id.

In process (Flask's test client) on SQLite and PostgreSQL; ``tests/e2e/test_metrics_gunicorn.py``
does the same through a real gunicorn with two workers. The exposition is read with
prometheus-client's own parser of the Prometheus text format.
"""

from __future__ import annotations

import json
import logging
from typing import Any

import pytest
from apidata import N_REGRESSION, Holdout, regression_submission
from prometheus_client.parser import text_string_to_metric_families

from service.api.logs import REQUEST_ID_MAX_LENGTH, JsonFormatter, valid_request_id

SUBMIT_ROUTE = "/v1/holdouts/<holdout_id>/submissions"
IDS_ROUTE = "/v1/holdouts/<holdout_id>/ids"


def scrape(client: Any) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    """Every sample of GET /metrics, by (name, sorted labels)."""
    response = client.get("/metrics")
    assert response.status_code == 200
    assert response.headers["Content-Type"].startswith("text/plain; version=")
    text = response.get_data(as_text=True)
    # reference: prometheus_client.parser (the Prometheus text exposition format)
    return {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for family in text_string_to_metric_families(text)
        for s in family.samples
    }


def value(samples: dict[Any, float], name: str, **labels: str) -> float:
    return samples.get((name, tuple(sorted(labels.items()))), 0.0)


def test_counters_move_with_requests(client: Any, submitter: Any, reg_holdout: Holdout) -> None:
    before = scrape(client)
    assert submitter.get(f"/v1/holdouts/{reg_holdout.id}/ids").status_code == 200  # cold
    assert submitter.get(f"/v1/holdouts/{reg_holdout.id}/ids").status_code == 200  # cached
    body, _ = regression_submission(reg_holdout, n_seeds=3)
    first = submitter.post(f"/v1/holdouts/{reg_holdout.id}/submissions", json=body)
    assert first.status_code == 201
    key = {"Idempotency-Key": "metrics-replay-1"}
    keyed = submitter.post(f"/v1/holdouts/{reg_holdout.id}/submissions", json=body, headers=key)
    replay = submitter.post(f"/v1/holdouts/{reg_holdout.id}/submissions", json=body, headers=key)
    assert keyed.status_code == replay.status_code == 201
    assert replay.headers["Idempotent-Replayed"] == "true"
    assert client.get("/no/such/path").status_code == 404
    after = scrape(client)

    def delta(name: str, **labels: str) -> float:
        return value(after, name, **labels) - value(before, name, **labels)

    requests = "heldout_http_requests_total"
    assert delta(requests, method="GET", route=IDS_ROUTE, status="200") == 2
    assert delta(requests, method="POST", route=SUBMIT_ROUTE, status="201") == 3
    assert delta(requests, method="GET", route="unmatched", status="404") == 1
    latency = "heldout_http_request_duration_seconds_count"
    assert delta(latency, method="POST", route=SUBMIT_ROUTE) == 3
    # Two submissions were scored; the replay was answered from the store.
    assert delta("heldout_submissions_scored_total", task="regression") == 2
    assert delta("heldout_scoring_duration_seconds_count", task="regression") == 2
    assert delta("heldout_scoring_duration_seconds_sum", task="regression") > 0
    assert delta("heldout_rows_scored_total", task="regression") == 2 * N_REGRESSION
    # The first read decodes the holdout once; every later lookup in this process is a hit.
    assert delta("heldout_label_cache_requests_total", result="miss") == 1
    assert delta("heldout_label_cache_requests_total", result="hit") >= 3


def test_metrics_hold_no_ids_or_values(
    client: Any, owner: Any, submitter: Any, reg_holdout: Holdout
) -> None:
    body, _ = regression_submission(reg_holdout, n_seeds=2, model="model-name-zz9")
    created = submitter.post(f"/v1/holdouts/{reg_holdout.id}/submissions", json=body)
    assert created.status_code == 201
    text = client.get("/metrics").get_data(as_text=True)
    forbidden = [reg_holdout.id, created.get_json()["id"], owner.token, submitter.token, "g1"]
    forbidden += ["model-name-zz9", reg_holdout.ids[0], repr(reg_holdout.y[0])]
    forbidden += [repr(body["predictions"][0][0])]
    for secret in forbidden:
        assert secret not in text


def _request_lines(caplog: pytest.LogCaptureFixture) -> list[dict[str, Any]]:
    formatter = JsonFormatter()
    lines = [formatter.format(r) for r in caplog.records if r.name == "heldout.request"]
    for line in lines:
        assert "\n" not in line
    return [json.loads(line) for line in lines]


def test_request_id_is_taken_echoed_logged_and_in_problems(
    client: Any, submitter: Any, reg_holdout: Holdout, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="heldout")
    sent = "client-req.42:abc_DEF"
    ok = submitter.get(f"/v1/holdouts/{reg_holdout.id}/ids", headers={"X-Request-ID": sent})
    assert ok.status_code == 200 and ok.headers["X-Request-ID"] == sent
    problem = submitter.get("/v1/holdouts/ho_aaaaaaaaaaaaaaaa", headers={"X-Request-ID": "p-1"})
    assert problem.status_code == 404
    assert problem.headers["X-Request-ID"] == "p-1" and problem.get_json()["request_id"] == "p-1"
    # Unusable ids are replaced by a fresh one: too long, spaces, quotes, a leading dash.
    assert not valid_request_id("a\nb")  # (a client library refuses to send this one)
    for bad in ("x" * (REQUEST_ID_MAX_LENGTH + 1), "two words", 'q"uote', "-leading"):
        assert not valid_request_id(bad)
        answered = client.get("/healthz", headers={"X-Request-ID": bad})
        made = answered.headers["X-Request-ID"]
        assert made != bad and len(made) == 32 and int(made, 16) >= 0
    assert valid_request_id("x" * REQUEST_ID_MAX_LENGTH)
    fresh = client.get("/healthz").headers["X-Request-ID"]
    assert len(fresh) == 32

    lines = {line["request_id"]: line for line in _request_lines(caplog)}
    line = lines[sent]
    assert line["level"] == "INFO" and line["message"] == "request"
    assert line["method"] == "GET" and line["route"] == IDS_ROUTE and line["status"] == 200
    assert line["holdout_id"] == reg_holdout.id and line["duration_ms"] >= 0
    assert line["time"].endswith("Z")
    assert lines["p-1"]["status"] == 404
    assert fresh in lines


def test_logs_never_hold_payload_values(
    client: Any, owner: Any, submitter: Any, reg_holdout: Holdout, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.DEBUG)
    body, _ = regression_submission(reg_holdout, n_seeds=2, model="model-name-zz9")
    created = submitter.post(f"/v1/holdouts/{reg_holdout.id}/submissions", json=body)
    assert created.status_code == 201
    # A refused submission too: its bad values must not reach the log either.
    bad = dict(body, predictions=[[float("nan")] * len(body["ids"])] * 2)
    bad["ids"] = ["unknown-row-zz7", *body["ids"][1:]]
    refused = submitter.post(
        f"/v1/holdouts/{reg_holdout.id}/submissions",
        data=json.dumps(bad).replace("NaN", '"zz-not-a-number"'),
        content_type="application/json",
    )
    assert refused.status_code == 422
    owner.get(f"/v1/holdouts/{reg_holdout.id}/submissions?limit=5")
    formatter = JsonFormatter()
    text = "\n".join(formatter.format(r) for r in caplog.records)
    assert created.get_json()["id"] in text  # the line of the 201 names what it stored
    forbidden = [owner.token, submitter.token, "model-name-zz9", "unknown-row-zz7"]
    forbidden += ["zz-not-a-number", "limit=5", "g1"]
    forbidden += reg_holdout.ids + [repr(v) for v in reg_holdout.y]
    forbidden += [repr(v) for v in body["predictions"][0]]
    for secret in forbidden:
        assert secret not in text, secret
