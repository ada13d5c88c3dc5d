"""The pages: server-rendered HTML over the API's own views.

Every number on a page comes from the JSON the API answers the signed-in token with: the
pages call the API's view functions through ``service.api.charts.view_json`` (with the
session's principal), so a page can never show a role more than the API does. Charts are
``<img>`` elements pointing at cookie-authenticated twins of the API's chart endpoints
(same drawing code, same payloads), each followed by its alt text and data table.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any, TypeVar, cast
from urllib.parse import urlencode

from flask import (
    Blueprint,
    Response,
    g,
    redirect,
    render_template,
    request,
    url_for,
)
from marshmallow import RAISE, Schema, ValidationError, fields, validate

from service.api import charts, holdouts, submissions
from service.api.bodies import query_fields
from service.api.charts import view_json
from service.api.errors import ApiError, Forbidden
from service.api.openapi import operation
from service.api.schemas import PageQuery, SweepQuery
from service.charts import ChartInputError, render_chart

from . import session as web_session

F = TypeVar("F", bound=Callable[..., Any])

PAGE_CSP = (
    "default-src 'none'; style-src 'self'; img-src 'self'; form-action 'self'; "
    "frame-ancestors 'none'; base-uri 'none'"
)
"""Pages load only this site's stylesheet and images, run no script, post only here and
are never framed."""

bp = Blueprint("pages", __name__, template_folder="templates")
STATIC = Path(__file__).resolve().parent / "static"
ASSETS: Mapping[str, str] = {"heldout.css": "text/css", "mark.svg": "image/svg+xml"}

HTML = "text/html"
_HTML_BODY = {HTML: {"type": "string"}}
_TO_SIGN_IN = (303, ("Not signed in (or the session ended): to the sign-in page", _HTML_BODY))
_NOT_VISIBLE = (404, ("No such object, or not one this session's token may see", _HTML_BODY))
_INVALID = (422, ("A query value this token may not use (as the JSON endpoint)", _HTML_BODY))


def _doc(
    summary: str,
    description: str,
    *alternatives: tuple[int, tuple[str, Any]],
    response: tuple[int, Any] = (200, _HTML_BODY),
    body: Mapping[str, Any] | None = None,
    query: type[Schema] | None = None,
) -> Callable[[F], F]:
    """The OpenAPI entry of a page (tag ``pages``: HTML for people, session cookie)."""
    return operation(
        summary=summary,
        tag="pages",
        description=description,
        body=body,
        query=query,
        response=response,
        alternatives=dict(alternatives),
    )


@bp.after_request
def _page_headers(response: Response) -> Response:
    if response.mimetype == "text/html":
        response.headers["Content-Security-Policy"] = PAGE_CSP
        response.headers["X-Frame-Options"] = "DENY"
        response.headers["Referrer-Policy"] = (
            "same-origin"  # "no-referrer" makes forms send Origin: null
        )
        response.headers["Cache-Control"] = "no-store"
    return response


def signed_in(view: F) -> F:
    """Run ``view`` with the session's principal in ``g.principal``; else go to sign-in."""

    @functools.wraps(view)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        principal = web_session.session_principal()
        if principal is None:
            return redirect(url_for("pages.sign_in_form", next=request.full_path.rstrip("?")), 303)
        g.principal = principal
        return view(*args, **kwargs)

    return cast(F, wrapper)


@bp.errorhandler(ValidationError)
def _query_error(exc: ValidationError) -> tuple[str, int]:
    fields_text = ", ".join(
        str(k) for k in (exc.messages if isinstance(exc.messages, dict) else {})
    )
    detail = f"Fix these query parameters: {fields_text}." if fields_text else str(exc)
    return render_template(
        "error.html", status=422, title="The request content is invalid", detail=detail
    ), 422


@bp.errorhandler(ApiError)
def _api_error(exc: ApiError) -> tuple[str, int]:
    return render_template("error.html", status=exc.status, title=exc.title, detail=exc.detail), (
        exc.status
    )


@bp.app_context_processor
def _template_globals() -> dict[str, Any]:
    return {"csrf_field": web_session.CSRF_FIELD}


@bp.app_template_filter("num")
def _num(value: Any) -> str:
    """A number for a table cell: six significant digits; a dash for a missing value."""
    if value is None or isinstance(value, bool):
        return "—" if value is None else str(value)
    if isinstance(value, (int, float)):
        return f"{value:.6g}"
    return str(value)


@bp.app_template_filter("cell")
def _cell(value: Any) -> str:
    return _num(value) if value is None or isinstance(value, (int, float)) else str(value)


@bp.app_template_filter("when")
def _when(value: Any) -> str:
    """An ISO timestamp shortened to minutes, UTC (the API's own text otherwise)."""
    text = str(value or "")
    return text[:16].replace("T", " ") + " UTC" if len(text) >= 16 and "T" in text else text


