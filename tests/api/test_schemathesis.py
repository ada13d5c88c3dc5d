"""schemathesis against the service's own OpenAPI document, through the Flask app (WSGI).

For every operation of ``/v1/openapi.json``: requests generated from the document, valid
(positive) and invalid (negative), a bounded number of each with a fixed seed
(``derandomize``), sent with a token of a role the operation names (or none, or another
role), with path parameters that are sometimes real objects (a registered holdout, a
stored submission, a sweep) and sometimes generated. Every response must pass
schemathesis' conformance checks: no 5xx, a documented status code, a documented content
type, a body that matches the documented schema, documented headers.

reference: schemathesis (https://schemathesis.readthedocs.io), its checks
``not_a_server_error``, ``status_code_conformance``, ``content_type_conformance``,
``response_schema_conformance`` and ``response_headers_conformance``.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from apidata import Holdout, classification_body, regression_body, regression_submission
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_headers_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from service import create_app

CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
    response_headers_conformance,
]
EXAMPLES = 20  # per operation and generation mode


def _register(client: Any, token: str, body: dict[str, Any]) -> dict[str, Any]:
    r = client.post("/v1/holdouts", json=body, headers={"Authorization": f"Bearer {token}"})
    assert r.status_code == 201, r.get_json()
    return r.get_json()


@pytest.fixture(scope="module")
def fuzz(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, Any]]:
    """One app on SQLite with tokens of every role and a few real objects to aim at."""
    path: Path = tmp_path_factory.mktemp("fuzz") / "fuzz.sqlite3"
    app = create_app({"DATABASE_URL": f"sqlite:///{path}", "TESTING": True,
                      "BOOTSTRAP_RESAMPLES": 200, "MAX_BODY_BYTES": 1 << 20})
    store = app.extensions["heldout_store"]
    store.init_schema()
    tokens = {
        role: store.create_token(role, group, "fuzz")[1]
        for role, group in (("admin", None), ("owner", "fuzz-owners"), ("submitter", "g1"))
    }
    client = app.test_client()
    reg_body = regression_body()
    reg = _register(client, tokens["owner"], reg_body)
    cls = _register(client, tokens["owner"], classification_body())
    body, _ = regression_submission(
        Holdout(reg["id"], reg_body, reg), sweep={"name": "depth", "complexity": 2}
    )
    r = client.post(f"/v1/holdouts/{reg['id']}/submissions", json=body,
                    headers={"Authorization": f"Bearer {tokens['submitter']}"})
    assert r.status_code == 201, r.get_json()
    spare = _register(client, tokens["owner"], regression_body(name="spare"))
    valid_submission, _ = regression_submission(Holdout(reg["id"], reg_body, reg), seed=5)
    schema = schemathesis.openapi.from_wsgi("/v1/openapi.json", app)
    yield {
        "schema": schema,
        "tokens": tokens,
        "real": {
            "holdout_id": [reg["id"], cls["id"]],
            "submission_id": [r.get_json()["id"]],
            "name": ["depth"],
        },
        "spare": {"holdout_id": [spare["id"]]},
        # Well-formed bodies, so the success responses are checked against the document too.
        "valid": {
            ("POST", "/v1/holdouts"): ({}, regression_body(name="fuzz-valid")),
            ("POST", "/v1/holdouts/{holdout_id}/submissions"): (
                {"holdout_id": reg["id"]},
                valid_submission,
            ),
        },
    }
    store.dispose()


def _roles() -> dict[tuple[str, str], tuple[str, ...]]:
    """(method, path) -> the roles its view allows (what ``requires`` records), or ()."""
    app = create_app({"DATABASE_URL": "sqlite://", "TESTING": True})
    out: dict[tuple[str, str], tuple[str, ...]] = {}
    for rule in app.url_map.iter_rules():
        path = rule.rule.replace("<", "{").replace(">", "}")
        roles = getattr(app.view_functions[rule.endpoint], "roles", ())
        for method in rule.methods or ():
            out[(method, path)] = tuple(roles)
    return out


ROLES = _roles()


def _cases() -> list[tuple[str, str, GenerationMode]]:
    """(method, path, mode) for every documented operation; negative data only where the
    operation takes parameters or a body (there is nothing to make invalid otherwise)."""
    from service.api.openapi import build_spec

    document = build_spec(create_app({"DATABASE_URL": "sqlite://", "TESTING": True}))
    out = []
    for path, ops in sorted(document["paths"].items()):
        for method, op in sorted(ops.items()):
            out.append((method.upper(), path, GenerationMode.POSITIVE))
            if op.get("parameters") or op.get("requestBody"):
                out.append((method.upper(), path, GenerationMode.NEGATIVE))
    return out


@pytest.mark.parametrize(("method", "path", "mode"), _cases())
def test_responses_conform_to_the_document(
    fuzz: dict[str, Any], method: str, path: str, mode: GenerationMode
) -> None:
    operation = fuzz["schema"][path][method]
    # Operations that change a holdout for good (closing it) aim at a holdout of their own.
    real_objects = fuzz["spare"] if path.endswith("/close") else fuzz["real"]
    names = [p for p in ("holdout_id", "submission_id", "name") if "{" + p + "}" in path]
    strategies = []
    if names:  # mostly aim at objects that exist, so views get past their 404
        for i in range(2):
            real = {name: real_objects[name][i % len(real_objects[name])] for name in names}
            strategies.append(operation.as_strategy(generation_mode=mode, path_parameters=real))
    strategies.append(operation.as_strategy(generation_mode=mode))
    if mode == GenerationMode.POSITIVE and (method, path) in fuzz["valid"]:
        params, body = fuzz["valid"][(method, path)]
        strategies.insert(0, operation.as_strategy(
            path_parameters=params, body=body, media_type="application/json"
        ))
    # Mostly a role the operation allows; sometimes another role, or no token at all.
    allowed = list(ROLES.get((method, path), ())) or ["admin"]
    role = st.one_of(
        st.sampled_from(allowed), st.sampled_from(allowed),
        st.sampled_from([None, "admin", "owner", "submitter"]),
    )

    @settings(max_examples=EXAMPLES, derandomize=True, deadline=None, database=None,
              suppress_health_check=list(HealthCheck))
    @given(case=st.one_of(*strategies), role=role)
    def run(case: Any, role: str | None) -> None:
        headers = {} if role is None else {"Authorization": f"Bearer {fuzz['tokens'][role]}"}
        case.call_and_validate(headers=headers, checks=CHECKS)

    run()
