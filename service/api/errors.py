"""Every error the API can answer with, mapped once to an RFC 9457 problem.

Views never build error bodies: they raise. The tree::

    ApiError                      (any status; ``status``, ``slug``, ``title`` per class)
    +-- BadRequest                400  the request is malformed (not JSON, bad query value)
    +-- Unauthorized              401  no token, or an unknown or revoked one
    +-- Forbidden                 403  the token's role may not do this
    +-- NotFound                  404  no such object, or not one the caller may see
    +-- MethodNotAllowed          405
    +-- NotAcceptable             406  no representation matches ``Accept``
    +-- Conflict                  409  the request contradicts stored state
    +-- PayloadTooLarge           413
    +-- UnsupportedMediaType      415
    +-- ValidationFailed          422  well-formed but wrong content; ``errors`` names each field
    +-- TooManyRequests           429  a quota is used up; ``Retry-After`` says when to retry
    +-- ServiceUnavailable        503  the database cannot be reached

Errors raised by other layers are mapped here too: ``service.ingest.IngestError`` keeps its
own status and error list, ``service.scoring.ScoringInputError`` and
``service.charts.ChartInputError`` become 422, marshmallow's
``ValidationError`` 422 with one entry per field, werkzeug's HTTP errors their status, and
anything unexpected a 500 without internals. The body is always
``{type, title, status, detail, errors}`` as ``application/problem+json``; ``type`` is a
``tag:`` URI (RFC 9457 section 3.1.1: a stable identifier, not meant to be dereferenced).
"""

from __future__ import annotations

import logging
import traceback
from collections.abc import Mapping
from typing import Any

import orjson
from flask import Flask, Response, request
from marshmallow import ValidationError, fields
from psycopg import OperationalError as PsycopgOperationalError
from sqlalchemy.exc import DBAPIError, OperationalError
from sqlalchemy.exc import TimeoutError as PoolTimeoutError
from werkzeug.exceptions import HTTPException

from service.charts import ChartInputError
from service.ingest import IngestError
from service.scoring import ScoringInputError

from . import schemas
from .logs import request_id

PROBLEM_MEDIA_TYPE = "application/problem+json"
PROBLEM_TYPE_PREFIX = "tag:heldout,2025:problem/"

log = logging.getLogger("heldout.api")

# Every 503 tells the client when to try again: the database is restarting or the pool is
# exhausted, and the engine reconnects by itself (pool_pre_ping) once it is back.
RETRY_AFTER_SECONDS = 5


def problem_error(
    field: str, message: str, count: int = 0, examples: list[str] | None = None
) -> dict[str, Any]:
    """One entry of a problem's ``errors`` list (the same shape ingest errors use)."""
    return {"field": field, "message": message, "count": count, "examples": examples or []}


class ProblemBody(schemas.Problem):
    """A problem body as sent: RFC 9457's members, ``errors``, and the request's id."""

    request_id = fields.String(
        required=True,
        metadata={
            "description": "The request's id (its X-Request-ID, or one made for it); the "
            "server's log lines for this request carry it."
        },
    )


class ApiError(Exception):
    """Base of every error the API answers with on purpose."""

    status = 500
    slug = "internal-error"
    title = "Internal server error"

    def __init__(
        self,
        detail: str,
        errors: list[dict[str, Any]] | None = None,
        headers: Mapping[str, str] | None = None,
    ) -> None:
        super().__init__(detail)
        self.detail = detail
        self.errors = errors or []
        self.headers = dict(headers or {})


class BadRequest(ApiError):
    status, slug, title = 400, "malformed-request", "Malformed request"


class Unauthorized(ApiError):
    status, slug, title = 401, "unauthorized", "Authentication required"


class Forbidden(ApiError):
    status, slug, title = 403, "forbidden", "Not allowed for this role"


class NotFound(ApiError):
    status, slug, title = 404, "not-found", "Not found"


class MethodNotAllowed(ApiError):
    status, slug, title = 405, "method-not-allowed", "Method not allowed"


