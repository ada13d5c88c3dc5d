"""Closing a holdout: no more submissions, the salt revealed, final standings on the reserve.

References: the fingerprint's documented encoding (README "The fingerprint"; SHA-256 from
Python's ``hashlib``), recomputed from the registered labels and the revealed salt, and the
``heldout verify-fingerprint`` command run as a subprocess on CSV, Parquet and JSON files;
the scoring core on the reserve rows for the reserve numbers.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from apidata import (
    classification_body,
    probability_submission,
    register,
    regression_body,
    regression_submission,
)
from guarddata import holdout_mask

from service.cli import main
from service.scoring.guard import round_nested

HELDOUT = Path(sys.executable).parent / "heldout"


def _documented(salt_hex: str, ids: list[str], texts: list[str]) -> str:
    # reference: README "The fingerprint": SHA-256(salt || for each row: id, 0x1F, label, 0x1E)
    digest = hashlib.sha256(bytes.fromhex(salt_hex))
    for i, t in zip(ids, texts, strict=True):
        digest.update(f"{i}\x1f{t}\x1e".encode())
    return digest.hexdigest()


def _verify(salt: str, fingerprint: str, path: Path) -> subprocess.CompletedProcess:
    """The console script as a user runs it (a subprocess)."""
    argv = [str(HELDOUT), "verify-fingerprint", "--salt", salt, "--fingerprint", fingerprint]
    return subprocess.run(
        [*argv, str(path)], capture_output=True, text=True, timeout=120, check=False
    )


def _verify_here(capsys: Any, salt: str, fingerprint: str, path: Path) -> tuple[int, str, str]:
    """The same command in this process (``service.cli.main``), which is faster."""
    code = main(["verify-fingerprint", "--salt", salt, "--fingerprint", fingerprint, str(path)])
    out = capsys.readouterr()
    return code, out.out.strip(), out.err


def _write(path: Path, ids: list[str], labels: list[Any]) -> Path:
    if path.suffix == ".csv":
        lines = [
            "id,y_true",
            *(
                f"{i},{v!r}" if isinstance(v, float) else f"{i},{v}"
                for i, v in zip(ids, labels, strict=True)
            ),
        ]
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    elif path.suffix == ".parquet":
        pq.write_table(pa.table({"id": ids, "y_true": labels}), path)
    else:
        path.write_text(json.dumps({"ids": ids, "y_true": labels}), encoding="utf-8")
    return path


def _close(owner: Any, holdout_id: str) -> dict[str, Any]:
    r = owner.post(f"/v1/holdouts/{holdout_id}/close")
    assert r.status_code == 200, r.get_json()
    return r.get_json()


@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)
def test_the_revealed_salt_and_the_labels_reproduce_the_fingerprint(
    owner: Any, submitter: Any, tmp_path: Path, capsys: Any
) -> None:
    reg = register(owner, regression_body("reveal-r"))
    cls = register(owner, classification_body("reveal-c"))
    before = submitter.get(f"/v1/holdouts/{reg.id}").get_json()
    assert before["salt"] is None and before["closed_at"] is None
    for h in (reg, cls):
        closed = _close(owner, h.id)
        assert closed["fingerprint"] == h.response["fingerprint"]
        assert len(closed["salt"]) == 64 and closed["closed_at"] is not None
        seen = submitter.get(f"/v1/holdouts/{h.id}").get_json()
        assert seen["salt"] == closed["salt"] and seen["split"]["seed"] == closed["split"]["seed"]
        texts = [repr(float(v)) for v in h.y] if h is reg else list(h.y)
        assert _documented(closed["salt"], h.ids, texts) == h.response["fingerprint"]
        fingerprint = h.response["fingerprint"]
        paths = [_write(tmp_path / f"{h.id}{s}", h.ids, h.y) for s in (".csv", ".parquet", ".json")]
        # The console script as a subprocess on one file, the same command in-process on all.
        done = _verify(closed["salt"], fingerprint, paths[0 if h is reg else 1])
        assert (done.returncode, done.stdout.strip()) == (0, "match"), done.stderr
        for path in paths:
            assert _verify_here(capsys, closed["salt"], fingerprint, path)[:2] == (0, "match")
        # One changed label, or another salt: no match (exit 1).
        changed = list(h.y)
        changed[5] = changed[5] + 1e-9 if h is reg else changed[6]
        assert changed != list(h.y)
        path = _write(tmp_path / f"changed-{h.id}.csv", h.ids, changed)
        if h is reg:
            done = _verify(closed["salt"], fingerprint, path)
            assert (done.returncode, done.stdout.strip()) == (1, "mismatch"), done.stderr
        assert _verify_here(capsys, closed["salt"], fingerprint, path)[:2] == (1, "mismatch")
        wrong_salt = _verify_here(capsys, "00" * 32, fingerprint, paths[2])
        assert wrong_salt[:2] == (1, "mismatch")
    # Unusable input is exit 2 with a message, not a mismatch.
    code, _, err = _verify_here(capsys, "zz", reg.response["fingerprint"], tmp_path / "x.csv")
    assert code == 2 and "hexadecimal" in err
    code, _, err = _verify_here(capsys, "00" * 32, reg.response["fingerprint"], tmp_path / "x.csv")
    assert code == 2 and "cannot read" in err


def test_after_close_every_submission_is_refused(owner: Any, submitter: Any, store: Any) -> None:
    h = register(owner, regression_body("closing"))
    body, _ = regression_submission(h)
    assert submitter.post(f"/v1/holdouts/{h.id}/submissions", json=body).status_code == 201
    first = _close(owner, h.id)
    again = _close(owner, h.id)  # idempotent: the first closing time stands
    assert again["closed_at"] == first["closed_at"] and again["salt"] == first["salt"]
    for payload in (body, {**body, "model": "other"}):
        r = submitter.post(f"/v1/holdouts/{h.id}/submissions", json=payload)
        assert r.status_code == 409 and r.mimetype == "application/problem+json"
        assert "closed" in r.get_json()["detail"]
    assert store.count_submissions(h.id) == 1


def test_closing_needs_the_owner(
    client: Any, owner: Any, other_owner: Any, admin: Any, submitter: Any
) -> None:
    h = register(owner, regression_body("who-closes"))
    path = f"/v1/holdouts/{h.id}/close"
    assert client.post(path).status_code == 401
    assert submitter.post(path).status_code == 403
    assert other_owner.post(path).status_code == 404
    assert owner.get(f"/v1/holdouts/{h.id}").get_json()["closed_at"] is None
    assert admin.post(path).status_code == 200
    assert admin.post("/v1/holdouts/ho_doesnotexist/close").status_code == 404


def test_final_standings_and_reserve_views_after_close(owner: Any, make_user: Any) -> None:
    h = register(owner, {**classification_body("final"), "policy": {"groups": ["ga", "gb", "gc"]}})
    classes = h.response["classes"]
    y = np.array([classes.index(v) for v in h.y])
    mask = holdout_mask(owner, h, strata=y)
    users = {g: make_user("submitter", g) for g in ("ga", "gb", "gc")}
    outs = {}
    for k, g in enumerate(("ga", "gb")):
        body, _ = probability_submission(h, seed=10 + k, sweep={"name": "s", "complexity": 1})
        r = users[g].post(f"/v1/holdouts/{h.id}/submissions", json=body)
        assert r.status_code == 201
        outs[g] = r.get_json()
    path = f"/v1/holdouts/{h.id}/standings"
    assert users["ga"].get(path).get_json()["final"] is None
    assert users["ga"].get(f"/v1/holdouts/{h.id}/sweeps/s?slice=reserve").status_code == 422
    _close(owner, h.id)

    table = owner.get(path).get_json()
    mine = users["ga"].get(path).get_json()
    assert table["closed_at"] is not None and len(table["final"]) == 2
    for full, seen in zip(table["final"], mine["final"], strict=True):
        [entry] = [e for e in table["entries"] if e["group"] == full["group"]]
        assert full["value"] == entry["reserve_value"]  # the same submission, on the reserve
        assert seen["group"] == full["group"] and seen["value"] == round(full["value"], 4)
        assert (seen["submission_id"] is None) == (full["group"] != "ga")
    # A group that never submitted sees the holdout and its live standings, not the final.
    outsider = users["gc"].get(path)
    assert outsider.status_code == 200 and outsider.get_json()["final"] is None
    assert users["gc"].get(f"/v1/holdouts/{h.id}").get_json()["salt"] is not None

    # Submitters may now read the reserve view of their own submissions, rounded.
    own = owner.get(f"/v1/submissions/{outs['ga']['id']}").get_json()["views"]["reserve"]
    seen = users["ga"].get(f"/v1/submissions/{outs['ga']['id']}").get_json()
    assert seen["slice"] == "feedback" and set(seen["views"]) == {"reserve"}
    assert seen["views"]["reserve"] == round_nested(own, 4)
    assert seen["views"]["reserve"]["n_rows"] == int((~mask).sum())
    sweep = users["ga"].get(f"/v1/holdouts/{h.id}/sweeps/s?slice=reserve")
    assert sweep.status_code == 200 and sweep.get_json()["slice"] == "reserve"
