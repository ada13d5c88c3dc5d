"""Charts of the API's results as SVG and PNG, drawn from the JSON the same caller reads.

Every chart is drawn from the body of the JSON endpoint it pictures, produced by that
endpoint's own view function for the same caller (``view_json``): a chart can never show a
number the caller's JSON does not (a submitter's charts show the feedback slice through the
guard, its own group's details, and nothing from the reserve before close).

=============================================================  ===============================
Path (``.svg`` or ``.png``)                                    Drawn from
=============================================================  ===============================
``/v1/submissions/{id}/charts/decomposition``                  ``GET /v1/submissions/{id}``
``/v1/submissions/{id}/charts/seed-spread``                    ``GET /v1/submissions/{id}``
``/v1/holdouts/{id}/charts/sweeps/{name}``                     ``GET .../sweeps/{name}``
``/v1/holdouts/{id}/charts/slices`` (owners, admins)           ``GET .../standings``
=============================================================  ===============================

Caching: each response carries a strong ``ETag`` derived from the chart's
``service.charts.cache_key`` (its kind and input), format and size, and answers 304 to a
matching ``If-None-Match``. A submission's charts picture an immutable result, so they are
sent ``Cache-Control: private, max-age=...``; sweeps and slices change with every new
submission and keep the app's ``no-store``. Rendered bytes of recent charts are kept in a
small per-process cache keyed the same way (rendering is a pure function of the key).
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping
from typing import Any

import orjson
from flask import Blueprint, Response, current_app, request
from marshmallow import RAISE, Schema, fields, validate

from service.charts import Chart, cache_key, render_chart
from service.scoring import catalog

from . import submissions
from .auth import requires
from .bodies import query_fields
from .errors import NotFound, ValidationFailed, problem_error
from .openapi import operation

SVG = "image/svg+xml"
PNG = "image/png"
FORMATS: Mapping[str, str] = {"svg": SVG, "png": PNG}
SIZES = ("wide", "narrow")
IMMUTABLE_MAX_AGE = 86400
"""Seconds a browser may reuse a submission's chart without asking (an immutable result)."""
CHART_CSP = "default-src 'none'; style-src 'unsafe-inline'; sandbox"
"""A chart opened on its own runs nothing and loads nothing (its styles are inline)."""
_CACHE_SIZE = 64

bp = Blueprint("charts", __name__)


# ------------------------------------------------------------------- the JSON it is drawn from


def view_json(
    view: Callable[..., Response], *args: Any, query: Mapping[str, str] | None = None
) -> Any:
    """The JSON body ``view`` (an API view function) answers the current caller with.

    Why: charts and pages show exactly what the API shows the same principal, so they call
    the API's own view (without its ``requires`` wrapper: the caller already set
    ``g.principal``) instead of re-deriving the role's view. ``query``: the query string the
    view reads (default: the current request's). Errors propagate as the API's errors.
    """
    raw = getattr(view, "__wrapped__", view)
    if query is None:
        response = raw(*args)
    else:
        with current_app.test_request_context(query_string=dict(query)):
            response = raw(*args)
    return orjson.loads(response.get_data())


# -------------------------------------------------------------------------- query schemas


class ChartSizeQuery(Schema):
    class Meta:
        unknown = RAISE

    size = fields.String(
        load_default="wide",
        validate=validate.OneOf(SIZES),
        metadata={"description": "`wide` (7 x 4 inches, the default) or `narrow` (phones)."},
    )


def _slice_field() -> fields.String:
    return fields.String(
        load_default=None,
        validate=validate.OneOf(["feedback", "reserve", "full"]),
        metadata={
            "description": "Which view of the submission to draw: default the response's "
            "top level (`full` for owners and admins, `feedback` for submitters); otherwise "
            "one of its `views` (submitters: `reserve` once the holdout is closed)."
        },
    )


class DecompositionChartQuery(ChartSizeQuery):
    slice = _slice_field()
    loss = fields.String(
        load_default=None,
        validate=validate.OneOf(["squared", "zero_one", "log"]),
        metadata={
            "description": "Which decomposition (a key of `bias_variance`); default the one "
            "of the holdout's primary metric."
        },
    )


