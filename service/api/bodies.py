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
from werkzeug.exceptions import RequestEntityTooLarge

from service.ingest import Limits, decode_body, read_table  # noqa: E402

from .errors import BadRequest, UnsupportedMediaType, ValidationFailed, problem_error
from .timing import mark

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
            f"Content-Type {shown!r} is not accepted here; send one of {', '.join(BODY_TYPES)}.",
            [
                problem_error(
                    "Content-Type",
                    f"{shown!r} is not one of {', '.join(BODY_TYPES)}",
                    1,
                    [request.headers.get("Content-Type", "")[:100]] if media else [],
                )
            ],
        )
    charset = request.mimetype_params.get("charset", "utf-8").strip().lower()
    if media == CSV and charset not in ("utf-8", "utf8", "us-ascii"):
        raise UnsupportedMediaType(
            f"CSV must be UTF-8; Content-Type says charset={charset!r}.",
            [problem_error("Content-Type", "charset must be utf-8", 1, [charset[:100]])],
        )
    return media


def _received_bytes() -> bytes:
    """The body as received, never more than the size limit.

    With a Content-Length: one read of exactly that many bytes from the WSGI input.
    werkzeug's ``get_data`` goes through a size-limiting wrapper in 8 KiB steps, about three
    times slower for a 100 MB body under gunicorn (``tests/perf/bench_ingest.py``). Without
    one (chunked transfer): pieces of at most 1 MiB until the stream ends, 413 as soon as
    they pass the limit (werkzeug's wrapper cut such a body at the limit without an error).
    A server that does not mark its input as ending (``wsgi.input_terminated``) gives no
    body without a length, as werkzeug treats it.
    """
    length = request.content_length
    limit = current_app.config["MAX_BODY_BYTES"]
    if length is None:
        if not request.environ.get("wsgi.input_terminated"):
            return b""
        stream = request.environ["wsgi.input"]
        pieces: list[bytes] = []
        total = 0
        while piece := stream.read(min(1 << 20, limit + 1 - total)):
            pieces.append(piece)
            total += len(piece)
            if total > limit:
                raise RequestEntityTooLarge()
        return b"".join(pieces)
    if length > limit:
        raise RequestEntityTooLarge()
    data = request.environ["wsgi.input"].read(length) if length else b""
    if len(data) != length:
        raise BadRequest(
            f"The body ended after {len(data)} of the {length} bytes Content-Length announced.",
            [problem_error("body", f"{len(data)} of {length} bytes received", 1)],
        )
    return data


def raw_body() -> bytes:
    """The body, gzip-decoded if ``Content-Encoding: gzip`` (bounded by the size limit)."""
    raw = _received_bytes()
    mark("upload")
    return decode_body(raw, request.headers.get("Content-Encoding"), limits=limits())


def json_envelope(schema: Schema, body: bytes | None = None) -> dict[str, Any]:
    """Parse the JSON body (``body``, or the request's) with orjson and validate it with
    ``schema`` (422 per field)."""
    try:
        data = orjson.loads(raw_body() if body is None else body)
    except orjson.JSONDecodeError as exc:
        raise BadRequest(
            f"The body is not valid JSON: {exc}.",
            [problem_error("body", f"not valid JSON: {exc}", 1, [_excerpt(exc.doc, exc.pos)])],
        ) from None
    if not isinstance(data, dict):
        raise ValidationFailed(
            "The JSON body must be an object.",
            [problem_error("body", f"expected a JSON object, got a JSON {type(data).__name__}")],
        )
    return schema.load(data)


def _excerpt(doc: str | bytes, pos: int, width: int = 30) -> str:
    """The submitter's own text around a JSON syntax error, marked at the error."""
    text = doc if isinstance(doc, str) else doc.decode("utf-8", "replace")
    start = max(0, pos - width)
    before, after = text[start:pos], text[pos : pos + width]
    return f"char {pos}: {'...' if start else ''}{before!r} >>> {after!r}"


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


def release_table_memory() -> None:
    """Hand the memory of freed Arrow tables back to the system.

    Arrow's allocator keeps freed pages for reuse; numpy allocates elsewhere, so a worker
    that scores right after freeing a large table would hold both (measured: about 110 MB on
    a million-row, ten-seed Parquet upload; ``tests/perf/bench_ingest.py``).
    """
    pa.default_memory_pool().release_unused()


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
    mark("upload")
    media_type, gz = _part_media_type(part.filename, part.mimetype)
    data = decode_body(part.read(), "gzip" if gz else None, limits=limits())
    return Upload(fields, data, media_type)


@dataclass
class ReceivedBody:
    """A request body read once, before it is parsed: what it is, its fields, its bytes.

    ``media_type`` is JSON, CSV or Parquet (a multipart upload's file part gives its own);
    ``fields`` the validated query or form fields of a table upload (empty for JSON);
    ``data`` the bytes after Content-Encoding. ``take()`` hands the bytes over and drops
    this object's reference, so a large body is freed as soon as its parser is done.
    """

    media_type: str
    fields: dict[str, Any]
    data: bytes

    def take(self) -> bytes:
        data, self.data = self.data, b""
        return data


def read_body(fields_schema: Schema) -> ReceivedBody:
    """Read a JSON, CSV, Parquet or multipart body; table uploads' fields per ``fields_schema``."""
    media = body_media_type()
    if media == JSON:
        return ReceivedBody(JSON, {}, raw_body())
    if media == MULTIPART:
        upload = multipart_upload(fields_schema)
        return ReceivedBody(upload.media_type, upload.fields, upload.data)
    return ReceivedBody(media, query_fields(fields_schema), raw_body())


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
    "ReceivedBody",
    "Upload",
    "body_media_type",
    "json_envelope",
    "json_text",
    "limits",
    "multipart_upload",
    "query_fields",
    "parse_table",
    "raw_body",
    "read_body",
    "release_table_memory",
]