def _page(template: str, **context: Any) -> str:
    return render_template(
        template,
        principal=g.get("principal"),
        csrf=web_session.csrf_token() if web_session.sign_in_enabled() else "",
        **context,
    )


# ------------------------------------------------------------------------- sign-in, sign-out


def _safe_next(target: str | None) -> str:
    """Only a path on this site (no scheme, no host, no ``//``) may follow sign-in."""
    if target and target.startswith("/") and not target.startswith("//") and "\\" not in target:
        return target
    return url_for("pages.holdout_list")


@bp.get("/")
@_doc("The pages' start: to the holdouts page", "", response=(303, _HTML_BODY))
def home() -> Response:
    return redirect(url_for("pages.holdout_list"), 303)


@bp.get("/sign-in")
@_doc(
    "Sign-in page",
    "A form that takes an API token and starts a session (cookie `heldout_session`: "
    "signed, HttpOnly, SameSite=Strict; the token itself is not kept).",
)
def sign_in_form() -> str:
    return _page(
        "sign_in.html",
        enabled=web_session.sign_in_enabled(),
        next=_safe_next(request.args.get("next")),
        failed=False,
    )


class SignInForm(Schema):
    csrf_token = fields.String(required=True, metadata={"description": "From the sign-in page."})
    token = fields.String(required=True, metadata={"description": "An API token."})
    next = fields.String(metadata={"description": "A path on this site to go to afterwards."})


@bp.post("/sign-in")
@_doc(
    "Sign in with a token",
    "Checks the token and the form's CSRF token, then starts a session and redirects "
    "(303) to `next`. 400: CSRF check failed; 401: unknown or revoked token; 403: the "
    "server has no `HELDOUT_SECRET_KEY`, so sign-in is off.",
    (400, ("CSRF check failed", _HTML_BODY)),
    (401, ("Unknown or revoked token", _HTML_BODY)),
    (403, ("Sign-in is off: the server has no HELDOUT_SECRET_KEY", _HTML_BODY)),
    response=(303, _HTML_BODY),
    body={"application/x-www-form-urlencoded": SignInForm},
)
def sign_in() -> Any:
    if not web_session.sign_in_enabled():
        return _page("sign_in.html", enabled=False, next="/", failed=False), 403
    if not web_session.csrf_valid():
        return _page("error.html", status=400, title="Form expired", detail=_CSRF_DETAIL), 400
    principal = web_session.sign_in(request.form.get("token", ""))
    if principal is None:
        return _page(
            "sign_in.html", enabled=True, next=_safe_next(request.form.get("next")), failed=True
        ), 401
    return redirect(_safe_next(request.form.get("next")), 303)


_CSRF_DETAIL = "This form was not sent from a page of this site, or it expired. Reload and retry."


class SignOutForm(Schema):
    csrf_token = fields.String(required=True, metadata={"description": "From any page."})


@bp.post("/sign-out")
@_doc(
    "Sign out",
    "Ends the session (the cookie is cleared) and redirects (303) to the sign-in page; "
    "400 when the CSRF check fails.",
    (400, ("CSRF check failed", _HTML_BODY)),
    response=(303, _HTML_BODY),
    body={"application/x-www-form-urlencoded": SignOutForm},
)
def sign_out() -> Any:
    if not web_session.csrf_valid():
        return _page("error.html", status=400, title="Form expired", detail=_CSRF_DETAIL), 400
    web_session.sign_out()
    return redirect(url_for("pages.sign_in_form"), 303)


# ------------------------------------------------------------------------------- the pages


def _chart(
    kind: str, payload: Mapping[str, Any] | None, src: str, error: str | None = None
) -> dict[str, Any]:
    """What a template needs of a chart: image URLs, title, alt text, table (no drawing)."""
    if payload is None:
        return {"error": error or "Nothing to draw."}
    try:
        chart = render_chart(kind, payload)
    except ChartInputError as exc:
        return {"error": f"Cannot draw this chart: {exc.field}: {exc.message}"}
    sep = "&" if "?" in src else "?"
    columns = list(chart.table[0]) if chart.table else []
    return {
        "src": src,
        "narrow_src": f"{src}{sep}size=narrow",
        "title": chart.title,
        "alt": chart.alt_text,
        "columns": columns,
        "rows": chart.table,
    }


@bp.get("/holdouts")
@_doc("Holdouts page", "The holdouts this session's token may see.", _TO_SIGN_IN)
@signed_in
def holdout_list() -> str:
    listing = view_json(holdouts.list_holdouts, query={})
    return _page("holdouts.html", holdouts=listing["holdouts"])


def _page_link(holdout_id: str, offset: int, limit: int) -> str:
    query = urlencode({"offset": max(0, offset), "limit": limit})
    return url_for("pages.holdout_page", holdout_id=holdout_id) + "?" + query