class SeedSpreadChartQuery(ChartSizeQuery):
    slice = _slice_field()
    metric = fields.String(
        load_default=None,
        validate=validate.Regexp(r"^[a-z0-9_]{1,64}$"),
        metadata={"description": "Which metric (a key of `scores`); default the primary."},
    )


class SweepChartQuery(ChartSizeQuery):
    group = fields.String(
        load_default=None,
        metadata={"description": "As for the sweep's JSON: owners and admins name the group."},
    )
    slice = fields.String(
        load_default=None,
        validate=validate.OneOf(["feedback", "reserve", "full"]),
        metadata={"description": "As for the sweep's JSON."},
    )


# ------------------------------------------------------------------------- chart payloads


def submission_slice(view: Mapping[str, Any], requested: str | None) -> Mapping[str, Any]:
    """The part of a ``SubmissionResult`` to draw: its top level, or one of its ``views``."""
    if requested is None or requested == view.get("slice"):
        return view
    views = view.get("views") or {}
    if requested in views:
        return views[requested]
    shown = sorted({str(view.get("slice")), *views})
    raise ValidationFailed(
        "This slice is not part of this submission's view for this token.",
        [problem_error("slice", f"one of {', '.join(shown)} for this token")],
    )


def decomposition_payload(
    view: Mapping[str, Any], part: Mapping[str, Any], loss: str | None
) -> dict[str, Any]:
    """``decomposition_chart``'s arguments from a submission view (``part``: the slice)."""
    terms = part["bias_variance"]
    if loss is None:
        row_loss = catalog.METRICS[view["primary_metric"]].row_loss
        loss = catalog.ROW_LOSSES[row_loss].decomposition
        if loss not in terms:
            loss = next(iter(terms), loss)
    if loss not in terms:
        raise ValidationFailed(
            f"This submission has no {loss!r} decomposition.",
            [problem_error("loss", f"one of {', '.join(terms) or 'none'}")],
        )
    return {"bias_variance": terms, "loss": loss}


def seed_spread_payload(
    view: Mapping[str, Any], part: Mapping[str, Any], metric: str | None
) -> dict[str, Any]:
    """``seed_spread_chart``'s arguments from a submission view (``part``: the slice)."""
    per_seed = (part.get("details") or {}).get("per_seed") or {}
    metric = metric or view["primary_metric"]
    if metric not in per_seed:
        raise ValidationFailed(
            f"No per-seed values of {metric!r} in this submission's view.",
            [problem_error("metric", f"one of {', '.join(per_seed) or 'none'}")],
        )
    values = per_seed[metric]
    seeds = view.get("seeds")
    # Under the Ladder a submitter may be shown its group's best: its seed count can differ.
    labels = list(seeds) if isinstance(seeds, list) and len(seeds) == len(values) else None
    return {
        "per_seed_values": values,
        "metric": metric,
        "ensemble_value": (part.get("ensemble") or {}).get(metric),
        "interval": (part.get("intervals") or {}).get(metric),
        "seeds": labels,
        "score": (part.get("scores") or {}).get(metric),
    }


def slices_payload(standings: Mapping[str, Any]) -> dict[str, Any]:
    """``slices_chart``'s arguments from an owner's ``Standings``."""
    return {
        "rows": standings["entries"],
        "metric": standings["primary_metric"],
        "higher_is_better": standings["higher_is_better"],
    }


# ----------------------------------------------------------------------------- rendering


_cache: OrderedDict[str, bytes] = OrderedDict()
_cache_lock = threading.Lock()


def chart_bytes(kind: str, payload: Mapping[str, Any], fmt: str, size: str) -> tuple[str, bytes]:
    """(ETag value, bytes) of a chart; recent renders come from a per-process cache."""
    key = f"{cache_key(kind, payload)}-{fmt}-{size}"
    with _cache_lock:
        cached = _cache.get(key)
        if cached is not None:
            _cache.move_to_end(key)
            return key, cached
    chart: Chart = render_chart(kind, payload)
    data = chart.svg(size=size) if fmt == "svg" else chart.png(size=size)
    with _cache_lock:
        _cache[key] = data
        while len(_cache) > _CACHE_SIZE:
            _cache.popitem(last=False)
    return key, data


