"""Concurrent retries with one Idempotency-Key through gunicorn (two workers) on PostgreSQL.

Several threads post the same keyed submission at once, so the requests are scored in both
worker processes at the same time; the database's unique constraint on (holdout, group,
key) must leave exactly one stored submission, and every request must answer with it.
Reference: the IETF HTTPAPI draft "The Idempotency-Key HTTP Header Field". Every wait is
bounded.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
import requests

from service.cli import gunicorn_argv
from service.store import Store, make_engine, schema

BIN = Path(sys.executable).parent
START_TIMEOUT = 60.0


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


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
    port = _free_port()
    env = {
        **os.environ,
        "HELDOUT_DATABASE_URL": postgres_url,
        "HELDOUT_BIND": f"127.0.0.1:{port}",
        "HELDOUT_WORKERS": "2",
        "HELDOUT_BOOTSTRAP_RESAMPLES": "200",
    }
    argv = gunicorn_argv()
    argv[0] = str(BIN / argv[0])
    log = tmp_path / "gunicorn.log"
    with log.open("wb") as sink:
        proc = subprocess.Popen(argv, env=env, stdout=sink, stderr=subprocess.STDOUT,
                                cwd=tmp_path, start_new_session=True)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + START_TIMEOUT
        while True:
            assert proc.poll() is None, log.read_text()
            try:
                if requests.get(f"{base}/readyz", timeout=5).status_code == 200:
                    break
            except (requests.ConnectionError, requests.Timeout):
                pass
            assert time.monotonic() < deadline, "gunicorn did not become ready"
            time.sleep(0.2)
        yield {"base": base, "tokens": tokens, "url": postgres_url}
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGTERM)
            try:
                proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=10)


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
