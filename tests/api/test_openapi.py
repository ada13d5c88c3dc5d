"""The committed OpenAPI document is the generated one, and it is valid OpenAPI 3.1."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import yaml
from openapi_spec_validator import OpenAPIV31SpecValidator, validate

from service.api.openapi import build_spec, spec_yaml
from service.cli import OPENAPI_PATH, openapi_yaml

COMMITTED = Path(__file__).resolve().parents[2] / "openapi" / "openapi.yaml"


def test_committed_document_is_the_generated_one() -> None:
    assert COMMITTED == OPENAPI_PATH
    generated = openapi_yaml()
    assert COMMITTED.read_text(encoding="utf-8") == generated, (
        "openapi/openapi.yaml is stale: run `heldout openapi --write` and commit it"
    )


def test_document_is_valid_openapi_3_1() -> None:
    # reference: openapi-spec-validator, OpenAPI 3.1 schema
    document = yaml.safe_load(COMMITTED.read_text(encoding="utf-8"))
    assert document["openapi"] == "3.1.0"
    validate(document, cls=OpenAPIV31SpecValidator)


def test_every_route_is_documented(app: Any, client: Any) -> None:
    document = build_spec(app)
    documented = {
        (path, method.upper()) for path, ops in document["paths"].items() for method in ops
    }
    routes = set()
    for rule in app.url_map.iter_rules():
        if rule.endpoint == "static":
            continue
        path = rule.rule.replace("<", "{").replace(">", "}")
        for method in rule.methods - {"HEAD", "OPTIONS"}:
            routes.add((path, method))
    assert routes == documented
    assert client.get("/v1/openapi.json").get_json() == document
    assert yaml.safe_load(spec_yaml(app)) == document
