"""Submissions: score and store, show, list, standings, complexity sweeps."""

from __future__ import annotations

from typing import Any

from flask import Blueprint, Response, current_app, url_for

from service.scoring import ScoringInputError, catalog
from service.scoring.sweep import SweepInput, complexity_sweep
from service.store import HoldoutRecord, NewSubmission, Store, SubmissionRecord
from service.store.reuse import GuardRecord

from . import evaluate, guarding, idempotency, verdicts
from .auth import (
    Principal,
    current_principal,
    get_store,
    requires,
    visible_holdout,
    visible_submission,
)
from .bodies import (
    CSV,
    JSON,
    MULTIPART,
    PARQUET,
    json_envelope,
    limits,
    parse_table,
    query_fields,
    read_body,
    release_table_memory,
)
from .errors import NotFound, ValidationFailed, problem_error
from .openapi import operation
from .responses import respond
from .schemas import (
    PageQuery,
    Standings,
    SubmissionCreate,
    SubmissionList,
    SubmissionMultipart,
    SubmissionResult,
    SubmissionUploadQuery,
    SweepOut,
    SweepQuery,
)
from .timing import mark

bp = Blueprint("submissions", __name__)

_TABLE_BODY = {
    "type": "string",
    "description": "Columns: id; one seed: pred (and prob.<class>); K seeds: pred.<seed> "
    "(and prob.<seed>.<class>).",
}

_SUBMIT_DESCRIPTION = """\
Predictions for every row of the holdout, each id exactly once in any order.

- `application/json`: `SubmissionCreate` (may be gzip with `Content-Encoding: gzip`);
- a raw `text/csv` or `application/vnd.apache.parquet` table with the model name in the
  query (`SubmissionUploadQuery`), or `multipart/form-data` with those fields and the table
  as `file`. Training rows (`train`) can be sent in JSON only.

The response holds the scores of the holdout's feedback slice as its guard reports them
(`guard`; see the holdout's policy), never anything computed on the sealed reserve rows
before the holdout is closed, and never a label, a per-row loss or a per-row residual.
A closed holdout answers 409; a group over its daily quota 429 with `Retry-After`.

`verdict` is `pass`, `warn` or `fail` with one reason per gate of the holdout's policy
(`policy.gates`), decided on the numbers this response shows (feedback slice, through the
guard). Comparison gates compare with `reference` (JSON field, or query/form field for
tables): one of the group's own submissions on this holdout (under the Ladder one with
`guard.improved` true); without it, the holdout-wide reference its owner set, if any. A
reference that is unknown, another group's or on another holdout is 422 naming `reference`.

Large submissions: send Parquet (several times faster than CSV to upload and parse, and far
faster than JSON). Retries: send an `Idempotency-Key`; a retry with the same key and the
same request returns the first result (201, same id, `Idempotent-Replayed: true`) and
stores and counts nothing; the same key with another request is 422."""

_IDEMPOTENCY_KEY = {
    "name": "Idempotency-Key",
    "required": False,
    "description": "A key unique to this request, chosen by the client (an RFC 8941 String "
    'such as "4f8d...", or the bare text): 1-255 printable ASCII characters. Scoped to the '
    "token's group and the holdout; kept while the holdout exists.",
    "schema": {"type": "string", "minLength": 1, "maxLength": 257},
}
_CREATED_HEADERS = {
    "Location": {"description": "The submission's URL.", "schema": {"type": "string"}},
    "Idempotent-Replayed": {
        "description": "`true` when this answers a retry with a stored result.",
        "schema": {"type": "string", "enum": ["true"]},
    },
}