class NotAcceptable(ApiError):
    status, slug, title = 406, "not-acceptable", "No acceptable representation"


class Conflict(ApiError):
    status, slug, title = 409, "conflict", "Conflict with stored state"


class PayloadTooLarge(ApiError):
    status, slug, title = 413, "payload-too-large", "Request body too large"


class UnsupportedMediaType(ApiError):
    status, slug, title = 415, "unsupported-media-type", "Unsupported media type"


class ValidationFailed(ApiError):
    status, slug, title = 422, "invalid-content", "The request content is invalid"


class TooManyRequests(ApiError):
    status, slug, title = 429, "too-many-requests", "Quota used up"


class ServiceUnavailable(ApiError):
    status, slug, title = 503, "unavailable", "Service unavailable"


_BY_STATUS: dict[int, type[ApiError]] = {
    cls.status: cls
    for cls in (
        BadRequest,
        Unauthorized,
        Forbidden,
        NotFound,
        MethodNotAllowed,
        NotAcceptable,
        Conflict,
        PayloadTooLarge,
        UnsupportedMediaType,
        ValidationFailed,
        TooManyRequests,
        ServiceUnavailable,
    )
}

PROBLEM_SLUGS: dict[int, str] = {status: cls.slug for status, cls in _BY_STATUS.items()}


def problem_response(
    status: int,
    detail: str,
    errors: list[dict[str, Any]] | None = None,
    headers: Mapping[str, str] | None = None,
) -> Response:
    """The one place a problem body is written."""
    cls = _BY_STATUS.get(status)
    slug = cls.slug if cls else ApiError.slug
    title = cls.title if cls else ApiError.title
    if cls is None and status < 500:
        slug, title = "client-error", "Client error"
    body = {
        "type": PROBLEM_TYPE_PREFIX + slug,
        "title": title,
        "status": status,
        "detail": detail,
        "errors": errors or [],
    }
    rid = request_id()
    if rid is not None:
        body["request_id"] = rid
    response = Response(orjson.dumps(body), status=status, mimetype=PROBLEM_MEDIA_TYPE)
    for name, value in (headers or {}).items():
        response.headers[name] = value
    if status == 503:
        response.headers.setdefault("Retry-After", str(RETRY_AFTER_SECONDS))
    return response


def database_unreachable(exc: BaseException) -> bool:
    """Whether ``exc`` means the database cannot be reached now (503), rather than a bug.

    A refused or dropped connection (SQLAlchemy's ``OperationalError``, or a statement on a
    connection the driver reports lost), psycopg's own ``OperationalError`` and the pool's
    timeout (every connection busy) are; a constraint or programming error is not.
    """
    if isinstance(exc, OperationalError | PoolTimeoutError | PsycopgOperationalError):
        return True
    return isinstance(exc, DBAPIError) and bool(exc.connection_invalidated)


def flatten_messages(messages: Any, prefix: str = "") -> list[dict[str, Any]]:
    """marshmallow's nested ``{field: [messages]}`` as one entry per field path."""
    if isinstance(messages, Mapping):
        out: list[dict[str, Any]] = []
        for key, value in messages.items():
            name = str(key) if key != "_schema" else (prefix.rstrip(".") or "body")
            path = f"{prefix}{name}" if key != "_schema" else name
            if isinstance(value, Mapping):
                out.extend(flatten_messages(value, f"{path}."))
            else:
                out.extend(flatten_messages(value, path))
        return out
    if isinstance(messages, list) and all(isinstance(m, str) for m in messages):
        return [problem_error(prefix or "body", " ".join(messages))]
    if isinstance(messages, list):
        out = []
        for item in messages:
            out.extend(flatten_messages(item, prefix))
        return out
    return [problem_error(prefix or "body", str(messages))]


def _summary(errors: list[dict[str, Any]]) -> str:
    fields = ", ".join(dict.fromkeys(e["field"] for e in errors))
    return f"Fix these fields: {fields}." if fields else "The request content is invalid."


