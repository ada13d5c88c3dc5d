"""A small Python client of the Heldout HTTP API, for pipelines and the ``heldout`` CLI.

It needs ``requests`` and ``pyarrow`` (both dependencies of the project) and never imports
Flask::

    from service.client import HeldoutClient, HeldoutError

    client = HeldoutClient("http://127.0.0.1:8000", token)
    holdout = client.create_holdout("labels.csv", name="crossings-2026", task="regression")
    result = client.submit(holdout["id"], ["preds.parquet"], model="gbm-v3")
    if result["verdict"]["status"] != "pass": ...   # the gates of the holdout's policy

Reads: ``holdout``, ``holdouts``, ``ids``, ``submission``, ``submissions``, ``standings``,
``sweep``, ``reference``. Writes: ``create_holdout``, ``submit``, and for owners
``set_reference`` / ``clear_reference`` (the holdout-wide reference submission that
comparison gates use when a submission names none). Every method returns the service's JSON
answer as Python objects.

Errors, one tree::

    HeldoutError              any refusal: status, title, detail, errors (RFC 9457 problem)
    +-- HeldoutConnectionError  the service could not be reached or did not answer in time
                                (status 0)

Local input that cannot be sent (an unknown file extension, per-seed files whose ids do
not match) raises ``ValueError`` before anything is sent.

Files (the README's column layout): holdouts are a table with an id column and a target
column; submissions a table with ``id`` and ``pred`` / ``pred.<seed>`` and, for
classification, ``prob.<class>`` / ``prob.<seed>.<class>``. Tables are read by extension:
``.csv`` (optionally ``.csv.gz``), ``.parquet`` / ``.pq``, and ``.json`` (an object of
columns, ``{"id": [...], "pred": [...]}``, or a list of row objects).

How a submission is sent:

- one CSV or Parquet file and no ``train``: the file itself, as the request body, so the
  service parses it and reports problems by row and column of that file;
- several files (each with its own seeds; a file with a single ``pred`` column is one seed
  labelled by its file name, dots replaced by ``_``): the client aligns them by id and
  sends one Parquet table with ``pred.<seed>`` / ``prob.<seed>.<class>`` columns. Parquet
  rather than JSON because it is typed and compact: it uploads and parses several times
  faster (README);
- with ``train``: the service takes training rows in JSON only, so the whole submission
  goes as one JSON body (gzip-compressed above 64 KiB). The train file has ``y_true`` and
  the same seeds' ``pred`` / ``prob`` columns (any ``id`` column is ignored); its seeds
  are matched to the submission's by label when the labels agree, else in column order.

A progress bar (text on standard error) shows the upload of a body of at least 1 MiB when
standard output is a terminal, and never in pipelines; ``progress=True`` forces it for any
body, ``progress=False`` turns it off. The body is streamed from a reader of known length,
so the request keeps its ``Content-Length`` (no chunked transfer encoding).

Environment (``HeldoutClient.from_env``): ``HELDOUT_URL`` (default
``http://127.0.0.1:8000``) and ``HELDOUT_TOKEN``.
"""

from __future__ import annotations

import csv
import gzip
import io
import os
import sys
import time
import uuid
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote, urlencode

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import requests

JSON = "application/json"
CSV = "text/csv"
PARQUET = "application/vnd.apache.parquet"
DEFAULT_URL = "http://127.0.0.1:8000"
PROGRESS_MIN_BYTES = 1 << 20
"""Smallest body that gets a progress bar when ``progress`` is None (and stdout a TTY)."""
GZIP_JSON_ABOVE = 64 << 10
"""JSON bodies larger than this are sent gzip-compressed (``Content-Encoding: gzip``)."""
_MAX_QUERY = 1500
"""Longest query string used for a table body; longer metadata goes as a multipart form
(gunicorn refuses request lines over 4094 bytes by default)."""
_CHUNK = 1 << 16

PathLike = str | os.PathLike[str]


