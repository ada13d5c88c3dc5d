"""Through a real gunicorn with two workers: ``/metrics`` sums both workers, the label cache
decodes a holdout once per worker, and the whole server log is JSON lines without values.

Which worker answered a request is read from its log line (``pid``, found by the request's
``X-Request-ID``), so the test knows that both workers served and both answered a scrape.
"""

from __future__ import annotations

import json
import os
import signal
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import requests
from gunicorn_server import running_gunicorn
from prometheus_client.parser import text_string_to_metric_families

from service.store import Store

IDS_ROUTE = "/v1/holdouts/<holdout_id>/ids"
ROUNDS = 5  # at most this many bursts to reach both workers (each burst: 40 requests)


def _samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    # reference: prometheus_client.parser (the Prometheus text exposition format)
    return {
        (s.name, tuple(sorted(s.labels.items()))): s.value
        for family in text_string_to_metric_families(text)
        for s in family.samples
    }


def _value(samples: dict[Any, float], name: str, **labels: str) -> float:
    return samples.get((name, tuple(sorted(labels.items()))), 0.0)


def _log_lines(log: Path) -> list[dict[str, Any]]:
    lines = [line for line in log.read_text(encoding="utf-8").splitlines() if line.strip()]
    return [json.loads(line) for line in lines]  # every line of the server's output is JSON


def _pids_by_request(log: Path) -> dict[str, int]:
    return {
        line["request_id"]: line["pid"]
        for line in _log_lines(log)
        if line.get("logger") == "heldout.request"
    }


@pytest.fixture
def server(tmp_path: Path) -> Any:
    url = f"sqlite:///{tmp_path / 'heldout.sqlite3'}"
    store = Store(url)
    store.init_schema()
    _, owner = store.create_token("owner", "team-metrics")
    _, submitter = store.create_token("submitter", "grp-metrics-zz")
    store.dispose()
    settings = {"HELDOUT_DATABASE_URL": url, "HELDOUT_WORKERS": "2"}
    settings["HELDOUT_BOOTSTRAP_RESAMPLES"] = "200"
    with running_gunicorn(tmp_path, settings) as running:
        yield {"base": running.base, "log": running.log, "owner": owner, "submitter": submitter}


def test_two_workers_counts_add_up_and_logs_are_clean(server: dict[str, Any]) -> None:
    base, log = server["base"], server["log"]
    owner = {"Authorization": f"Bearer {server['owner']}"}
    team = {"Authorization": f"Bearer {server['submitter']}"}
    rng = np.random.default_rng(5)
    n = 131  # feedback slice of 39 rows: above the default min_rows of 30
    ids = [f"qz-row-{i:05d}" for i in range(n)]
    y = (rng.normal(size=n) * 1000 + 5000 + rng.random(n) * 1e-9).tolist()
    body = {"name": "metrics-e2e", "task": "regression", "ids": ids, "y_true": y}
    registered = requests.post(f"{base}/v1/holdouts", json=body, headers=owner, timeout=60)
    assert registered.status_code == 201, registered.text
    holdout = registered.json()
    preds = (np.asarray(y) + rng.normal(scale=200, size=(2, n))).tolist()
    submission = {"model": "model-zz-metrics", "ids": ids, "predictions": preds}
    created = requests.post(
        f"{base}/v1/holdouts/{holdout['id']}/submissions", json=submission, headers=team, timeout=60
    )
    assert created.status_code == 201, created.text

    # Bursts of concurrent reads until both workers have answered some (bounded).
    sent = 0
    for round_ in range(ROUNDS):

        def read(i: int, round_: int = round_) -> int:
            headers = {**team, "X-Request-ID": f"ids-{round_}-{i}"}
            url = f"{base}/v1/holdouts/{holdout['id']}/ids"
            return requests.get(url, headers=headers, timeout=60).status_code

        with ThreadPoolExecutor(max_workers=8) as pool:
            assert set(pool.map(read, range(40))) == {200}
        sent += 40
        served = {p for r, p in _pids_by_request(log).items() if r.startswith("ids-")}
        if len(served) == 2:
            break
    assert len(served) == 2, "both workers should have answered a burst of concurrent reads"

    # Scrapes until both workers have answered one; each sees the sum over both workers.
    scrapes: dict[int, dict[Any, float]] = {}
    for i in range(40):
        response = requests.get(f"{base}/metrics", headers={"X-Request-ID": f"m-{i}"}, timeout=30)
        assert response.status_code == 200
        pid = _pids_by_request(log)[f"m-{i}"]
        scrapes.setdefault(pid, _samples(response.text))
        if len(scrapes) == 2:
            break
    assert len(scrapes) == 2, "both workers should have answered a scrape"
    for samples in scrapes.values():
        requests_total = "heldout_http_requests_total"
        assert _value(samples, requests_total, method="GET", route=IDS_ROUTE, status="200") == sent
        assert _value(samples, "heldout_submissions_scored_total", task="regression") == 1
        assert _value(samples, "heldout_rows_scored_total", task="regression") == n
        # Each worker decodes the holdout once: a miss per worker that used it, hits after.
        misses = _value(samples, "heldout_label_cache_requests_total", result="miss")
        hits = _value(samples, "heldout_label_cache_requests_total", result="hit")
        assert 2 <= misses <= 2 + 1  # both read ids; the submission's worker is one of them
        assert hits + misses == sent + 1

    # A worker killed outright: its counts stay in the sum; gunicorn starts another.
    victim = next(iter(served))
    os.kill(victim, signal.SIGKILL)
    deadline = time.monotonic() + 60
    while True:
        boots = [
            line["message"]
            for line in _log_lines(log)
            if line.get("logger") == "gunicorn.error" and "Booting worker" in line["message"]
        ]
        if len(boots) >= 3:
            break
        assert time.monotonic() < deadline, "gunicorn did not replace the killed worker"
        time.sleep(0.2)
    after = _samples(requests.get(f"{base}/metrics", timeout=30).text)
    assert (
        _value(after, "heldout_http_requests_total", method="GET", route=IDS_ROUTE, status="200")
        == sent
    )

    # The log: one JSON object per line; request lines complete; no value, id or token.
    lines = _log_lines(log)
    request_lines = [line for line in lines if line.get("logger") == "heldout.request"]
    assert {"time", "level", "request_id", "method", "route", "status", "duration_ms"} <= set(
        request_lines[0]
    )
    post = [line for line in request_lines if line["method"] == "POST" and line["status"] == 201]
    assert {line.get("submission_id") for line in post} >= {created.json()["id"]}
    text = log.read_text(encoding="utf-8")
    forbidden = [server["owner"], server["submitter"], "grp-metrics-zz", "model-zz-metrics"]
    forbidden += ids + [repr(v) for v in y] + [repr(v) for v in preds[0]]
    for secret in forbidden:
        assert secret not in text, secret