# The scoring core names its parameters; a problem names the request's fields.
_REQUEST_FIELDS = {
    "labels": "predictions",
    "train_y_true": "train.y_true",
    "train_predictions": "train.predictions",
    "train_labels": "train.predictions",
    "train_probabilities": "train.probabilities",
}


def register_error_handlers(app: Flask) -> None:
    """Map every exception the app can raise to a problem response, once."""

    @app.errorhandler(ApiError)
    def _api_error(exc: ApiError) -> Response:
        return problem_response(exc.status, exc.detail, exc.errors, exc.headers)

    @app.errorhandler(IngestError)
    def _ingest_error(exc: IngestError) -> Response:
        return problem_response(exc.status, exc.message, exc.to_problem_errors())

    @app.errorhandler(ScoringInputError)
    def _scoring_error(exc: ScoringInputError) -> Response:
        # Examples are left out: for y_true they would be the holdout's sealed labels.
        field = _REQUEST_FIELDS.get(exc.field, exc.field)
        return problem_response(422, f"{field}: {exc.message}", [problem_error(field, exc.message)])

    @app.errorhandler(ChartInputError)
    def _chart_error(exc: ChartInputError) -> Response:
        # A result the chart cannot draw (e.g. a metric undefined for every seed): 422.
        return problem_response(
            422,
            f"Cannot draw this chart: {exc.field}: {exc.message}",
            [problem_error(exc.field, exc.message)],
        )

    @app.errorhandler(DBAPIError)
    @app.errorhandler(PoolTimeoutError)
    @app.errorhandler(PsycopgOperationalError)
    def _database_error(exc: Exception) -> Response:
        if not database_unreachable(exc):
            return _unexpected(exc)
        # Type names only: a driver's message may quote the statement's parameters.
        cause = getattr(exc, "orig", None)
        log.error(
            "database unavailable: %s%s",
            type(exc).__name__,
            f" ({type(cause).__name__})" if cause is not None else "",
        )
        return problem_response(
            503,
            f"The database cannot be reached; retry in {RETRY_AFTER_SECONDS} seconds.",
        )

    @app.errorhandler(ValidationError)
    def _validation_error(exc: ValidationError) -> Response:
        errors = flatten_messages(exc.messages)
        return problem_response(422, _summary(errors), errors)

    @app.errorhandler(HTTPException)
    def _http_error(exc: HTTPException) -> Response:
        status = exc.code or 500
        headers = {}
        errors = []
        if status == 405 and getattr(exc, "valid_methods", None):
            headers["Allow"] = ", ".join(exc.valid_methods)
        if status == 413:
            limit = app.config["MAX_BODY_BYTES"]
            detail = (
                f"The request body is larger than the configured limit of "
                f"{limit} bytes (HELDOUT_MAX_BODY_BYTES)."
            )
            sent = request.content_length
            errors.append(
                problem_error(
                    "body",
                    f"more than the limit of {limit} bytes",
                    1,
                    [] if sent is None else [f"Content-Length: {sent}"],
                )
            )
        else:
            detail = exc.description or exc.name
        return problem_response(status, detail, errors, headers=headers)

    @app.errorhandler(Exception)
    def _unexpected(exc: Exception) -> Response:
        # Only the type and the frames: exception messages may quote request values.
        frames = "".join(traceback.format_tb(exc.__traceback__))
        log.error("unhandled %s\n%s", type(exc).__name__, frames)
        return problem_response(500, "An internal error occurred; it has been logged.")


__all__ = [
    "PROBLEM_MEDIA_TYPE",
    "PROBLEM_SLUGS",
    "PROBLEM_TYPE_PREFIX",
    "RETRY_AFTER_SECONDS",
    "ApiError",
    "ProblemBody",
    "BadRequest",
    "Conflict",
    "Forbidden",
    "MethodNotAllowed",
    "NotAcceptable",
    "NotFound",
    "PayloadTooLarge",
    "ServiceUnavailable",
    "TooManyRequests",
    "Unauthorized",
    "UnsupportedMediaType",
    "ValidationFailed",
    "database_unreachable",
    "flatten_messages",
    "problem_error",
    "problem_response",
    "register_error_handlers",
]