class HeldoutError(Exception):
    """The service refused a request: the RFC 9457 problem it answered with.

    ``status`` is the HTTP status (0 when no answer came), ``title`` and ``detail`` the
    problem's, ``errors`` its list of ``{field, message, count, examples}``, ``type`` its
    type URI, ``retry_after`` the seconds of a 429's ``Retry-After`` header.
    """

    def __init__(
        self,
        status: int,
        title: str,
        detail: str,
        errors: list[dict[str, Any]] | None = None,
        *,
        type: str = "about:blank",
        retry_after: float | None = None,
    ) -> None:
        super().__init__(f"{status} {title}: {detail}" if status else f"{title}: {detail}")
        self.status = status
        self.title = title
        self.detail = detail
        self.errors = list(errors or [])
        self.type = type
        self.retry_after = retry_after


class HeldoutConnectionError(HeldoutError):
    """The service could not be reached, or did not answer within the timeout."""

    def __init__(self, title: str, detail: str) -> None:
        super().__init__(0, title, detail)


def _problem(response: requests.Response) -> HeldoutError:
    retry = response.headers.get("Retry-After")
    try:
        retry_after = float(retry) if retry is not None else None
    except ValueError:
        retry_after = None
    body: Any = None
    if "json" in response.headers.get("Content-Type", ""):
        try:
            body = response.json()
        except ValueError:
            body = None
    if isinstance(body, dict):
        errors = body.get("errors")
        return HeldoutError(
            int(body.get("status") or response.status_code),
            str(body.get("title") or response.reason or "Error"),
            str(body.get("detail") or ""),
            errors if isinstance(errors, list) else [],
            type=str(body.get("type") or "about:blank"),
            retry_after=retry_after,
        )
    text = response.text[:500].strip()
    return HeldoutError(
        response.status_code,
        response.reason or "Error",
        text or "no problem details in the response",
        retry_after=retry_after,
    )


# ------------------------------------------------------------------------- upload body


def _want_progress(progress: bool | None, size: int) -> bool:
    if progress is not None:
        return progress
    isatty = getattr(sys.stdout, "isatty", None)
    return bool(isatty and isatty()) and size >= PROGRESS_MIN_BYTES


def _megabytes(n: int) -> str:
    return f"{n / 1e6:.1f}"


class _UploadBody:
    """A request body of known length, read from bytes and files, drawing a progress bar.

    ``requests`` sends it with ``Content-Length`` (``__len__``) and reads it in blocks
    (``read``); each block advances the bar on standard error.
    """

    def __init__(self, parts: Sequence[bytes | Path], *, label: str, progress: bool) -> None:
        self._parts = list(parts)
        self._total = sum(len(p) if isinstance(p, bytes) else p.stat().st_size for p in parts)
        self._chunks = self._iterate()
        self._pending = b""
        self._sent = 0
        self._label = label
        self._progress = progress
        self._last_draw = 0.0
        self._done = False

    def __len__(self) -> int:
        return self._total

    def __iter__(self) -> Iterator[bytes]:
        while True:
            block = self.read(_CHUNK)
            if not block:
                return
            yield block

    def _iterate(self) -> Iterator[bytes]:
        for part in self._parts:
            if isinstance(part, bytes):
                for start in range(0, len(part), _CHUNK):
                    yield part[start : start + _CHUNK]
            else:
                with part.open("rb") as handle:
                    while block := handle.read(_CHUNK):
                        yield block

    def read(self, size: int = -1) -> bytes:
        out = [self._pending]
        have = len(self._pending)
        while size < 0 or have < size:
            block = next(self._chunks, b"")
            if not block:
                break
            out.append(block)
            have += len(block)
        data = b"".join(out)
        if size >= 0:
            data, self._pending = data[:size], data[size:]
        else:
            self._pending = b""
        self._sent += len(data)
        if self._progress:
            self._draw()
        return data

    def _draw(self) -> None:
        if self._done:
            return
        now = time.monotonic()
        finished = self._sent >= self._total
        if not finished and now - self._last_draw < 0.1:
            return
        self._last_draw = now
        share = 1.0 if self._total == 0 else self._sent / self._total
        width = 30
        filled = int(share * width)
        bar = "#" * filled + "-" * (width - filled)
        stream = sys.stderr
        stream.write(
            f"\r{self._label} [{bar}] {100 * share:5.1f}% "
            f"{_megabytes(self._sent)}/{_megabytes(self._total)} MB"
        )
        if finished:
            stream.write("\n")
            self._done = True
        stream.flush()


