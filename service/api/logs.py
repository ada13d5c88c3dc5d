"""Structured logs: one JSON object per line, each request's carrying its request id.

Every request gets an id: the client's ``X-Request-ID`` when it sends a usable one (1 to 128
characters from ``A-Z a-z 0-9 . _ : -``, starting with a letter or digit), otherwise a new
random one (32 hex digits). It is echoed in the response's ``X-Request-ID`` header, written
into problem bodies (``request_id``, by ``errors.problem_response``) and logged with every
line the request produces, so a client's complaint leads straight to the server's lines.

After each request one line (logger ``heldout.request``) says what happened::

    {"time": "2026-12-02T04:05:06.789Z", "level": "INFO", "logger": "heldout.request",
     "message": "request", "request_id": "...", "method": "POST",
     "route": "/v1/holdouts/<holdout_id>/submissions", "status": 201, "duration_ms": 41.2,
     "holdout_id": "ho_...", "submission_id": "sub_...", "pid": 1234}

Never in a log line: a request or response body, a query string, a header value other than
the request id, a row id, a label, a prediction, a token, a group or model name. The route
is the URL rule, not the path; object ids come from the rule's own arguments (``holdout_id``,
``submission_id``) and from ``Location`` of a 201. Exceptions are logged as their type and
frames, without their message (a driver's message may quote a statement's values).

Under gunicorn, ``service.api.gunicorn_conf`` gives gunicorn's own loggers and the
``heldout`` logger this module's ``JsonFormatter`` (``LOGCONFIG``), so the server's whole
output is JSON lines; gunicorn's access log is off (this module's line replaces it).
"""

from __future__ import annotations

import logging
import re
import time
import traceback
import uuid
from datetime import UTC, datetime
from typing import Any

import orjson
from flask import Flask, Response, g, has_request_context, request

REQUEST_ID_HEADER = "X-Request-ID"
REQUEST_ID_MAX_LENGTH = 128
_REQUEST_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._:-]{0,%d}" % (REQUEST_ID_MAX_LENGTH - 1))
_ID_KEY = "heldout_request_id"
_START_KEY = "heldout_request_start"
# Fields a line may carry besides time, level, logger and message.
FIELDS = (
    "request_id",
    "method",
    "route",
    "status",
    "duration_ms",
    "holdout_id",
    "submission_id",
)
# The service's own object ids (a prefix and 16 base32 characters); anything else a client
# put in a path is not logged.
_OBJECT_ID = re.compile(r"(ho|sub)_[a-z2-7]{16}")
_LOCATION = re.compile(r"/v1/(holdouts|submissions)/((?:ho|sub)_[a-z2-7]{16})$")

request_log = logging.getLogger("heldout.request")


def valid_request_id(value: str | None) -> bool:
    """Whether a client's ``X-Request-ID`` may be used as the request's id."""
    return value is not None and _REQUEST_ID.fullmatch(value) is not None


def request_id() -> str | None:
    """This request's id (the client's valid ``X-Request-ID`` or a new one); None outside."""
    if not has_request_context():
        return None
    value = g.get(_ID_KEY)
    if value is None:
        sent = request.headers.get(REQUEST_ID_HEADER)
        value = sent if valid_request_id(sent) else uuid.uuid4().hex
        setattr(g, _ID_KEY, value)
    return str(value)


class JsonFormatter(logging.Formatter):
    """A log record as one JSON object on one line (orjson, UTC time with milliseconds)."""

    def format(self, record: logging.LogRecord) -> str:
        stamp = datetime.fromtimestamp(record.created, UTC)
        entry: dict[str, Any] = {
            "time": stamp.strftime("%Y-%m-%dT%H:%M:%S.") + f"{stamp.microsecond // 1000:03d}Z",
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        for name in FIELDS:
            value = getattr(record, name, None)
            if value is not None:
                entry[name] = value
        if "request_id" not in entry and has_request_context():
            entry["request_id"] = request_id()
        entry["pid"] = record.process
        if record.exc_info and record.exc_info[0] is not None:
            # The type and the frames; the message may quote values.
            entry["exception"] = record.exc_info[0].__name__
            entry["frames"] = "".join(traceback.format_tb(record.exc_info[2]))
        return orjson.dumps(entry, default=str).decode()


def _ids(response: Response) -> dict[str, str]:
    args = request.view_args or {}
    found = {
        key: str(args[key])
        for key in ("holdout_id", "submission_id")
        if _OBJECT_ID.fullmatch(str(args.get(key, "")))
    }
    if response.status_code == 201:
        match = _LOCATION.search(response.headers.get("Location", ""))
        if match:
            key = "holdout_id" if match.group(1) == "holdouts" else "submission_id"
            found.setdefault(key, match.group(2))
    return found


def install(app: Flask) -> None:
    """Give every request of ``app`` an id, echo it, and log one line when it is answered."""

    @app.before_request
    def _begin_request_log() -> None:
        g.setdefault(_START_KEY, time.perf_counter())
        request_id()

    @app.after_request
    def _log_request(response: Response) -> Response:
        rid = request_id()
        assert rid is not None
        response.headers[REQUEST_ID_HEADER] = rid
        start = g.get(_START_KEY)
        duration = None if start is None else round(1000 * (time.perf_counter() - start), 1)
        rule = request.url_rule
        fields: dict[str, Any] = {
            "request_id": rid,
            "method": request.method,
            "route": rule.rule if rule is not None else "unmatched",
            "status": response.status_code,
            "duration_ms": duration,
            **_ids(response),
        }
        request_log.info("request", extra=fields)
        return response


def logconfig(level: str = "INFO") -> dict[str, Any]:
    """A ``logging.config.dictConfig`` for gunicorn: every logger as JSON lines on stderr."""
    handler = {
        "class": "logging.StreamHandler",
        "formatter": "json",
        "stream": "ext://sys.stderr",
    }
    return {
        "version": 1,
        "disable_existing_loggers": False,
        "formatters": {"json": {"()": f"{__name__}.JsonFormatter"}},
        "handlers": {"json_stderr": handler},
        "root": {"level": "WARNING", "handlers": ["json_stderr"]},
        "loggers": {
            "gunicorn.error": {"level": "INFO", "handlers": ["json_stderr"], "propagate": False},
            "gunicorn.access": {"level": "INFO", "handlers": [], "propagate": False},
            "heldout": {"level": level, "handlers": ["json_stderr"], "propagate": False},
        },
    }


__all__ = [
    "FIELDS",
    "REQUEST_ID_HEADER",
    "REQUEST_ID_MAX_LENGTH",
    "JsonFormatter",
    "install",
    "logconfig",
    "request_id",
    "valid_request_id",
]
