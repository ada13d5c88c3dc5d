"""Success responses: dumped through their schema, serialized by orjson."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import orjson
from flask import Response
from marshmallow import Schema


def respond(
    schema: Schema, obj: Any, status: int = 200, headers: Mapping[str, str] | None = None
) -> Response:
    """``schema.dump(obj)`` as ``application/json``; only declared fields leave."""
    body = orjson.dumps(schema.dump(obj), option=orjson.OPT_SERIALIZE_NUMPY)
    response = Response(body, status=status, mimetype="application/json")
    for name, value in (headers or {}).items():
        response.headers[name] = value
    return response


def respond_body(body: Any, status: int = 200) -> Response:
    """An already dumped body as ``application/json`` (for bodies too big to dump per item)."""
    return Response(
        orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY),
        status=status,
        mimetype="application/json",
    )


__all__ = ["respond", "respond_body"]