def _multipart(
    fields: Mapping[str, str], filename: str, media_type: str, content: bytes | Path
) -> tuple[list[bytes | Path], str]:
    """A ``multipart/form-data`` body (RFC 7578) as parts, and its Content-Type."""
    boundary = f"heldout-{uuid.uuid4().hex}"
    head = io.BytesIO()
    for key, value in fields.items():
        head.write(
            f'--{boundary}\r\nContent-Disposition: form-data; name="{key}"\r\n\r\n'.encode()
        )
        head.write(value.encode("utf-8"))
        head.write(b"\r\n")
    head.write(
        f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
        f"filename=\"{quote(filename)}\"\r\nContent-Type: {media_type}\r\n\r\n".encode()
    )
    tail = f"\r\n--{boundary}--\r\n".encode()
    return [head.getvalue(), content, tail], f"multipart/form-data; boundary={boundary}"


# ------------------------------------------------------------------------------ tables


def _suffix(path: Path) -> str:
    name = path.name.lower()
    for suffix in (".csv.gz", ".csv", ".parquet", ".pq", ".json"):
        if name.endswith(suffix):
            return suffix
    raise ValueError(
        f"{path}: unknown table format; use a .csv, .csv.gz, .parquet, .pq or .json file"
    )


def _media_type(suffix: str) -> str:
    return PARQUET if suffix in (".parquet", ".pq") else CSV


def _csv_header(path: Path, suffix: str) -> list[str]:
    opener = gzip.open if suffix == ".csv.gz" else open
    with opener(path, "rt", encoding="utf-8-sig", newline="") as handle:  # type: ignore[operator]
        return next(csv.reader(handle), [])


def _column_type(name: str, *, regression: bool, text_columns: Sequence[str]) -> pa.DataType:
    if name in text_columns:
        return pa.string()
    if name.startswith("prob."):
        return pa.float64()
    return pa.float64() if regression else pa.string()


def read_table(
    path: PathLike, *, task: str | None = None, text_columns: Sequence[str] = ("id",)
) -> pa.Table:
    """Read a CSV, Parquet or JSON table as Arrow, typed as the service reads it.

    CSV: ``text_columns`` (the id column) as text, ``prob.*`` as numbers, and every other
    column (``pred*``, ``y_true``) as numbers for ``task="regression"`` and as text (class
    labels) otherwise. Parquet and JSON keep their own types.
    """
    p = Path(path)
    suffix = _suffix(p)
    try:
        if suffix in (".csv", ".csv.gz"):
            header = _csv_header(p, suffix)
            types = {
                name: _column_type(
                    name, regression=task == "regression", text_columns=text_columns
                )
                for name in header
            }
            return pacsv.read_csv(p, convert_options=pacsv.ConvertOptions(column_types=types))
        if suffix in (".parquet", ".pq"):
            return pq.read_table(p)
        data = orjson.loads(p.read_bytes())
    except (pa.ArrowException, OSError, orjson.JSONDecodeError) as exc:
        raise ValueError(f"{p}: cannot read the table: {exc}") from None
    if isinstance(data, dict) and all(isinstance(v, list) for v in data.values()):
        return pa.table(data)
    if isinstance(data, list) and all(isinstance(row, dict) for row in data):
        return pa.Table.from_pylist(data)
    raise ValueError(
        f"{p}: a JSON table is an object of columns ({{\"id\": [...], ...}}) or a list of "
        "row objects"
    )


@dataclass(frozen=True)
class _Seed:
    """One seed's columns in a table: a label column and/or probability columns."""

    label: str
    pred: str | None
    prob: list[str] | None


