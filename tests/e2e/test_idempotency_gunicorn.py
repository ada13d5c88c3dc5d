"""Concurrent retries with one Idempotency-Key through gunicorn (two workers) on PostgreSQL.

Several threads post the same keyed submission at once, so the requests are scored in both
worker processes at the same time; the database's unique constraint on (holdout, group,
key) must leave exactly one stored submission, and every request must answer with it.
Reference: the IETF HTTPAPI draft "The Idempotency-Key HTTP Header Field". Every wait is
bounded.
"""

from __future__ import annotations

import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
import requests
from gunicorn_server import running_gunicorn

from service.store import Store, make_engine, schema


@pytest.fixture
def pg_server(postgres_url: str, tmp_path: Path) -> Iterator[dict[str, Any]]:
    engine = make_engine(postgres_url)
    try:
        schema.metadata.drop_all(engine)
    finally:
        engine.dispose()
    store = Store(postgres_url)
    store.init_schema()
    tokens = {
        "owner": store.create_token("owner", "lab")[1],
        "submitter": store.create_token("submitter", "g1")[1],
    }
    store.dispose()
    settings = {
        "HELDOUT_DATABASE_URL": postgres_url,
        "HELDOUT_WORKERS": "2",
        "HELDOUT_BOOTSTRAP_RESAMPLES": "200",
    }
    with running_gunicorn(tmp_path, settings) as running:
        yield {"base": running.base, "tokens": tokens, "url": postgres_url}


@pytest.mark.postgres
def test_concurrent_retries_on_two_workers_store_one_submission(
    pg_server: dict[str, Any],
) -> None:
    base, tokens = pg_server["base"], pg_server["tokens"]
    rng = np.random.default_rng(17)
    n = 2000
    ids = [f"r{i:05d}" for i in range(n)]
    y = rng.normal(size=n) * 5.0
    r = requests.post(
        f"{base}/v1/holdouts",
        headers={"Authorization": f"Bearer {tokens['owner']}"},
        json={"name": "race", "task": "regression", "ids": ids, "y_true": y.tolist()},
        timeout=60,
    )
    assert r.status_code == 201, r.text
    holdout = r.json()["id"]
    path = f"{base}/v1/holdouts/{holdout}/submissions"
    n_keys, n_threads = 4, 4
    bodies = {
        f"race-{k}": orjson.dumps({
            "model": f"m{k}", "ids": ids[::-1],
            "predictions": (y + rng.normal(size=(3, n)))[:, ::-1].tolist(),
        })
        for k in range(n_keys)
    }
    results: dict[str, list[tuple[int, str, str | None]]] = {key: [] for key in bodies}
    lock = threading.Lock()
    barrier = threading.Barrier(n_keys * n_threads)

    def send(key: str) -> None:
        headers = {"Authorization": f"Bearer {tokens['submitter']}",
                   "Content-Type": "application/json", "Idempotency-Key": key}
        barrier.wait(timeout=60)
        resp = requests.post(path, data=bodies[key], headers=headers, timeout=120)
        with lock:
            results[key].append((resp.status_code, resp.json().get("id"),
                                 resp.headers.get("Idempotent-Replayed")))

    threads = [threading.Thread(target=send, args=(key,)) for key in bodies
               for _ in range(n_threads)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=180)
    assert not any(t.is_alive() for t in threads)

    for answers in results.values():
        assert [status for status, _, _ in answers] == [201] * n_threads, answers
        assert len({sid for _, sid, _ in answers}) == 1, answers  # one submission per key
        assert sum(replayed == "true" for _, _, replayed in answers) == n_threads - 1
    listing = requests.get(path, headers={"Authorization": f"Bearer {tokens['submitter']}"},
                           timeout=30).json()
    assert listing["total"] == n_keys
    stored = {s["id"] for s in listing["submissions"]}
    assert stored == {answers[0][1] for answers in results.values()}
    store = Store(pg_server["url"])
    try:
        with store.engine.connect() as conn:
            keys = conn.execute(schema.idempotency_keys.select()).all()
        assert sorted(row.key for row in keys) == sorted(bodies)
    finally:
        store.dispose()
