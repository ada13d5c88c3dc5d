"""The Server-Timing header of a submission: phases and durations only.

reference: W3C Server Timing (https://www.w3.org/TR/server-timing/): a comma-separated list
of metric names with a ``dur`` parameter in milliseconds.
"""

from __future__ import annotations

import re
from typing import Any

from apidata import register, regression_body, regression_submission

METRIC = re.compile(r"^[A-Za-z0-9_]+;dur=\d+(\.\d+)?$")


def test_a_submission_reports_its_phases(owner: Any, submitter: Any) -> None:
    h = register(owner, regression_body())
    body, _ = regression_submission(h)
    r = submitter.post(f"/v1/holdouts/{h.id}/submissions", json=body)
    assert r.status_code == 201
    parts = [p.strip() for p in r.headers["Server-Timing"].split(",")]
    assert all(METRIC.match(p) for p in parts), parts
    names = [p.split(";")[0] for p in parts]
    assert names == ["upload", "parse", "convert_align", "score", "store", "respond"]
    # A refused submission reports the phases it went through; a plain read reports none.
    r = submitter.post(f"/v1/holdouts/{h.id}/submissions", json={**body, "ids": body["ids"][1:]})
    assert r.status_code == 422
    assert [p.split(";")[0].strip() for p in r.headers["Server-Timing"].split(",")] == [
        "upload", "parse", "respond"
    ]
    assert "Server-Timing" not in submitter.get(f"/v1/holdouts/{h.id}").headers