def _seeds_of(
    names: Sequence[str],
    classes: Sequence[str] | None,
    *,
    skip: Sequence[str],
    where: str,
) -> tuple[list[_Seed], bool]:
    """The seeds of a table in the column layout, and whether it is the one-seed layout."""
    others = [c for c in names if c not in skip]
    single = "pred" in others
    multi = [c for c in others if c.startswith("pred.")]
    probs = [c for c in others if c.startswith("prob.")]
    unknown = [c for c in others if c != "pred" and c not in multi and c not in probs]
    if unknown:
        raise ValueError(
            f"{where}: unknown columns {unknown[:5]}; expected {', '.join(skip)}, then "
            "pred or pred.<seed> (and prob.<class> or prob.<seed>.<class>)"
        )
    if single and multi:
        raise ValueError(f"{where}: a plain 'pred' column beside 'pred.<seed>' columns")
    if probs and classes is None:
        raise ValueError(f"{where}: probability columns on a regression holdout")
    class_index = {c: i for i, c in enumerate(classes or [])}
    one_seed = single or (not multi and all(c[5:] in class_index for c in probs))
    pred = {"0": "pred"} if single else {c[5:]: c for c in multi}
    prob: dict[str, dict[int, str]] = {}
    for column in probs:
        seed, cls = ("0", column[5:]) if one_seed else column[5:].partition(".")[::2]
        if cls not in class_index:
            raise ValueError(f"{where}: column {column!r} names no class of this holdout")
        prob.setdefault(seed, {})[class_index[cls]] = column
    labels = list(pred) if pred else list(prob)
    if not labels:
        raise ValueError(f"{where}: no prediction columns (pred, pred.<seed>, prob.*)")
    seeds = []
    for label in labels:
        found = prob.get(label)
        if found is not None and len(found) != len(class_index):
            raise ValueError(
                f"{where}: seed {label!r} has {len(found)} of {len(class_index)} "
                "probability columns"
            )
        ordered = None if found is None else [found[i] for i in range(len(class_index))]
        seeds.append(_Seed(label, pred.get(label), ordered))
    return seeds, one_seed


def _text_ids(table: pa.Table, where: str) -> pa.Array:
    if "id" not in table.column_names:
        raise ValueError(f"{where}: no 'id' column")
    ids = table.column("id").combine_chunks()
    if not pa.types.is_string(ids.type) and not pa.types.is_large_string(ids.type):
        ids = pc.cast(ids, pa.string())
    if pc.count_distinct(ids).as_py() != len(ids):
        raise ValueError(f"{where}: repeated ids in the 'id' column")
    return ids


def _examples(values: pa.Array) -> str:
    return ", ".join(repr(v) for v in values.to_pylist()[:5])


def _aligned(table: pa.Table, name: str, take: pa.Array | None) -> pa.Array:
    values = table.column(name).combine_chunks()
    return values if take is None else values.take(take)


def _combine(
    paths: Sequence[Path], task: str, classes: Sequence[str] | None
) -> tuple[pa.Table, list[str]]:
    """Per-seed files aligned by id into one table with ``pred.<seed>`` / ``prob.<seed>.<c>``
    columns, in the first file's row order; and the seed labels in order."""
    columns: dict[str, pa.Array] = {}
    labels: list[str] = []
    ids: pa.Array | None = None
    for path in paths:
        where = str(path)
        table = read_table(path, task=task)
        these = _text_ids(table, where)
        if ids is None:
            ids = these
            columns["id"] = ids
            take = None
        else:
            take = pc.index_in(ids, value_set=these)
            if take.null_count or len(these) != len(ids):
                missing = ids.filter(take.is_null())
                extra = these.filter(pc.invert(pc.is_in(these, value_set=ids)))
                raise ValueError(
                    f"{where}: its ids differ from {paths[0]}'s: {len(missing)} missing "
                    f"({_examples(missing)}), {len(extra)} not in the first file "
                    f"({_examples(extra)}); every per-seed file must hold the same ids"
                )
        seeds, one_seed = _seeds_of(table.column_names, classes, skip=("id",), where=where)
        for seed in seeds:
            label = seed.label
            if one_seed and len(paths) > 1:
                label = path.name[: -len(_suffix(path))].replace(".", "_") or label
            if label in labels:
                raise ValueError(
                    f"{where}: seed label {label!r} appears in two files; seed labels "
                    "(pred.<seed> columns, or the file name of a one-seed file) must differ"
                )
            labels.append(label)

            if seed.pred is not None:
                columns[f"pred.{label}"] = _aligned(table, seed.pred, take)
            for cls, name in zip(classes or [], seed.prob or [], strict=False):
                columns[f"prob.{label}.{cls}"] = _aligned(table, name, take)
    return pa.table(columns), labels


