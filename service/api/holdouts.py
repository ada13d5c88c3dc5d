"""Holdouts: register (JSON, CSV, Parquet, multipart), list, show, publish the row ids."""

from __future__ import annotations

from typing import Any

import pyarrow as pa
import pyarrow.csv as pacsv
from flask import Blueprint, Response, request, url_for

from service.scoring import catalog
from service.store import SubmissionRecord

from . import guarding, registration, verdicts
from .auth import current_principal, get_store, may_see_holdout, requires, visible_holdout
from .bodies import (
    CSV,
    JSON,
    MULTIPART,
    PARQUET,
    body_media_type,
    json_envelope,
    json_text,
    limits,
    multipart_upload,
    parse_table,
    query_fields,
    raw_body,
)
from .errors import NotAcceptable
from .openapi import operation
from .responses import respond, respond_body
from .schemas import (
    HoldoutCreate,
    HoldoutIds,
    HoldoutList,
    HoldoutMultipart,
    HoldoutOut,
    HoldoutUploadFields,
    ReferenceOut,
    ReferenceSet,
)

bp = Blueprint("holdouts", __name__, url_prefix="/v1/holdouts")

_TABLE_BODY = {
    "type": "string",
    "description": "The table: an id column and a target column (names in the query).",
}

_CREATE_DESCRIPTION = """\
Three equivalent forms:

- `application/json`: `HoldoutCreate` (may be gzip with `Content-Encoding: gzip`);
- `multipart/form-data`: the fields of `HoldoutUploadFields` and the table as `file`;
- a raw `text/csv` or `application/vnd.apache.parquet` body, the fields as query parameters
  (`name` and `task` required then; the query is ignored for the other forms).

The same owner registering the same name with identical content (task, classes, policy, and
the same ids with the same labels in the same order) gets 200 and the existing holdout;
different content under that name is 409. Labels are never returned."""


@bp.post("")
@requires("owner", "admin")
@operation(
    summary="Register a holdout",
    tag="holdouts",
    description=_CREATE_DESCRIPTION,
    body={
        JSON: HoldoutCreate,
        MULTIPART: HoldoutMultipart,
        CSV: _TABLE_BODY,
        PARQUET: _TABLE_BODY,
    },
    query=HoldoutUploadFields(partial=True),
    response=(201, HoldoutOut),
    alternatives={200: ("Identical content already registered under this name", HoldoutOut)},
    errors=(400, 409, 413, 415, 422),
)
def create_holdout() -> Response:
    principal = current_principal()
    media = body_media_type()
    lim = limits()
    if media == JSON:
        data = registration.from_json(json_envelope(HoldoutCreate()), lim)
    else:
        if media == MULTIPART:
            upload = multipart_upload(HoldoutUploadFields())
            fields, raw, table_type = upload.fields, upload.data, upload.media_type
        else:
            fields, raw, table_type = query_fields(HoldoutUploadFields()), raw_body(), media
        table = parse_table(
            raw,
            table_type,
            task=catalog.kind(fields["task"]),
            id_column=fields["id_column"],
            target_column=fields["target_column"],
        )
        data = registration.from_table(
            fields,
            table,
            json_text(fields["classes"], "classes"),
            json_text(fields["policy"], "policy"),
            lim,
        )
    prepared = registration.prepare(data, lim)
    store = get_store()
    record, created = registration.register(
        store, prepared, owner=principal.owner, token_id=principal.token.id
    )
    location = url_for("holdouts.get_holdout", holdout_id=record.id)
    return respond(
        HoldoutOut(),
        guarding.holdout_view(store, record, principal),
        201 if created else 200,
        {"Location": location},
    )


@bp.get("")
@requires("admin", "owner", "submitter")
@operation(
    summary="List the holdouts this token may see",
    tag="holdouts",
    description="Owners: their own. Admins: all. Submitters: those whose policy admits their "
    "group. Oldest first.",
    response=(200, HoldoutList),
)
def list_holdouts() -> Response:
    principal = current_principal()
    store = get_store()
    if principal.role == "owner":
        records = store.list_holdouts(owner=principal.owner)
    else:
        records = [h for h in store.list_holdouts() if may_see_holdout(principal, h)]
    views = [guarding.holdout_view(store, h, principal) for h in records]
    return respond(HoldoutList(), {"holdouts": views})


@bp.get("/<holdout_id>")
@requires("admin", "owner", "submitter")
@operation(
    summary="Show a holdout's metadata", tag="holdouts", response=(200, HoldoutOut), errors=(404,)
)
def get_holdout(holdout_id: str) -> Response:
    principal = current_principal()
    record = visible_holdout(principal, holdout_id)
    return respond(HoldoutOut(), guarding.holdout_view(get_store(), record, principal))