@bp.get("/holdouts/<holdout_id>")
@_doc(
    "Holdout page",
    "Task, rows, fingerprint, policy, standings and submissions as the API shows this "
    "token; owners and admins also see reserve values, the feedback_tuned test and the "
    "feedback-against-reserve chart.",
    _TO_SIGN_IN,
    _NOT_VISIBLE,
    _INVALID,
    query=PageQuery,
)
@signed_in
def holdout_page(holdout_id: str) -> str:
    holdout = view_json(holdouts.get_holdout, holdout_id, query={})
    standings = view_json(submissions.standings, holdout_id, query={})
    page = query_fields(PageQuery())
    listing = view_json(
        submissions.list_submissions,
        holdout_id,
        query={"limit": str(page["limit"]), "offset": str(page["offset"])},
    )
    owner_view = g.principal.role != "submitter"
    slices = None
    if owner_view and standings["entries"]:
        slices = _chart(
            "slices",
            charts.slices_payload(standings),
            url_for("pages.slices_svg", holdout_id=holdout_id),
        )
    more = page["offset"] + len(listing["submissions"]) < listing["total"]
    pager = {
        "first": page["offset"] + 1,
        "last": page["offset"] + len(listing["submissions"]),
        "previous": _page_link(holdout_id, page["offset"] - page["limit"], page["limit"])
        if page["offset"] > 0
        else None,
        "next": _page_link(holdout_id, page["offset"] + page["limit"], page["limit"])
        if more
        else None,
    }
    sweeps = sorted(
        {(s["group"], s["sweep"]["name"]) for s in listing["submissions"] if s.get("sweep")}
    )
    return _page(
        "holdout.html",
        holdout=holdout,
        standings=standings,
        submissions=listing,
        owner_view=owner_view,
        slices=slices,
        pager=pager,
        sweeps=[
            {
                "group": group,
                "name": name,
                "href": url_for("pages.sweep_page", holdout_id=holdout_id, name=name)
                + ("?" + urlencode({"group": group}) if owner_view else ""),
            }
            for group, name in sweeps
        ],
    )


def _submission_chart(kind: str, submission_id: str, slice_name: str | None) -> dict[str, Any]:
    try:
        payload = charts.submission_chart_payload(kind, submission_id, slice_name)
    except ApiError as exc:
        return {"error": exc.detail}
    src = url_for(f"pages.{kind}_svg", submission_id=submission_id)
    if slice_name is not None:
        src += "?" + urlencode({"slice": slice_name})
    return _chart(kind, payload, src)


class SubmissionPageQuery(Schema):
    class Meta:
        unknown = RAISE

    slice = fields.String(
        load_default=None,
        validate=validate.OneOf(["feedback", "reserve", "full"]),
        metadata={
            "description": "Which of the submission's views to show (default the top level: "
            "`full` for owners and admins, `feedback` for submitters); one this token sees."
        },
    )


@bp.get("/submissions/<submission_id>")
@_doc(
    "Submission page",
    "Metrics with intervals, flags, the verdict, the decomposition and seed-spread charts "
    "(with their text and tables), as `GET /v1/submissions/{submission_id}` shows this token.",
    _TO_SIGN_IN,
    _NOT_VISIBLE,
    _INVALID,
    query=SubmissionPageQuery,
)
@signed_in
def submission_page(submission_id: str) -> str:
    args = query_fields(SubmissionPageQuery())
    sub = view_json(submissions.get_submission, submission_id, query={})
    part = charts.submission_slice(sub, args["slice"])
    shown = sub["slice"] if part is sub else args["slice"]
    holdout = view_json(holdouts.get_holdout, sub["holdout_id"], query={})
    metrics = [
        {
            "name": name,
            "score": value,
            "interval": part["intervals"].get(name),
            "ensemble": part["ensemble"].get(name),
            "train": (part["train_scores"] or {}).get(name),
        }
        for name, value in part["scores"].items()
    ]
    if part is sub:
        verdict = sub.get("verdict")
    else:
        verdict = (sub.get("verdicts_by_slice") or {}).get(shown) or part.get("verdict")
    slices = [sub["slice"], *sorted(k for k in (sub.get("views") or {}) if k != sub["slice"])]
    return _page(
        "submission.html",
        sub=sub,
        part=part,
        shown=shown,
        slices=[
            {
                "name": name,
                "current": name == shown,
                "href": url_for("pages.submission_page", submission_id=submission_id)
                + ("" if name == sub["slice"] else "?" + urlencode({"slice": name})),
            }
            for name in slices
        ],
        holdout=holdout,
        metrics=metrics,
        verdict=verdict,
        decomposition=_submission_chart("decomposition", submission_id, args["slice"]),
        seed_spread=_submission_chart("seed_spread", submission_id, args["slice"]),
    )