def chart_response(
    kind: str, payload: Mapping[str, Any], fmt: str, size: str, *, immutable: bool
) -> Response:
    """The chart as ``fmt`` with its ETag; 304 when ``If-None-Match`` names it."""
    key = f"{cache_key(kind, payload)}-{fmt}-{size}"
    if request.if_none_match.contains(key):
        response = Response(status=304)
    else:
        key, data = chart_bytes(kind, payload, fmt, size)
        response = Response(data, mimetype=FORMATS[fmt])
    response.set_etag(key)
    response.headers["Vary"] = "Authorization, Cookie"
    response.headers["Content-Security-Policy"] = CHART_CSP
    if immutable:
        response.headers["Cache-Control"] = f"private, max-age={IMMUTABLE_MAX_AGE}"
    return response


# ------------------------------------------------------------------------------ the routes

_ETAG_HEADERS = {
    "ETag": {
        "description": "Strong validator of this chart (its input, format and size); send it "
        "back as `If-None-Match` to get 304 when nothing changed.",
        "schema": {"type": "string"},
    },
    "Cache-Control": {
        "description": "`private, max-age=86400` for a submission's charts (immutable "
        "results); `no-store` for sweeps and slices, which change with new submissions.",
        "schema": {"type": "string"},
    },
}
_IF_NONE_MATCH = {
    "name": "If-None-Match",
    "required": False,
    "description": "An ETag from an earlier response: 304 without a body if it still holds.",
    "schema": {"type": "string"},
}


def _image_content(fmt: str) -> dict[str, Any]:
    schema: dict[str, Any] = {"type": "string"}
    if fmt == "png":
        schema["format"] = "binary"
    return {FORMATS[fmt]: schema}


_SUBMISSION_NOTE = (
    "Drawn from `GET /v1/submissions/{submission_id}` as this token sees it (submitters: "
    "the feedback slice through the guard; the reserve only after close). Every drawn "
    'number is in the SVG as a `data-*` attribute of its `<g id="point-...">` element.'
)
_SUBMISSION_CHARTS: Mapping[str, tuple[str, type[Schema], str]] = {
    "decomposition": (
        "decomposition",
        DecompositionChartQuery,
        "A submission's bias term, variance and ensemble gain as a chart",
    ),
    "seed_spread": (
        "seed-spread",
        SeedSpreadChartQuery,
        "A metric's value per seed, with its interval and the ensemble, as a chart",
    ),
}


def submission_chart_payload(
    kind: str, submission_id: str, slice_name: str | None = None, choice: str | None = None
) -> dict[str, Any]:
    """The input of the submission's chart of ``kind`` for the current caller.

    ``slice_name``: which view (default the top level); ``choice``: the decomposition's
    loss or the seed spread's metric (default from the primary metric).
    """
    sub = view_json(submissions.get_submission, submission_id, query={})
    part = submission_slice(sub, slice_name)
    if kind == "decomposition":
        return decomposition_payload(sub, part, choice)
    return seed_spread_payload(sub, part, choice)


def submission_chart(kind: str, submission_id: str, fmt: str) -> Response:
    """A submission's chart of ``kind`` for the current caller (``g.principal``)."""
    args = query_fields(_SUBMISSION_CHARTS[kind][1]())
    choice = args["loss"] if kind == "decomposition" else args["metric"]
    payload = submission_chart_payload(kind, submission_id, args["slice"], choice)
    return chart_response(kind, payload, fmt, args["size"], immutable=True)


def sweep_chart(holdout_id: str, name: str, fmt: str) -> Response:
    """A sweep's chart for the current caller, drawn from the sweep's JSON for it."""
    args = query_fields(SweepChartQuery())
    query = {k: args[k] for k in ("group", "slice") if args[k] is not None}
    sweep = view_json(submissions.sweep, holdout_id, name, query=query)
    return chart_response("sweep", {"sweep": sweep}, fmt, args["size"], immutable=False)


