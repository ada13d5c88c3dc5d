"""Where a request's time goes, as a ``Server-Timing`` response header.

Views and the helpers they call mark the end of each phase with ``mark("parse")``; the time
since the previous mark (or since the request began) is charged to that phase, and a phase
marked twice adds up. After the view returns, the header lists every phase in the order
first marked, then ``respond`` (building the response), in milliseconds, as the W3C Server
Timing specification writes it (``upload;dur=812.4, parse;dur=35.1, ...``).

It holds durations only, never a value of the request, and only for requests that marked a
phase (the submission and registration endpoints). A client uploading a large file sees
where its time went, and ``tests/perf/bench_ingest.py`` reads the phases of a real gunicorn
worker from it. Outside a request, ``mark`` does nothing.
"""

from __future__ import annotations

import time

from flask import Flask, Response, g, has_request_context

HEADER = "Server-Timing"
_KEY = "heldout_timing"


def _begin() -> None:
    g.setdefault(_KEY, {"last": time.perf_counter(), "phases": {}})


def mark(phase: str) -> None:
    """Charge the time since the previous mark (or the request's start) to ``phase``."""
    if not has_request_context():
        return
    state = g.get(_KEY)
    if state is None:
        return
    now = time.perf_counter()
    phases: dict[str, float] = state["phases"]
    phases[phase] = phases.get(phase, 0.0) + (now - state["last"])
    state["last"] = now


def header_value() -> str | None:
    """The header's value for this request, or None when no phase was marked."""
    state = g.get(_KEY)
    if not state or not state["phases"]:
        return None
    mark("respond")
    return ", ".join(f"{name};dur={1000.0 * s:.1f}" for name, s in state["phases"].items())


def phase_seconds(phase: str) -> float | None:
    """Seconds charged to ``phase`` in this request so far; None if never marked (metrics)."""
    if not has_request_context():
        return None
    state = g.get(_KEY)
    return None if not state else state["phases"].get(phase)


def install(app: Flask) -> None:
    """Start the clock before each request; add the header to responses that marked phases."""

    @app.before_request
    def _start_clock() -> None:
        _begin()

    @app.after_request
    def _server_timing(response: Response) -> Response:
        value = header_value()
        if value is not None:
            response.headers[HEADER] = value
        return response


__all__ = ["HEADER", "header_value", "install", "mark", "phase_seconds"]