@bp.post("/v1/holdouts/<holdout_id>/submissions")
@requires("submitter")
@operation(
    summary="Submit predictions and get them scored",
    tag="submissions",
    description=_SUBMIT_DESCRIPTION,
    body={
        JSON: SubmissionCreate,
        MULTIPART: SubmissionMultipart,
        CSV: _TABLE_BODY,
        PARQUET: _TABLE_BODY,
    },
    query=SubmissionUploadQuery(partial=True),
    response=(201, SubmissionResult),
    errors=(400, 404, 409, 413, 415, 422, 429),
    headers=(_IDEMPOTENCY_KEY,),
    response_headers=_CREATED_HEADERS,
)
def create_submission(holdout_id: str) -> Response:
    principal = current_principal()
    holdout = visible_holdout(principal, holdout_id)
    store = get_store()
    assert principal.group is not None
    received = read_body(SubmissionUploadQuery())
    key = idempotency.request_key(received)
    if key is not None:  # a retry of a stored request: its result, nothing scored or counted
        first = idempotency.stored_submission(store, holdout.id, principal.group, key)
        if first is not None:
            return _created(store, first, holdout, principal, replayed=True)
    guarding.check_can_submit(store, holdout, principal.group)
    arrays = store.holdout_arrays(holdout.id)
    lim = limits()
    # take(): a large body is freed once parsed, the table once converted (before scoring).
    if received.media_type == JSON:
        envelope = json_envelope(SubmissionCreate(), received.take())
        mark("parse")
        sub = evaluate.from_json(envelope, holdout, arrays, lim)
        del envelope
    else:
        table = parse_table(received.take(), received.media_type, task=catalog.kind(holdout.task))
        mark("parse")
        sub = evaluate.from_table(received.fields, table, holdout, arrays, lim)
        del table
        release_table_memory()
    mark("convert_align")  # Server-Timing phases (timing.py)
    gates = verdicts.gates_of(holdout)
    reference = verdicts.resolve_reference(
        store, holdout, gates, group=principal.group, named=sub.reference
    )
    options = evaluate.options_from(current_app.config)
    result, slices = guarding.score_slices(holdout, arrays, sub, options)
    assert arrays.feedback_mask is not None  # score_slices refuses a holdout without a split
    report, slices = verdicts.with_verdicts(
        gates,
        full_report=result.report,
        slices=slices,
        mask=arrays.feedback_mask,
        labels=arrays.labels,
        row_losses=result.row_losses,
        reference=reference,
        decimals=guarding.submitter_decimals(holdout),
        group=principal.group,
    )
    mark("score")
    new = NewSubmission(
        holdout_id=holdout.id,
        group=principal.group,
        token_id=principal.token.id,
        model=sub.model,
        seeds=sub.seeds,
        sweep_name=None if sub.sweep is None else sub.sweep[0],
        sweep_complexity=None if sub.sweep is None else sub.sweep[1],
        primary_metric=holdout.policy["primary_metric"],
        primary_value=result.primary_value,
        report=report,
        row_loss=result.row_loss,
        row_losses=result.row_losses,
        idempotency_key=None if key is None else key.key,
        request_digest=None if key is None else key.digest,
    )
    try:
        record, guard = guarding.store_submission(store, holdout, arrays, new, result, slices)
    except Exception:
        # Nothing was stored. If a concurrent request with this key stored its own (the key's
        # unique constraint refused ours, or it took the last quota slot), answer with it.
        first = None
        if key is not None:
            first = idempotency.stored_submission(store, holdout.id, principal.group, key)
        if first is None:
            raise
        return _created(store, first, holdout, principal, replayed=True)
    mark("store")
    return _created(store, record, holdout, principal, guard=guard)


def _created(
    store: Store,
    record: SubmissionRecord,
    holdout: HoldoutRecord,
    principal: Principal,
    *,
    guard: GuardRecord | None = None,
    replayed: bool = False,
) -> Response:
    """201 with the submission as ``principal`` sees it (the first answer, or its replay)."""
    headers = {"Location": url_for("submissions.get_submission", submission_id=record.id)}
    if replayed:
        headers[idempotency.REPLAYED_HEADER] = "true"
    view = guarding.submission_view(store, record, holdout, principal, guard)
    return respond(SubmissionResult(), view, 201, headers)


@bp.get("/v1/submissions/<submission_id>")
@requires("admin", "owner", "submitter")
@operation(
    summary="Show a scored submission",
    tag="submissions",
    description="Submitters see their own group's submissions, as the holdout's guard "
    "reports them (feedback slice; the reserve view too once the holdout is closed); owners "
    "those to their holdouts and admins all, with the feedback, reserve and full views.",
    response=(200, SubmissionResult),
    errors=(404,),
)
def get_submission(submission_id: str) -> Response:
    principal = current_principal()
    record, holdout = visible_submission(principal, submission_id)
    view = guarding.submission_view(get_store(), record, holdout, principal)
    return respond(SubmissionResult(), view)


@bp.get("/v1/holdouts/<holdout_id>/submissions")
@requires("admin", "owner", "submitter")
@operation(
    summary="List a holdout's submissions",
    tag="submissions",
    description="Submitters see their own group's; owners and admins every group's. Oldest "
    "first, paged by limit and offset.",
    query=PageQuery,
    response=(200, SubmissionList),
    errors=(404, 422),
)
def list_submissions(holdout_id: str) -> Response:
    principal = current_principal()
    holdout = visible_holdout(principal, holdout_id)
    page = query_fields(PageQuery())
    group = principal.group if principal.role == "submitter" else None
    store = get_store()
    records = store.list_submissions(
        holdout.id, group=group, limit=page["limit"], offset=page["offset"]
    )
    return respond(
        SubmissionList(),
        {
            "submissions": guarding.summaries_view(store, records, holdout, principal),
            "total": store.count_submissions(holdout.id, group=group),
            "limit": page["limit"],
            "offset": page["offset"],
        },
    )


