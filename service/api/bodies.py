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

import ctypes
import ctypes.util
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import orjson
import pyarrow as pa
from flask import Response as FlaskResponse
from flask import after_this_request, current_app, request
from marshmallow import Schema
from werkzeug.exceptions import RequestEntityTooLarge

from service.ingest import (  # noqa: E402
    Limits,
    StreamedCsv,
    decode_body,
    open_csv_stream,
    read_table,
)

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


def _short_body(received: int, length: int) -> BadRequest:
    return BadRequest(
        f"The body ended after {received} of the {length} bytes Content-Length announced.",
        [problem_error("body", f"{received} of {length} bytes received", 1)],
    )


class RequestStream:
    """The request body still on the wire (Content-Length known), read on demand.

    ``read(n)`` gives up to n bytes and b"" once all ``length`` bytes were read; a body
    that ends early is the same 400 as when it is read whole. ``drain`` reads and drops
    what is left, so a client still sending gets the answer rather than a reset.
    """

    def __init__(self, length: int) -> None:
        self.input = request.environ["wsgi.input"]
        self.length = length
        self.received = 0

    def read(self, n: int) -> bytes:
        want = self.length - self.received if n < 0 else min(n, self.length - self.received)
        if want <= 0:
            return b""
        piece = self.input.read(want)
        if not piece:
            raise _short_body(self.received, self.length)
        self.received += len(piece)
        return piece

    def drain(self) -> None:
        try:
            while self.read(1 << 20):
                pass
        except BadRequest:
            pass


def parse_table(
    data: bytes | RequestStream,
    media_type: str,
    *,
    task: str | None = None,
    id_column: str = "id",
    target_column: str = "y_true",
) -> pa.Table | StreamedCsv:
    """A CSV or Parquet body as an Arrow table. ``task`` (``regression``/``classification``)
    and the column names let the CSV reader parse number columns directly.

    A ``RequestStream`` (``read_body``'s plain CSV submission body) gives a ``StreamedCsv``
    instead: its header read, its rows still on the wire, for ``submission_from_table``
    to read a block at a time (its ``Server-Timing`` phase: ``receive_parse``)."""
    if isinstance(data, RequestStream):
        return open_csv_stream(
            data, limits=limits(), task=task, on_read=lambda: mark("receive_parse")
        )
    return read_table(
        data,
        media_type,
        limits=limits(),
        task=task,
        id_column=id_column,
        target_column=target_column,
    )


def _malloc_trim() -> Callable[[int], int] | None:
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        trim = libc.malloc_trim
    except (OSError, AttributeError):  # not glibc
        return None
    trim.argtypes = [ctypes.c_size_t]
    trim.restype = ctypes.c_int
    return trim


_MALLOC_TRIM = _malloc_trim()


def release_table_memory() -> None:
    """Hand the memory of freed Arrow tables and conversion scratch back to the system.

    Arrow's allocator keeps freed pages for reuse; numpy allocates elsewhere, so a worker
    that scores right after freeing a large table would hold both (measured: about 110 MB on
    a million-row, ten-seed Parquet upload; ``tests/perf/bench_ingest.py``). glibc likewise
    keeps the freed id-alignment arrays (a few n-long arrays of 8 bytes, below its mmap
    threshold once it has risen) in its heap unless asked to trim it.
    """
    pa.default_memory_pool().release_unused()
    if _MALLOC_TRIM is not None:
        _MALLOC_TRIM(0)


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


class ReceivedBody:
    """A request body, before it is parsed: what it is, its fields, its bytes.

    ``media_type`` is JSON, CSV or Parquet (a multipart upload's file part gives its own);
    ``fields`` the validated query or form fields of a table upload (empty for JSON);
    ``data`` the bytes after Content-Encoding. ``take()`` hands the body over and drops
    this object's reference, so a large body is freed as soon as its parser is done.

    A plain CSV body (a Content-Length, no Content-Encoding) is not read up front: ``take()``
    gives a ``RequestStream`` that ``parse_table`` reads a block at a time, so the worker
    never holds the whole text. Reading ``data`` first (an ``Idempotency-Key`` digest)
    reads it whole, and ``take()`` then gives the bytes.
    """

    def __init__(self, media_type: str, fields: dict[str, Any], data: bytes | None = None,
                 stream: RequestStream | None = None) -> None:
        self.media_type = media_type
        self.fields = fields
        self._data = data
        self._stream = stream

    @property
    def data(self) -> bytes:
        if self._data is None:
            if self._stream is not None:
                self._stream.received = self._stream.length  # read here: nothing to drain
                self._stream = None
            self._data = raw_body()
        return self._data

    def take(self) -> bytes | RequestStream:
        if self._data is None and self._stream is not None:
            stream, self._stream = self._stream, None
            return stream
        data, self._data = self.data, b""
        return data


def _streamable_csv() -> RequestStream | None:
    """The request's body as a ``RequestStream`` when it is a plain CSV body of known length
    within the limit; None otherwise (it is then read whole, as before)."""
    length = request.content_length
    encoding = (request.headers.get("Content-Encoding") or "identity").strip().lower()
    if not length or length > current_app.config["MAX_BODY_BYTES"] or encoding != "identity":
        return None
    stream = RequestStream(length)

    @after_this_request
    def _drain(response: FlaskResponse) -> FlaskResponse:
        # A request refused before its body was read (a closed holdout, a quota): read the
        # rest, so the client gets the answer instead of a connection reset mid-upload.
        stream.drain()
        return response

    return stream


def read_body(fields_schema: Schema) -> ReceivedBody:
    """Read a JSON, CSV, Parquet or multipart body; table uploads' fields per ``fields_schema``.

    A plain CSV body stays on the wire until it is parsed (``ReceivedBody``)."""
    media = body_media_type()
    if media == JSON:
        return ReceivedBody(JSON, {}, raw_body())
    if media == MULTIPART:
        upload = multipart_upload(fields_schema)
        return ReceivedBody(upload.media_type, upload.fields, upload.data)
    fields = query_fields(fields_schema)
    stream = _streamable_csv() if media == CSV else None
    if stream is not None:
        return ReceivedBody(media, fields, stream=stream)
    return ReceivedBody(media, fields, raw_body())


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
    "RequestStream",
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
