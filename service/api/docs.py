"""The OpenAPI document, served as JSON."""

from __future__ import annotations

import orjson
from flask import Blueprint, Response, current_app

from .openapi import build_spec, operation

bp = Blueprint("docs", __name__)


@bp.get("/v1/openapi.json")
@operation(
    summary="This API's OpenAPI 3.1 document",
    tag="docs",
    response=(200, {"application/json": {"type": "object"}}),
)
def openapi_json() -> Response:
    cached = current_app.extensions.get("heldout_openapi")
    if cached is None:
        cached = orjson.dumps(build_spec(current_app))
        current_app.extensions["heldout_openapi"] = cached
    return Response(cached, mimetype="application/json")