@bp.get("/v1/holdouts/<holdout_id>/standings")
@requires("admin", "owner", "submitter")
@operation(
    summary="Best submission per group by the primary metric",
    tag="submissions",
    description="One entry per group that has submitted: its best submission on the "
    "feedback slice (under the Ladder the group's Ladder best; otherwise the best value, "
    "the earliest among equals), ranked; equal values share a rank, undefined values rank "
    "last. Submitters see every group's value as the guard reports it and its count, but "
    "submission ids and model names of their own group only; owners and admins see the "
    "exact feedback value, the reserve value and the feedback_tuned test. After close, "
    "`final` ranks the same submissions on the reserve slice, for owners and the groups "
    "that submitted.",
    response=(200, Standings),
    errors=(404,),
)
def standings(holdout_id: str) -> Response:
    principal = current_principal()
    holdout = visible_holdout(principal, holdout_id)
    return respond(Standings(), guarding.standings_view(get_store(), holdout, principal))


def _sweep_group(holdout: HoldoutRecord, requested: str | None, name: str) -> str:
    principal = current_principal()
    if principal.role == "submitter":
        if requested is not None and requested != principal.group:
            raise NotFound(f"No sweep {name!r} is visible to this token.")
        assert principal.group is not None
        return principal.group
    if requested is None:
        raise ValidationFailed(
            "Owners and admins name the group whose sweep to show.",
            [problem_error("group", "required for owner and admin tokens")],
        )
    return requested


@bp.get("/v1/holdouts/<holdout_id>/sweeps/<name>")
@requires("admin", "owner", "submitter")
@operation(
    summary="A group's complexity curve and the one-standard-error choice",
    tag="submissions",
    description="Built from the group's submissions whose sweep.name is `name`, one point "
    "per complexity (the latest submission at a repeated complexity). Loss: the holdout's "
    "stored per-row loss (squared error for regression; zero-one, log or Brier for "
    "classification, following the primary metric). Needs at least two rows. Submitters get "
    "the curve on the feedback slice, rounded unless the guard is none, and under the Ladder "
    "from the submissions it accepted only (`n_withheld` counts the others).",
    query=SweepQuery,
    response=(200, SweepOut),
    errors=(404, 422),
)
def sweep(holdout_id: str, name: str) -> Response:
    principal = current_principal()
    holdout = visible_holdout(principal, holdout_id)
    query = query_fields(SweepQuery())
    group = _sweep_group(holdout, query["group"], name)
    store = get_store()
    members = store.sweep_members(holdout.id, group, name)
    if not members:
        raise NotFound(f"Group {group!r} has no sweep named {name!r} on this holdout.")
    source = guarding.sweep_source(store, holdout, principal, members, query["slice"])
    if not source.members:
        raise guarding.missing_sweep(group, name, source.n_withheld)
    latest = {}
    for submission, report, losses in source.members:  # oldest first: the latest wins
        latest[submission.sweep_complexity] = (submission, report, losses)
    row_loss = members[-1].row_loss
    spec = catalog.ROW_LOSSES[row_loss]
    points = []
    for submission, report, losses in latest.values():
        decomposition = report["bias_variance"][spec.decomposition]
        points.append(
            SweepInput(
                complexity=float(submission.sweep_complexity),
                test_row_losses=losses,
                bias=_number(decomposition["bias"]),
                variance=_number(decomposition["variance"]),
                train_loss=catalog.train_loss(row_loss, report.get("train_scores")),
            )
        )
    try:
        result = complexity_sweep(points, loss=row_loss)
    except ScoringInputError as exc:
        raise ValidationFailed(
            "This sweep cannot be summarized.", [problem_error(exc.field, exc.message)]
        ) from None
    by_complexity = {float(c): entry[0] for c, entry in latest.items()}
    points_out = [
        {
            **point.__dict__,
            "submission_id": by_complexity[point.complexity].id,
            "model": by_complexity[point.complexity].model,
        }
        for point in result.points
    ]
    return respond(
        SweepOut(),
        {
            "holdout_id": holdout.id,
            "group": group,
            "name": name,
            "loss": result.loss,
            "points": guarding.round_sweep_points(points_out, source.decimals),
            "best_complexity": result.best_complexity,
            "one_se_complexity": result.one_se_complexity,
            "slice": source.slice,
            "n_withheld": source.n_withheld,
        },
    )


def _number(value: Any) -> float:
    return float("nan") if value is None else float(value)
