"""End to end through a real gunicorn process on a loopback port.

The server is started with the command the compose file runs (``heldout serve``'s argv),
tokens are made with the ``heldout`` console script, and a holdout is registered from a
CSV upload and scored from a gzip JSON submission with ``requests``. Every wait is bounded.
"""

from __future__ import annotations

import gzip
import os
import subprocess
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pytest
import requests
from gunicorn_server import BIN, running_gunicorn


@pytest.fixture
def server(tmp_path: Path) -> Iterator[dict[str, Any]]:
    settings = {
        "HELDOUT_DATABASE_URL": f"sqlite:///{tmp_path / 'heldout.sqlite3'}",
        "HELDOUT_WORKERS": "2",
        "HELDOUT_BOOTSTRAP_RESAMPLES": "200",
    }
    env = {**os.environ, **settings}

    def token(role: str, group: str | None = None) -> str:
        argv = [str(BIN / "heldout"), "tokens", "create", "--role", role]
        if group:
            argv += ["--group", group]
        done = subprocess.run(argv, env=env, capture_output=True, text=True, timeout=60, check=True)
        return done.stdout.strip()

    tokens = {"owner": token("owner", "lab"), "submitter": token("submitter", "g1")}
    with running_gunicorn(tmp_path, settings) as running:
        yield {"base": running.base, "tokens": tokens, "log": running.log, "proc": running.proc}


def test_register_and_submit_through_gunicorn(server: dict[str, Any]) -> None:
    base, tokens = server["base"], server["tokens"]
    owner = {"Authorization": f"Bearer {tokens['owner']}"}
    submitter = {"Authorization": f"Bearer {tokens['submitter']}"}
    rng = np.random.default_rng(8)
    n = 200
    ids = [f"r{i:03d}" for i in range(n)]
    y = rng.normal(size=n) * 7.0 + 3.141592653589793
    csv = "id,y_true\n" + "".join(f"{i},{v!r}\n" for i, v in zip(ids, y.tolist(), strict=True))

    r = requests.post(
        f"{base}/v1/holdouts",
        headers=owner,
        data={"name": "loopback", "task": "regression"},
        files={"file": ("holdout.csv", csv.encode(), "text/csv")},
        timeout=30,
    )
    assert r.status_code == 201, r.text
    holdout = r.json()
    assert holdout["n_rows"] == n and "y_true" not in r.text

    listed = requests.get(f"{base}/v1/holdouts/{holdout['id']}/ids", headers=submitter, timeout=30)
    assert listed.json()["ids"] == sorted(ids)

    preds = y + rng.normal(size=(3, n))
    body = {"model": "m", "ids": ids[::-1], "predictions": preds[:, ::-1].tolist()}
    r = requests.post(
        f"{base}/v1/holdouts/{holdout['id']}/submissions",
        headers={**submitter, "Content-Type": "application/json", "Content-Encoding": "gzip"},
        data=gzip.compress(orjson.dumps(body)),
        timeout=60,
    )
    assert r.status_code == 201, r.text
    assert r.json()["n_seeds"] == 3 and r.json()["slice"] == "feedback"
    # The owner's view holds the full-set scores (submitters see the feedback slice).
    result = requests.get(f"{base}/v1/submissions/{r.json()['id']}", headers=owner, timeout=30)
    assert result.json()["scores"]["mse"] == pytest.approx(np.mean((preds - y) ** 2), rel=1e-12)

    # Several requests at once reach both workers, each with its own engine.
    def standings(_: int) -> int:
        return requests.get(
            f"{base}/v1/holdouts/{holdout['id']}/standings", headers=submitter, timeout=30
        ).status_code

    with ThreadPoolExecutor(max_workers=6) as pool:
        assert set(pool.map(standings, range(12))) == {200}
    r = requests.get(f"{base}/v1/holdouts/{holdout['id']}/submissions", timeout=30)
    assert r.status_code == 401 and r.headers["Content-Type"] == "application/problem+json"

    # The access log has paths without values: no label, no prediction, no token.
    text = server["log"].read_text()
    assert "/v1/holdouts" in text
    for secret in (repr(float(y[0])), repr(float(preds[0, 0])), *tokens.values()):
        assert secret not in text
