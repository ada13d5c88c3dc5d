"""Fixtures of the page tests: one app on SQLite with a secret key, tokens of each role,
and a scenario (``webdata.build``) registered and submitted through the API."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from webdata import SECRET_KEY, Scenario, build


@dataclass
class Site:
    app: Any
    tokens: dict[str, str]  # owner, other_owner, admin, g1, g2
    scenario: Scenario


@pytest.fixture(scope="module")
def site(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Site]:
    from service import create_app

    path: Path = tmp_path_factory.mktemp("pages") / "pages.sqlite3"
    app = create_app(
        {
            "DATABASE_URL": f"sqlite:///{path}",
            "TESTING": True,
            "BOOTSTRAP_RESAMPLES": 200,
            "SECRET_KEY": SECRET_KEY,
        }
    )
    store = app.extensions["heldout_store"]
    store.init_schema()
    tokens = {
        name: store.create_token(role, group, f"page test {name}")[1]
        for name, role, group in (
            ("owner", "owner", "team-a"),
            ("other_owner", "owner", "team-b"),
            ("admin", "admin", None),
            ("g1", "submitter", "g1"),
            ("g2", "submitter", "g2"),
        )
    }
    client = app.test_client()

    def post(path: str, **kw: Any) -> tuple[int, Any]:
        r = client.post(path, **kw)
        return r.status_code, r.get_json()

    scenario = build(post, tokens["owner"], tokens["g1"], tokens["g2"])
    yield Site(app, tokens, scenario)
    store.dispose()
