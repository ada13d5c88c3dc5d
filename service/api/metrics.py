"""``GET /metrics``: the service's counters in the Prometheus text format.

Under gunicorn every worker process counts for itself, in prometheus-client's multiprocess
mode: ``service.api.gunicorn_conf`` sets ``PROMETHEUS_MULTIPROC_DIR`` (a fresh directory per
server start unless the operator gives one) before any worker imports this module, and marks
a dead worker's files when it exits; ``/metrics`` on any worker then sums every worker of
the server. Without that variable (the Flask test client, a single process) the counters are
the process's own.

What is counted (every name starts with ``heldout_``):

- ``http_requests_total{method, route, status}`` and
  ``http_request_duration_seconds{method, route}`` (histogram): ``route`` is the URL rule
  (``/v1/holdouts/<holdout_id>/submissions``), never the path, so no id becomes a label;
  ``unmatched`` for a path no rule matches.
- ``submissions_scored_total{task}``, ``scoring_duration_seconds{task}`` (histogram, the
  request's ``score`` phase: the three slices' reports and the verdicts) and
  ``rows_scored_total{task}`` (the holdout's rows, once per scored submission): counted
  when a submission is stored (201, not an idempotent replay).
- ``label_cache_requests_total{result}``: ``hit`` or ``miss`` of the per-worker cache of
  decoded holdout arrays (``Store.holdout_arrays``).

Who may read it: anyone who can reach the bind address, without a token, as ``/readyz``.
It holds counts and durations only, labelled by method, URL rule, status, task and cache
result: never an id, a label, a prediction, a token or a group name. Keep the port inside
your network as you would the database's.
"""

from __future__ import annotations

import os
import time

import orjson
from flask import Blueprint, Flask, Response, g, has_request_context, request
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Histogram,
    disable_created_metrics,
    generate_latest,
    multiprocess,
)

from service.store import HoldoutArrays, Store

from . import timing
from .openapi import operation

MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"
UNMATCHED = "unmatched"
# The endpoint whose 201 means "a submission was scored and stored".
SUBMIT_ENDPOINT = "submissions.create_submission"

# The same series in single-process and multiprocess mode (which has no _created samples).
disable_created_metrics()

# Requests range from a health check (~1 ms) to a large upload (minutes).
_REQUEST_BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60, 120, 300)
_SCORING_BUCKETS = (0.001, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30, 60)

REQUESTS = Counter(
    "heldout_http_requests_total",
    "HTTP requests answered, by method, URL rule and status.",
    ("method", "route", "status"),
)
REQUEST_SECONDS = Histogram(
    "heldout_http_request_duration_seconds",
    "Time from the start of a request's handling to its response, by method and URL rule.",
    ("method", "route"),
    buckets=_REQUEST_BUCKETS,
)
SUBMISSIONS_SCORED = Counter(
    "heldout_submissions_scored_total", "Submissions scored and stored, by task.", ("task",)
)
SCORING_SECONDS = Histogram(
    "heldout_scoring_duration_seconds",
    "Time a stored submission spent in scoring (its Server-Timing 'score' phase), by task.",
    ("task",),
    buckets=_SCORING_BUCKETS,
)
ROWS_SCORED = Counter(
    "heldout_rows_scored_total",
    "Holdout rows scored, once per stored submission whatever its number of seeds, by task.",
    ("task",),
)
LABEL_CACHE = Counter(
    "heldout_label_cache_requests_total",
    "Lookups of a holdout's decoded ids and labels in the worker's cache: hit or miss.",
    ("result",),
)

bp = Blueprint("metrics", __name__)
_START = "heldout_metrics_start"
_ROWS = "heldout_metrics_rows"


def registry() -> CollectorRegistry:
    """Every worker's counters under gunicorn (multiprocess mode), else this process's."""
    if os.environ.get(MULTIPROC_ENV):
        merged = CollectorRegistry()
        multiprocess.MultiProcessCollector(merged)
        return merged
    return REGISTRY


@bp.get("/metrics")
@operation(
    summary="Counters and latency histograms in the Prometheus text format",
    tag="health",
    description=(
        "Requests by method, URL rule and status; request latency; submissions scored, "
        "scoring time and rows scored by task; label-cache hits and misses. Counts and "
        "durations only: no id, label, prediction, token or group. No token needed: keep "
        "the port inside your network."
    ),
    response=(200, {"text/plain": {"type": "string"}}),
)
def metrics_view() -> Response:
    return Response(generate_latest(registry()), mimetype=None, content_type=CONTENT_TYPE_LATEST)


def label_cache_event(hit: bool, arrays: HoldoutArrays) -> None:
    """Count a label-cache lookup; remember the holdout's rows for the request's metrics."""
    LABEL_CACHE.labels(result="hit" if hit else "miss").inc()
    if has_request_context():
        g.setdefault(_ROWS, int(arrays.ids.shape[0]))


def _route() -> str:
    rule = request.url_rule
    return rule.rule if rule is not None else UNMATCHED


def _record_submission(response: Response) -> None:
    if (
        request.endpoint != SUBMIT_ENDPOINT
        or response.status_code != 201
        or response.headers.get("Idempotent-Replayed") == "true"
    ):
        return
    try:
        task = str(orjson.loads(response.get_data())["task"])
    except (orjson.JSONDecodeError, KeyError, TypeError):
        task = "unknown"
    SUBMISSIONS_SCORED.labels(task=task).inc()
    seconds = timing.phase_seconds("score")
    if seconds is not None:
        SCORING_SECONDS.labels(task=task).observe(seconds)
    rows = g.get(_ROWS)
    if rows is not None:
        ROWS_SCORED.labels(task=task).inc(rows)


def install(app: Flask, store: Store) -> None:
    """Count every request of ``app``, the store's label cache, and serve ``/metrics``."""
    store.label_cache_observer = label_cache_event
    app.register_blueprint(bp)

    @app.before_request
    def _start_metrics_clock() -> None:
        g.setdefault(_START, time.perf_counter())

    @app.after_request
    def _count_request(response: Response) -> Response:
        start = g.get(_START)
        route = _route()
        REQUESTS.labels(request.method, route, str(response.status_code)).inc()
        if start is not None:
            REQUEST_SECONDS.labels(request.method, route).observe(time.perf_counter() - start)
        _record_submission(response)
        return response


def mark_process_dead(pid: int) -> None:
    """gunicorn's ``child_exit``: retire a dead worker's live-gauge files (multiprocess)."""
    if os.environ.get(MULTIPROC_ENV):
        multiprocess.mark_process_dead(pid)


__all__ = [
    "LABEL_CACHE",
    "MULTIPROC_ENV",
    "REQUESTS",
    "REQUEST_SECONDS",
    "ROWS_SCORED",
    "SCORING_SECONDS",
    "SUBMISSIONS_SCORED",
    "install",
    "label_cache_event",
    "mark_process_dead",
    "metrics_view",
    "registry",
]