@bp.get("/holdouts/<holdout_id>/sweeps/<name>")
@_doc(
    "Sweep page",
    "The complexity curve as `GET /v1/holdouts/{holdout_id}/sweeps/{name}` shows this token "
    "(same `group` and `slice` query), as a chart, its text and a table.",
    _TO_SIGN_IN,
    _NOT_VISIBLE,
    _INVALID,
    query=SweepQuery,
)
@signed_in
def sweep_page(holdout_id: str, name: str) -> str:
    query = {k: request.args[k] for k in ("group", "slice") if k in request.args}
    holdout = view_json(holdouts.get_holdout, holdout_id, query={})
    sweep = view_json(submissions.sweep, holdout_id, name, query=query)
    src = url_for("pages.sweep_svg", holdout_id=holdout_id, name=name)
    if query:
        src += "?" + urlencode(query)
    return _page(
        "sweep.html",
        holdout=holdout,
        sweep=sweep,
        curve=_chart("sweep", {"sweep": sweep}, src),
    )


# ------------------------------------------------------------- chart images for the pages

_KINDS = {"decomposition": "decomposition", "seed_spread": "seed-spread"}
"""Chart kind -> the slug in its path (as the API's chart paths)."""
_IMAGE_ALTERNATIVES = (_TO_SIGN_IN, _NOT_VISIBLE, _INVALID)
_QUERIES: Mapping[str, type[Schema]] = {
    "decomposition": charts.DecompositionChartQuery,
    "seed_spread": charts.SeedSpreadChartQuery,
}


_NOT_MODIFIED = (304, ("Not modified: the ETag sent in If-None-Match still holds", {}))


def _image_doc(what: str, fmt: str, query: type[Schema]) -> Callable[[F], F]:
    return _doc(
        f"{what} for the pages ({fmt.upper()})",
        "The same chart as the API's path under `/v1` (same query), for this session's token.",
        *_IMAGE_ALTERNATIVES,
        _NOT_MODIFIED,
        response=(200, {charts.FORMATS[fmt]: {"type": "string"}}),
        query=query,
    )


def _image_routes(fmt: str) -> None:
    for kind, slug in _KINDS.items():

        def submission_image(submission_id: str, _kind: str = kind) -> Response:
            return charts.submission_chart(_kind, submission_id, fmt)

        submission_image.__name__ = f"{kind}_{fmt}"
        bp.add_url_rule(
            f"/submissions/<submission_id>/charts/{slug}.{fmt}",
            view_func=_image_doc(f"A submission's {slug} chart", fmt, _QUERIES[kind])(
                signed_in(submission_image)
            ),
            methods=["GET"],
        )

    def sweep_image(holdout_id: str, name: str) -> Response:
        return charts.sweep_chart(holdout_id, name, fmt)

    def slices_image(holdout_id: str) -> Response:
        if g.principal.role == "submitter":
            raise Forbidden("The slices chart is for owners and admins.")
        return charts.slices_chart(holdout_id, fmt)

    sweep_image.__name__ = f"sweep_{fmt}"
    slices_image.__name__ = f"slices_{fmt}"
    bp.add_url_rule(
        f"/holdouts/<holdout_id>/charts/sweeps/<name>.{fmt}",
        view_func=_image_doc("A sweep's chart", fmt, charts.SweepChartQuery)(
            signed_in(sweep_image)
        ),
        methods=["GET"],
    )
    bp.add_url_rule(
        f"/holdouts/<holdout_id>/charts/slices.{fmt}",
        view_func=_doc(
            f"The feedback-against-reserve chart for the pages ({fmt.upper()})",
            "Owners and admins; submitters get 403.",
            *_IMAGE_ALTERNATIVES,
            _NOT_MODIFIED,
            (403, ("Submitters may not see the reserve", _HTML_BODY)),
            response=(200, {charts.FORMATS[fmt]: {"type": "string"}}),
            query=charts.ChartSizeQuery,
        )(signed_in(slices_image)),
        methods=["GET"],
    )


for _fmt in charts.FORMATS:
    _image_routes(_fmt)


def _asset_route(name: str) -> None:
    data = (STATIC / name).read_bytes()  # a few kilobytes, read once

    def asset() -> Response:
        response = Response(data, mimetype=ASSETS[name])
        response.headers["Cache-Control"] = "public, max-age=3600"
        return response

    asset.__name__ = "asset_" + name.replace(".", "_")
    bp.add_url_rule(
        f"/assets/{name}",
        view_func=_doc(
            f"The pages' {name}",
            "",
            response=(200, {ASSETS[name]: {"type": "string"}}),
        )(asset),
        methods=["GET"],
    )


for _name in ASSETS:
    _asset_route(_name)


__all__ = ["PAGE_CSP", "bp", "signed_in"]