@bp.get("/<holdout_id>/ids")
@requires("admin", "owner", "submitter")
@operation(
    summary="The row ids to predict",
    tag="holdouts",
    description="JSON (`Accept: application/json`, the default) or CSV with one column `id` "
    "(`Accept: text/csv`). Ids come sorted by Unicode code point, not in registration "
    "order, which could carry information about the labels.",
    response=(200, {JSON: HoldoutIds, CSV: {"type": "string"}}),
    errors=(404, 406),
)
def get_ids(holdout_id: str) -> Response:
    holdout = visible_holdout(current_principal(), holdout_id)
    if request.accept_mimetypes:
        media = request.accept_mimetypes.best_match([JSON, CSV])
    else:
        media = JSON
    if media is None:
        raise NotAcceptable("The ids are available as application/json or text/csv.")
    ids = get_store().holdout_arrays(holdout.id).sorted_ids
    if media == CSV:
        sink = pa.BufferOutputStream()
        pacsv.write_csv(
            pa.table({"id": pa.array(ids, type=pa.string())}),
            sink,
            pacsv.WriteOptions(quoting_style="needed"),
        )
        response = Response(sink.getvalue().to_pybytes(), mimetype=CSV)
    else:
        # The id list bypasses marshmallow's per-item dump (millions of rows); the schema
        # still documents it and dumps the other fields.
        body = HoldoutIds(exclude=("ids",)).dump(
            {"holdout_id": holdout.id, "n_rows": holdout.n_rows, "order": "ascending"}
        )
        body["ids"] = ids.tolist()
        response = respond_body(body)
    response.headers["Vary"] = "Accept, Authorization"
    return response


# --------------------------------------------------------------- holdout-wide reference

_REFERENCE_DESCRIPTION = """\
The holdout-wide reference submission (the current champion): the comparison gates of the
holdout's policy compare each new submission with it when the submission names no
`reference` of its own. Any submission to this holdout, of any group; under the Ladder one
whose feedback scores were reported (`guard.improved` true), since a comparison's difference
would otherwise give away a withheld loss. Changing it changes no stored verdict: each
verdict names the reference it was decided against."""


def _reference_out(holdout_id: str, record: SubmissionRecord | None) -> dict[str, Any]:
    return {
        "holdout_id": holdout_id,
        "submission": None if record is None else record.id,
        "group": None if record is None else record.group,
        "model": None if record is None else record.model,
    }


@bp.get("/<holdout_id>/reference")
@requires("owner", "admin")
@operation(
    summary="The holdout-wide reference submission",
    tag="holdouts",
    description=_REFERENCE_DESCRIPTION,
    response=(200, ReferenceOut),
    errors=(404,),
)
def get_reference(holdout_id: str) -> Response:
    holdout = visible_holdout(current_principal(), holdout_id)
    current = holdout.policy.get(verdicts.REFERENCE_KEY)
    record = None if current is None else get_store().get_submission(current)
    return respond(ReferenceOut(), _reference_out(holdout.id, record))


@bp.put("/<holdout_id>/reference")
@requires("owner", "admin")
@operation(
    summary="Set the holdout-wide reference submission",
    tag="holdouts",
    description=_REFERENCE_DESCRIPTION,
    body={JSON: ReferenceSet},
    response=(200, ReferenceOut),
    errors=(400, 404, 415, 422),
)
def put_reference(holdout_id: str) -> Response:
    holdout = visible_holdout(current_principal(), holdout_id)
    wanted = json_envelope(ReferenceSet())["submission"]
    store = get_store()
    record = verdicts.check_reference(store, holdout, wanted, group=None, field="submission")
    store.set_policy_entry(holdout.id, verdicts.REFERENCE_KEY, record.id)
    return respond(ReferenceOut(), _reference_out(holdout.id, record))


@bp.delete("/<holdout_id>/reference")
@requires("owner", "admin")
@operation(
    summary="Clear the holdout-wide reference submission",
    tag="holdouts",
    description="Later submissions that name no reference have none: their comparison "
    "gates warn. Answers the cleared state (submission null).",
    response=(200, ReferenceOut),
    errors=(404,),
)
def delete_reference(holdout_id: str) -> Response:
    holdout = visible_holdout(current_principal(), holdout_id)
    get_store().set_policy_entry(holdout.id, verdicts.REFERENCE_KEY, None)
    return respond(ReferenceOut(), _reference_out(holdout.id, None))