def slices_chart(holdout_id: str, fmt: str) -> Response:
    """The feedback-against-reserve chart from the current caller's standings (owners)."""
    args = query_fields(ChartSizeQuery())
    standings = view_json(submissions.standings, holdout_id, query={})
    if not standings["entries"]:
        raise NotFound("No group has submitted to this holdout yet: there is nothing to draw.")
    return chart_response("slices", slices_payload(standings), fmt, args["size"], immutable=False)


def _doc(summary: str, description: str, query: type[Schema], fmt: str) -> Callable[..., Any]:
    return operation(
        summary=f"{summary} ({fmt.upper()})",
        tag="charts",
        description=description,
        query=query,
        response=(200, _image_content(fmt)),
        alternatives={304: ("Not modified: the ETag sent in If-None-Match still holds", {})},
        errors=(404, 422),
        headers=(_IF_NONE_MATCH,),
        response_headers=_ETAG_HEADERS,
    )


def _submission_route(kind: str, fmt: str) -> None:
    slug, query, summary = _SUBMISSION_CHARTS[kind]

    def view(submission_id: str) -> Response:
        return submission_chart(kind, submission_id, fmt)

    view.__name__ = f"{kind}_{fmt}"
    bp.add_url_rule(
        f"/v1/submissions/<submission_id>/charts/{slug}.{fmt}",
        view_func=requires("admin", "owner", "submitter")(
            _doc(summary, _SUBMISSION_NOTE, query, fmt)(view)
        ),
        methods=["GET"],
    )


def _holdout_routes(fmt: str) -> None:
    def sweep_view(holdout_id: str, name: str) -> Response:
        return sweep_chart(holdout_id, name, fmt)

    def slices_view(holdout_id: str) -> Response:
        return slices_chart(holdout_id, fmt)

    sweep_view.__name__ = f"sweep_{fmt}"
    slices_view.__name__ = f"slices_{fmt}"
    sweep_doc = _doc(
        "A group's complexity curve as a chart",
        "Drawn from `GET /v1/holdouts/{holdout_id}/sweeps/{name}` with the same `group` and "
        "`slice` and the same rules for this token: test loss with one standard error, "
        "training loss, bias term and variance against complexity, the minimum and the "
        "one-standard-error choice marked, underfit and overfit regions shaded.",
        SweepChartQuery,
        fmt,
    )
    slices_doc = _doc(
        "Each group's feedback-slice score against its reserve-slice score",
        "Drawn from the owner's `GET /v1/holdouts/{holdout_id}/standings`: one point per "
        "group (feedback slice across, reserve slice up) with the line y = x; groups the "
        "feedback_tuned test flags are marked. 404 while no group has submitted.",
        ChartSizeQuery,
        fmt,
    )
    bp.add_url_rule(
        f"/v1/holdouts/<holdout_id>/charts/sweeps/<name>.{fmt}",
        view_func=requires("admin", "owner", "submitter")(sweep_doc(sweep_view)),
        methods=["GET"],
    )
    bp.add_url_rule(
        f"/v1/holdouts/<holdout_id>/charts/slices.{fmt}",
        view_func=requires("admin", "owner")(slices_doc(slices_view)),
        methods=["GET"],
    )


for _fmt in FORMATS:
    for _kind in _SUBMISSION_CHARTS:
        _submission_route(_kind, _fmt)
    _holdout_routes(_fmt)


__all__ = [
    "CHART_CSP",
    "ChartSizeQuery",
    "DecompositionChartQuery",
    "SeedSpreadChartQuery",
    "SweepChartQuery",
    "slices_chart",
    "submission_chart",
    "submission_chart_payload",
    "sweep_chart",
    "FORMATS",
    "IMMUTABLE_MAX_AGE",
    "bp",
    "chart_bytes",
    "chart_response",
    "decomposition_payload",
    "seed_spread_payload",
    "slices_payload",
    "submission_slice",
    "view_json",
]