def _parquet_bytes(table: pa.Table) -> bytes:
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    return sink.getvalue().to_pybytes()


def _values(column: pa.ChunkedArray | pa.Array) -> Any:
    """A column as JSON-ready values: a float64 ndarray for numbers, else a list."""
    if pa.types.is_floating(column.type) or pa.types.is_integer(column.type):
        if column.null_count == 0 and pa.types.is_floating(column.type):
            return np.ascontiguousarray(column.to_numpy(), dtype=np.float64)
    return column.to_pylist()


def _seed_arrays(
    table: pa.Table, seeds: Sequence[_Seed], task: str
) -> tuple[list[Any] | None, np.ndarray | None]:
    """(predictions, probabilities) of a table's seeds for the JSON body."""
    for kind, present in (("labels", [s.pred is not None for s in seeds]),
                          ("probabilities", [s.prob is not None for s in seeds])):
        if any(present) and not all(present):
            raise ValueError(f"some seeds have {kind} and others not; give them for every seed")
    preds = [_values(table.column(s.pred)) for s in seeds if s.pred is not None]
    probs = None
    if seeds and seeds[0].prob is not None:
        probs = np.stack(
            [
                np.column_stack([table.column(c).to_numpy().astype(np.float64) for c in s.prob])
                for s in seeds
                if s.prob is not None
            ]
        )
    return (preds or None), probs


# ------------------------------------------------------------------------------ client


