"""Reading request bodies: JSON, CSV, Parquet, multipart; metadata from query or form.

Media types accepted for the holdout and submission bodies:

- ``application/json`` (optionally ``Content-Encoding: gzip``): parsed by orjson, the
  envelope validated by the endpoint's marshmallow schema;
- ``text/csv`` or ``application/vnd.apache.parquet`` (CSV optionally gzip): the table is the
  body, the metadata comes as query parameters;
- ``multipart/form-data``: metadata as form fields, the table as the ``file`` part.

Arrays are converted by ``service.ingest``; nothing here looks at a value of an array.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import orjson
import pyarrow as pa
from flask import current_app, request
from marshmallow import Schema

from service.ingest import Limits, decode_body, read_table  # noqa: E402

from .errors import BadRequest, UnsupportedMediaType, ValidationFailed, problem_error

JSON = "application/json"
CSV = "text/csv"
PARQUET = "application/vnd.apache.parquet"
MULTIPART = "multipart/form-data"
TABLE_TYPES = (CSV, PARQUET)
BODY_TYPES = (JSON, CSV, PARQUET, MULTIPART)


def limits() -> Limits:
    """The ingest limits from the app's settings."""
    cfg = current_app.config
    return Limits(
        max_body_bytes=cfg["MAX_BODY_BYTES"],
        max_seeds=cfg["MAX_SEEDS"],
        max_id_length=cfg["MAX_ID_LENGTH"],
        max_rows=cfg["MAX_ROWS"],
    )


def body_media_type() -> str:
    """The request's media type if it is one the API reads, else 415."""
    media = (request.mimetype or "").lower()
    if media.endswith("+json"):
        media = JSON
    if media not in BODY_TYPES:
        shown = media or "none"
        raise UnsupportedMediaType(
            f"Content-Type {shown!r} is not accepted here; send one of {', '.join(BODY_TYPES)}."
        )
    return media


def raw_body() -> bytes:
    """The body, gzip-decoded if ``Content-Encoding: gzip`` (bounded by the size limit)."""
    raw = request.get_data(cache=False)
    return decode_body(raw, request.headers.get("Content-Encoding"), limits=limits())


def json_envelope(schema: Schema) -> dict[str, Any]:
    """Parse the JSON body with orjson and validate it with ``schema`` (422 per field)."""
    try:
        data = orjson.loads(raw_body())
    except orjson.JSONDecodeError as exc:
        raise BadRequest(f"The body is not valid JSON: {exc}.") from None
    if not isinstance(data, dict):
        raise ValidationFailed(
            "The JSON body must be an object.",
            [problem_error("body", f"expected a JSON object, got a JSON {type(data).__name__}")],
        )
    return schema.load(data)


def query_fields(schema: Schema) -> dict[str, Any]:
    """Validate the query parameters with ``schema`` (422 per field)."""
    return schema.load(request.args.to_dict(flat=True))


def parse_table(
    data: bytes,
    media_type: str,
    *,
    task: str | None = None,
    id_column: str = "id",
    target_column: str = "y_true",
) -> pa.Table:
    """A CSV or Parquet body as an Arrow table. ``task`` (``regression``/``classification``)
    and the column names let the CSV reader parse number columns directly."""
    return read_table(
        data,
        media_type,
        limits=limits(),
        task=task,
        id_column=id_column,
        target_column=target_column,
    )


@dataclass(frozen=True)
class Upload:
    """A multipart upload: its validated form fields and its file, not yet parsed."""

    fields: dict[str, Any]
    data: bytes
    media_type: str


def _part_media_type(filename: str | None, mimetype: str | None) -> tuple[str, bool]:
    """(media type, gzip) of the uploaded part, from its content type or its file name."""
    name = (filename or "").lower()
    gz = name.endswith(".gz")
    if gz:
        name = name[:-3]
    if mimetype in TABLE_TYPES:
        return mimetype, gz
    if name.endswith(".csv"):
        return CSV, gz
    if name.endswith(".parquet") or name.endswith(".pq"):
        return PARQUET, gz
    raise UnsupportedMediaType(
        "The 'file' part must be CSV or Parquet: give it Content-Type text/csv or "
        "application/vnd.apache.parquet, or a file name ending in .csv or .parquet."
    )


def multipart_upload(schema: Schema, file_field: str = "file") -> Upload:
    """Form fields validated by ``schema`` and the table in the ``file`` part."""
    if request.headers.get("Content-Encoding", "identity").lower() != "identity":
        raise UnsupportedMediaType(
            "Content-Encoding is not supported on multipart bodies; compress the file part "
            "and name it *.csv.gz instead."
        )
    form = request.form.to_dict(flat=True)
    files = request.files
    extra_files = sorted(set(files) - {file_field})
    if file_field not in files or extra_files:
        raise ValidationFailed(
            f"Send exactly one file part, named {file_field!r}.",
            [problem_error(file_field, f"expected one file part named {file_field!r}")]
            + [problem_error(name, "unknown file part") for name in extra_files],
        )
    fields = schema.load(form)
    part = files[file_field]
    media_type, gz = _part_media_type(part.filename, part.mimetype)
    data = decode_body(part.read(), "gzip" if gz else None, limits=limits())
    return Upload(fields, data, media_type)


def json_text(value: str | None, field: str) -> Any:
    """Parse a JSON-text form field or query parameter (``classes``, ``policy``)."""
    if value is None:
        return None
    try:
        return orjson.loads(value)
    except orjson.JSONDecodeError as exc:
        raise ValidationFailed(
            f"{field} must be JSON text.", [problem_error(field, f"not valid JSON: {exc}")]
        ) from None


__all__ = [
    "BODY_TYPES",
    "CSV",
    "JSON",
    "MULTIPART",
    "PARQUET",
    "TABLE_TYPES",
    "Upload",
    "body_media_type",
    "json_envelope",
    "json_text",
    "limits",
    "multipart_upload",
    "query_fields",
    "parse_table",
    "raw_body",
]
