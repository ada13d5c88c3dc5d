"""Quotas and the Ladder under concurrent requests, through a real gunicorn process.

Several worker processes receive submissions of one group at the same moment, on SQLite and
on PostgreSQL. Checks (RFC 6585 for 429 with Retry-After; Blum & Hardt 2015 for the Ladder):

- with a daily quota of q and 2q + 2 concurrent submissions, exactly q are stored (201) and
  the rest get 429 with Retry-After; nothing is half stored (each stored submission has its
  per-row losses, both slice reports and its guard outcome, and the counter says q);
- concurrent submissions under the Ladder leave a consistent state: every accepted
  improvement beat the best before it, so the group's best is the accepted submission with
  the lowest feedback loss, and the number of improvements matches the stored outcomes.
"""

from __future__ import annotations

from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import requests
import sqlalchemy as sa
from gunicorn_server import running_gunicorn

from service.store import Store, schema

QUOTA = 3
N_ROWS = 120


@pytest.fixture
def server(database_url: str, tmp_path: Path) -> Iterator[dict[str, Any]]:
    store = Store(database_url)
    store.init_schema()
    tokens = {
        "owner": store.create_token("owner", "lab")[1],
        "submitter": store.create_token("submitter", "g1")[1],
    }
    settings = {
        "HELDOUT_DATABASE_URL": database_url,
        "HELDOUT_WORKERS": "3",
        "HELDOUT_BOOTSTRAP_RESAMPLES": "100",
    }
    try:
        with running_gunicorn(tmp_path, settings) as running:
            yield {"base": running.base, "tokens": tokens, "store": store, "log": running.log}
    finally:
        store.dispose()


def _register(base: str, owner: dict[str, str], name: str, policy: dict[str, Any]) -> tuple:
    rng = np.random.default_rng(len(name))
    ids = [f"r{i:03d}" for i in range(N_ROWS)]
    y = rng.normal(size=N_ROWS) * 10.0
    body = {"name": name, "task": "regression", "ids": ids, "y_true": y.tolist(), "policy": policy}
    r = requests.post(f"{base}/v1/holdouts", json=body, headers=owner, timeout=30)
    assert r.status_code == 201, r.text
    return r.json(), ids, y


def _count(store: Store, table: sa.Table, column: sa.Column, ids: list[str]) -> int:
    with store.engine.connect() as conn:
        query = sa.select(sa.func.count()).select_from(table).where(column.in_(ids))
        return int(conn.execute(query).scalar_one())


def test_quota_and_ladder_under_concurrent_submissions(server: dict[str, Any]) -> None:
    base, store = server["base"], server["store"]
    owner = {"Authorization": f"Bearer {server['tokens']['owner']}"}
    group = {"Authorization": f"Bearer {server['tokens']['submitter']}"}

    # --- the quota: 2q + 2 submissions at once, exactly q stored
    holdout, ids, y = _register(base, owner, "quota", {"daily_quota": QUOTA, "guard": "none"})
    rng = np.random.default_rng(1)
    bodies = [
        {"model": f"m{k}", "ids": ids, "predictions": (y + rng.normal(size=N_ROWS)).tolist()}
        for k in range(2 * QUOTA + 2)
    ]

    def submit(body: dict[str, Any], h: dict[str, Any] = holdout) -> requests.Response:
        path = f"{base}/v1/holdouts/{h['id']}/submissions"
        return requests.post(path, json=body, headers=group, timeout=120)

    with ThreadPoolExecutor(max_workers=len(bodies)) as pool:
        responses = list(pool.map(submit, bodies))
    statuses = sorted(r.status_code for r in responses)
    assert statuses == [201] * QUOTA + [429] * (len(bodies) - QUOTA), [r.text for r in responses]
    for r in responses:
        if r.status_code == 429:
            assert int(r.headers["Retry-After"]) >= 1
            assert r.headers["Content-Type"] == "application/problem+json"
    stored = [r.json()["id"] for r in responses if r.status_code == 201]
    listed = requests.get(f"{base}/v1/holdouts/{holdout['id']}/submissions", headers=owner)
    assert sorted(s["id"] for s in listed.json()["submissions"]) == sorted(stored)
    # Nothing half stored: every part of every stored submission, and nothing else.
    all_ids = [s["id"] for s in listed.json()["submissions"]]
    assert (
        _count(store, schema.submission_data, schema.submission_data.c.submission_id, all_ids)
        == QUOTA
    )
    slices = schema.submission_slices
    assert _count(store, slices, slices.c.submission_id, all_ids) == 2 * QUOTA
    guards = schema.submission_guards
    assert _count(store, guards, guards.c.submission_id, all_ids) == QUOTA
    with store.engine.connect() as conn:
        gs = schema.group_states
        used = conn.execute(
            sa.select(gs.c.quota_used).where(gs.c.holdout_id == holdout["id"])
        ).scalar_one()
    assert used == QUOTA

    # --- the Ladder: concurrent submissions of one group serialize on its state
    ladder, ids, y = _register(base, owner, "ladder", {"guard": "ladder"})
    rng = np.random.default_rng(2)
    scales = rng.permutation(np.linspace(2.0, 6.0, 10))
    bodies = [
        {
            "model": f"s{k}",
            "ids": ids,
            "predictions": (y + rng.normal(scale=s, size=N_ROWS)).tolist(),
        }
        for k, s in enumerate(scales)
    ]
    with ThreadPoolExecutor(max_workers=len(bodies)) as pool:
        responses = list(pool.map(lambda b: submit(b, ladder), bodies))
    assert [r.status_code for r in responses] == [201] * len(bodies), [r.text for r in responses]
    outs = [r.json() for r in responses]
    improved = [o for o in outs if o["guard"]["improved"]]
    full = {
        o["id"]: requests.get(f"{base}/v1/submissions/{o['id']}", headers=owner).json()
        for o in outs
    }
    with store.engine.connect() as conn:
        gs = schema.group_states
        state = conn.execute(sa.select(gs).where(gs.c.holdout_id == ladder["id"])).one()
    assert state.n_improvements == len(improved) >= 1
    feedback = {i: full[i]["views"]["feedback"]["scores"]["mse"] for i in full}
    best = min((o["id"] for o in improved), key=feedback.get)
    assert state.best_submission_id == best
    assert state.best_loss == pytest.approx(feedback[best], rel=1e-12)
    # A submission that did not improve was shown an accepted one's scores.
    accepted = {o["id"] for o in improved}
    for o in outs:
        if not o["guard"]["improved"]:
            assert o["guard"]["best_submission_id"] in accepted