class HeldoutClient:
    """Calls the Heldout API with one bearer token.

    Parameters
    ----------
    base_url : str
        The service's root, e.g. ``http://127.0.0.1:8000``.
    token : str
        An owner token (to register holdouts) or a submitter token (to submit).
    timeout : float
        Seconds to wait for the connection and for each read of the answer.
    """

    def __init__(self, base_url: str, token: str, *, timeout: float = 300) -> None:
        self.base_url = base_url.rstrip("/")
        self.timeout = timeout
        self._session = requests.Session()
        self._session.headers["Authorization"] = f"Bearer {token}"
        self._session.headers["User-Agent"] = "heldout-client/1"

    @classmethod
    def from_env(cls, *, timeout: float = 300) -> HeldoutClient:
        """A client from ``HELDOUT_URL`` (default ``DEFAULT_URL``) and ``HELDOUT_TOKEN``."""
        token = os.environ.get("HELDOUT_TOKEN")
        if not token:
            raise ValueError("set HELDOUT_TOKEN to the token the service gave you")
        return cls(os.environ.get("HELDOUT_URL", DEFAULT_URL), token, timeout=timeout)

    def close(self) -> None:
        self._session.close()

    def __enter__(self) -> HeldoutClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -------------------------------------------------------------------- transport

    def _request(
        self,
        method: str,
        path: str,
        *,
        params: Mapping[str, str] | None = None,
        body: bytes | _UploadBody | None = None,
        headers: Mapping[str, str] | None = None,
    ) -> Any:
        url = f"{self.base_url}{path}"
        if params:
            url = f"{url}?{urlencode(params)}"
        try:
            response = self._session.request(
                method, url, data=body, headers=dict(headers or {}), timeout=self.timeout
            )
        except requests.Timeout as exc:
            raise HeldoutConnectionError(
                "No answer in time", f"{method} {url} took longer than {self.timeout:g} s: {exc}"
            ) from exc
        except requests.RequestException as exc:
            raise HeldoutConnectionError(
                "Cannot reach the service", f"{method} {url}: {exc}"
            ) from exc
        if not 200 <= response.status_code < 300:
            raise _problem(response)
        if not response.content:
            return None
        try:
            return response.json()
        except ValueError:
            raise HeldoutError(
                response.status_code, "Not JSON", "the service answered with a non-JSON body"
            ) from None

    def _send(
        self,
        path: str,
        parts: Sequence[bytes | Path],
        media_type: str,
        *,
        label: str,
        progress: bool | None,
        params: Mapping[str, str] | None = None,
        headers: Mapping[str, str] | None = None,
    ) -> Any:
        size = sum(len(p) if isinstance(p, bytes) else p.stat().st_size for p in parts)
        show = _want_progress(progress, size)
        body: bytes | _UploadBody
        if not show and all(isinstance(p, bytes) for p in parts):
            body = b"".join(p for p in parts if isinstance(p, bytes))
        else:
            body = _UploadBody(parts, label=label, progress=show)
        return self._request(
            "POST",
            path,
            params=params,
            body=body,
            headers={"Content-Type": media_type, **(headers or {})},
        )

    def _send_json(
        self,
        path: str,
        payload: Mapping[str, Any],
        *,
        label: str,
        progress: bool | None,
        headers: Mapping[str, str] | None = None,
    ) -> Any:
        data = orjson.dumps(payload, option=orjson.OPT_SERIALIZE_NUMPY)
        extra = dict(headers or {})
        if len(data) > GZIP_JSON_ABOVE:
            data = gzip.compress(data, compresslevel=1)
            extra["Content-Encoding"] = "gzip"
        return self._send(path, [data], JSON, label=label, progress=progress, headers=extra)

    # -------------------------------------------------------------------- reads

    def holdout(self, holdout_id: str) -> dict[str, Any]:
        """A holdout's metadata (``HoldoutOut``): never its labels."""
        return self._request("GET", f"/v1/holdouts/{quote(holdout_id, safe='')}")

    def holdouts(self) -> list[dict[str, Any]]:
        """The holdouts this token may see."""
        return self._request("GET", "/v1/holdouts")["holdouts"]

    def ids(self, holdout_id: str) -> list[str]:
        """The row ids to predict, sorted by code point."""
        return self._request("GET", f"/v1/holdouts/{quote(holdout_id, safe='')}/ids")["ids"]

    def standings(self, holdout_id: str) -> dict[str, Any]:
        """The best submission per group by the primary metric (``Standings``)."""
        return self._request("GET", f"/v1/holdouts/{quote(holdout_id, safe='')}/standings")

    def submission(self, submission_id: str) -> dict[str, Any]:
        """A scored submission as this token may see it (``SubmissionResult``)."""
        return self._request("GET", f"/v1/submissions/{quote(submission_id, safe='')}")

    def submissions(self, holdout_id: str, *, limit: int = 100, offset: int = 0) -> dict[str, Any]:
        """One page of a holdout's submissions (``SubmissionList``)."""
        return self._request(
            "GET",
            f"/v1/holdouts/{quote(holdout_id, safe='')}/submissions",
            params={"limit": str(limit), "offset": str(offset)},
        )

    def sweep(
        self, holdout_id: str, name: str, *, group: str | None = None, slice: str | None = None
    ) -> dict[str, Any]:
        """A complexity sweep's curve with its minimum and one-standard-error choice
        (``SweepOut``). Owners name the ``group``; ``slice`` feedback, reserve or full."""
        params = {k: v for k, v in (("group", group), ("slice", slice)) if v is not None}
        return self._request(
            "GET",
            f"/v1/holdouts/{quote(holdout_id, safe='')}/sweeps/{quote(name, safe='')}",
            params=params or None,
        )

    def reference(self, holdout_id: str) -> dict[str, Any]:
        """The holdout-wide reference submission (``ReferenceOut``; ``submission`` null when
        none is set)."""
        return self._request("GET", f"/v1/holdouts/{quote(holdout_id, safe='')}/reference")

    # -------------------------------------------------------------------- writes

    def set_reference(self, holdout_id: str, submission_id: str) -> dict[str, Any]:
        """Make a submission the holdout-wide reference (owner token): the current champion
        that comparison gates test later submissions against when they name none."""
        return self._request(
            "PUT",
            f"/v1/holdouts/{quote(holdout_id, safe='')}/reference",
            body=orjson.dumps({"submission": submission_id}),
            headers={"Content-Type": JSON},
        )

    def clear_reference(self, holdout_id: str) -> dict[str, Any]:
        """Remove the holdout-wide reference (owner token)."""
        return self._request("DELETE", f"/v1/holdouts/{quote(holdout_id, safe='')}/reference")

    def create_holdout(
        self,
        path_or_table: PathLike | pa.Table,
        *,
        name: str,
        task: str,
        id_column: str = "id",
        target_column: str = "y_true",
        classes: Sequence[str | int | float] | None = None,
        policy: Mapping[str, Any] | None = None,
        progress: bool | None = None,
    ) -> dict[str, Any]:
        """Register a holdout (owner token) from a file or an Arrow table.

        CSV and Parquet files are uploaded as they are (multipart form, metadata as form
        fields); a ``.json`` table is sent as the JSON registration body; an Arrow table
        (``pyarrow.Table.from_pandas(df)`` for a DataFrame) as Parquet. Registering the
        same name with the same content again returns the same holdout.

        Returns
        -------
        dict
            The holdout (``HoldoutOut``): ``id``, ``fingerprint``, ``policy``...
        """
        if isinstance(path_or_table, pa.Table):
            content: bytes | Path = _parquet_bytes(path_or_table)
            filename, media_type = "holdout.parquet", PARQUET
        else:
            path = Path(path_or_table)
            suffix = _suffix(path)
            if suffix == ".json":
                table = read_table(path)
                for column in (id_column, target_column):
                    if column not in table.column_names:
                        raise ValueError(f"{path}: no {column!r} column")
                payload: dict[str, Any] = {
                    "name": name,
                    "task": task,
                    "ids": table.column(id_column).to_pylist(),
                    "y_true": table.column(target_column).to_pylist(),
                }
                if classes is not None:
                    payload["classes"] = list(classes)
                if policy is not None:
                    payload["policy"] = dict(policy)
                return self._send_json(
                    "/v1/holdouts", payload, label=f"upload {path.name}", progress=progress
                )
            content, filename = path, path.name
            media_type = _media_type(suffix)
        fields = {
            "name": name,
            "task": task,
            "id_column": id_column,
            "target_column": target_column,
        }
        if classes is not None:
            fields["classes"] = orjson.dumps(list(classes)).decode()
        if policy is not None:
            fields["policy"] = orjson.dumps(dict(policy)).decode()
        parts, content_type = _multipart(fields, filename, media_type, content)
        return self._send(
            "/v1/holdouts", parts, content_type, label=f"upload {filename}", progress=progress
        )

    def submit(
        self,
        holdout_id: str,
        files: Sequence[PathLike] | PathLike,
        *,
        model: str,
        train: PathLike | None = None,
        reference: str | None = None,
        sweep: tuple[str, float] | None = None,
        idempotency_key: str | None = None,
        progress: bool | None = None,
    ) -> dict[str, Any]:
        """Submit predictions (submitter token) and return the scored result.

        Parameters
        ----------
        holdout_id : str
        files : path or sequence of paths
            One table with every seed, or several tables to combine by id (module
            docstring: how each case is sent).
        model : str
            The model's name.
        train : path, optional
            The model's own training rows: ``y_true`` and the same seeds' ``pred`` /
            ``prob`` columns; sent in the JSON body.
        reference : str, optional
            Id of a submission to compare with (sent as ``reference``; the service's
            verdicts use it once it accepts the member).
        sweep : (name, complexity), optional
            Marks the submission as one point of a complexity sweep.
        idempotency_key : str, optional
            Sent as ``Idempotency-Key``: a retry with the same key and body returns the
            first result instead of scoring twice.
        progress : bool or None
            Upload progress bar on standard error: None shows it for large bodies when
            standard output is a terminal.

        Returns
        -------
        dict
            The scored submission (``SubmissionResult``).
        """
        paths = [Path(files)] if isinstance(files, (str, os.PathLike)) else [Path(f) for f in files]
        if not paths:
            raise ValueError("give at least one predictions file")
        suffixes = [_suffix(p) for p in paths]
        path = f"/v1/holdouts/{quote(holdout_id, safe='')}/submissions"
        headers = {"Idempotency-Key": idempotency_key} if idempotency_key else {}
        label = f"upload {paths[0].name}" + (f" +{len(paths) - 1}" if len(paths) > 1 else "")
        meta = {"model": model}
        if sweep is not None:
            meta["sweep_name"], meta["sweep_complexity"] = sweep[0], repr(float(sweep[1]))
        if reference is not None:
            meta["reference"] = reference

        if train is None and len(paths) == 1 and suffixes[0] != ".json":
            suffix = suffixes[0]
            if suffix == ".csv.gz":
                headers["Content-Encoding"] = "gzip"
            return self._send_table(
                path, paths[0], _media_type(suffix), meta, label=label, progress=progress,
                headers=headers,
            )

        info = self.holdout(holdout_id)
        task, classes = info["task"], info.get("classes")
        if len(paths) == 1:
            table = read_table(paths[0], task=task)
            seeds, _ = _seeds_of(table.column_names, classes, skip=("id",), where=str(paths[0]))
            ids = _text_ids(table, str(paths[0]))
        else:
            table, labels = _combine(paths, task, classes)
            seeds, _ = _seeds_of(table.column_names, classes, skip=("id",), where="combined")
            ids = table.column("id").combine_chunks()
            assert [s.label for s in seeds] == labels
        if train is None:
            return self._send_table(
                path, _parquet_bytes(table), PARQUET, meta, label=label, progress=progress,
                headers=headers,
            )
        predictions, probabilities = _seed_arrays(table, seeds, task)
        payload: dict[str, Any] = {
            "model": model,
            "ids": ids.to_pylist(),
            "seeds": [s.label for s in seeds],
        }
        if predictions is not None:
            payload["predictions"] = predictions
        if probabilities is not None:
            payload["probabilities"] = probabilities
        payload["train"] = self._train_part(Path(train), seeds, task, classes)
        if sweep is not None:
            payload["sweep"] = {"name": sweep[0], "complexity": float(sweep[1])}
        if reference is not None:
            payload["reference"] = reference
        return self._send_json(path, payload, label=label, progress=progress, headers=headers)

    def _send_table(
        self,
        path: str,
        content: bytes | Path,
        media_type: str,
        meta: Mapping[str, str],
        *,
        label: str,
        progress: bool | None,
        headers: Mapping[str, str],
    ) -> Any:
        query = urlencode(meta)
        if len(query) <= _MAX_QUERY:
            return self._send(
                path, [content], media_type, label=label, progress=progress, params=meta,
                headers=headers,
            )
        extra = {k: v for k, v in headers.items() if k != "Content-Encoding"}
        filename = "submission.csv.gz" if "Content-Encoding" in headers else (
            "submission.parquet" if media_type == PARQUET else "submission.csv"
        )
        parts, content_type = _multipart(meta, filename, media_type, content)
        return self._send(path, parts, content_type, label=label, progress=progress,
                          headers=extra)

    @staticmethod
    def _train_part(
        path: Path, seeds: Sequence[_Seed], task: str, classes: Sequence[str] | None
    ) -> dict[str, Any]:
        table = read_table(path, task=task, text_columns=("id",))
        if "y_true" not in table.column_names:
            raise ValueError(f"{path}: no 'y_true' column")
        train_seeds, _ = _seeds_of(
            table.column_names, classes, skip=("id", "y_true"), where=str(path)
        )
        wanted = [s.label for s in seeds]
        by_label = {s.label: s for s in train_seeds}
        if sorted(by_label) == sorted(wanted):
            train_seeds = [by_label[label] for label in wanted]
        elif len(train_seeds) != len(seeds):
            raise ValueError(
                f"{path}: {len(train_seeds)} training seeds for {len(seeds)} submitted seeds; "
                "give the same seeds"
            )
        predictions, probabilities = _seed_arrays(table, train_seeds, task)
        part: dict[str, Any] = {"y_true": _values(table.column("y_true"))}
        if predictions is not None:
            part["predictions"] = predictions
        if probabilities is not None:
            part["probabilities"] = probabilities
        return part


__all__ = [
    "DEFAULT_URL",
    "GZIP_JSON_ABOVE",
    "PROGRESS_MIN_BYTES",
    "HeldoutClient",
    "HeldoutConnectionError",
    "HeldoutError",
    "read_table",
]
