"""Liveness and readiness, without authentication."""

from __future__ import annotations

import logging

from flask import Blueprint, Response

from .auth import get_store
from .errors import ServiceUnavailable
from .openapi import operation
from .responses import respond
from .schemas import Health, Ready

bp = Blueprint("health", __name__)
log = logging.getLogger("heldout.api")


@bp.get("/healthz")
@operation(summary="The process is alive", tag="health", response=(200, Health))
def healthz() -> Response:
    return respond(Health(), {"status": "ok"})


@bp.get("/readyz")
@operation(
    summary="The database is reachable",
    tag="health",
    response=(200, Ready),
    errors=(503,),
)
def readyz() -> Response:
    try:
        get_store().ping()
    except Exception as exc:  # any driver error means "not ready"; details stay in the log
        log.warning("readiness check failed: %s", type(exc).__name__)
        raise ServiceUnavailable("The database cannot be reached.") from None
    return respond(Ready(), {"status": "ok", "database": "ok"})
