"""Hostile and broken submissions through the API: a 4xx problem, never a 5xx, nothing stored.

Each case of the ingest issue's list has a test here, parametrized over the body formats it
applies to (JSON, CSV, Parquet, multipart). Every refusal is checked the same way
(``_refused``): the status, ``application/problem+json``, an ``errors`` entry naming the
field, its count, at most ten examples, each taken from what the test itself sent; then
that no table of the database gained or lost a row.

The app runs with small limits (``LIMITS``) so the size, seed and id-length cases are cheap.
Cases already covered elsewhere are pointed to in comments rather than repeated.
"""

from __future__ import annotations

import gzip
import io
import unicodedata
from collections.abc import Iterator
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import sqlalchemy as sa
from apidata import Holdout, classification_body, register, regression_body
from sklearn.metrics import mean_squared_error

from service import create_app
from service.scoring import PROBABILITY_SUM_TOLERANCE
from service.store import Store, schema

LIMITS = {"MAX_BODY_BYTES": 64 * 1024, "MAX_SEEDS": 4, "MAX_ID_LENGTH": 40}
TABLE_FORMATS = ["csv", "parquet", "multipart"]
FORMATS = ["json", *TABLE_FORMATS]
CSV = "text/csv"
PARQUET = "application/vnd.apache.parquet"


@pytest.fixture
def app(database_url: str) -> Iterator[Any]:
    """This module's app: the shared one (conftest) with small ingest limits."""
    application = create_app(
        {"DATABASE_URL": database_url, "TESTING": True, "BOOTSTRAP_RESAMPLES": 200, **LIMITS}
    )
    store = application.extensions["heldout_store"]
    store.init_schema()
    yield application
    store.dispose()


# ----------------------------------------------------------------------------- helpers


def row_counts(store: Store) -> dict[str, int]:
    """Rows in every table of the service: the database's whole state, for 'nothing stored'."""
    with store.engine.connect() as conn:
        return {
            t.name: int(conn.execute(sa.select(sa.func.count()).select_from(t)).scalar_one())
            for t in schema.metadata.sorted_tables
        }


def _refused(r: Any, status: int, field: str) -> dict[str, Any]:
    """The error entry for ``field`` of a problem response with ``status``."""
    assert r.status_code == status, r.get_data(as_text=True)[:2000]
    assert r.mimetype == "application/problem+json"
    body = r.get_json()
    assert body["status"] == status and body["detail"]
    matching = [e for e in body["errors"] if e["field"] == field]
    assert matching, body["errors"]
    entry = matching[0]
    assert set(entry) == {"field", "message", "count", "examples"}
    assert len(entry["examples"]) <= 10
    assert entry["count"] >= len(entry["examples"]) or entry["count"] == 1
    return entry


def _examples_quote(entry: dict[str, Any], sent: list[str]) -> None:
    """Every example quotes one of the values the test sent (the submitter's own input)."""
    assert entry["examples"], entry
    for example in entry["examples"]:
        assert any(s in example for s in sent), (example, sent[:5])


class Sender:
    """Posts one submission in a chosen format; the layout is FORMATS.md's.

    ``columns`` maps a table column name (``pred.<seed>``, ``prob.<seed>.<class>``) to its
    values; JSON gets the same content as ``predictions`` / ``probabilities`` lists.
    """

    def __init__(self, user: Any, holdout: Holdout, store: Store) -> None:
        self.user, self.holdout, self.store = user, holdout, store
        self.path = f"/v1/holdouts/{holdout.id}/submissions"

    def post(
        self,
        fmt: str,
        ids: list[Any],
        columns: dict[str, list[Any]],
        *,
        json_body: dict[str, Any] | None = None,
    ) -> Any:
        if fmt == "json":
            body = json_body if json_body is not None else self.json_of(ids, columns)
            return self.user.post(self.path, json=body)
        if fmt == "csv":
            return self.user.post(
                f"{self.path}?model=m", data=csv_bytes(ids, columns), content_type=CSV
            )
        if fmt == "parquet":
            return self.user.post(
                f"{self.path}?model=m", data=parquet_bytes(ids, columns), content_type=PARQUET
            )
        assert fmt == "multipart"
        return self.user.post(
            self.path,
            data={"model": "m", "file": (io.BytesIO(csv_bytes(ids, columns)), "preds.csv")},
            content_type="multipart/form-data",
        )

    def json_of(self, ids: list[Any], columns: dict[str, list[Any]]) -> dict[str, Any]:
        preds = [v for name, v in columns.items() if name.startswith("pred.")]
        seeds = [name[5:] for name in columns if name.startswith("pred.")]
        body: dict[str, Any] = {"model": "m", "ids": ids}
        if preds:
            body["predictions"] = preds
            body["seeds"] = seeds
        probs = [name for name in columns if name.startswith("prob.")]
        if probs:
            classes = self.holdout.response["classes"]
            by_seed: dict[str, list[list[Any]]] = {}
            for name in probs:
                seed = name[5:].split(".", 1)[0]
                by_seed.setdefault(seed, []).append(columns[name])
            body["probabilities"] = [
                [list(row) for row in zip(*cols, strict=True)] for cols in by_seed.values()
            ]
            assert all(len(cols) == len(classes) for cols in by_seed.values())
            body.setdefault("seeds", list(by_seed))
        return body

    def refused(self, r: Any, status: int, field: str, before: dict[str, int]) -> dict[str, Any]:
        entry = _refused(r, status, field)
        assert row_counts(self.store) == before
        return entry


def csv_text(value: Any) -> str:
    if isinstance(value, float):
        return repr(value)
    return "" if value is None else str(value)


def csv_bytes(ids: list[Any], columns: dict[str, list[Any]]) -> bytes:
    lines = [",".join(["id", *columns])]
    for i, row_id in enumerate(ids):
        lines.append(",".join([csv_text(row_id), *(csv_text(v[i]) for v in columns.values())]))
    return ("\n".join(lines) + "\n").encode("utf-8")


def parquet_bytes(ids: list[Any], columns: dict[str, list[Any]]) -> bytes:
    names = ["id", *columns]
    arrays = [pa.array(ids), *(pa.array(v) for v in columns.values())]
    sink = io.BytesIO()
    pq.write_table(pa.Table.from_arrays(arrays, names=names), sink)
    return sink.getvalue()


@pytest.fixture
def reg(owner: Any) -> Holdout:
    return register(owner, regression_body())


@pytest.fixture
def cls(owner: Any) -> Holdout:
    return register(owner, classification_body())


@pytest.fixture
def send(reg: Holdout, submitter: Any, store: Store) -> Sender:
    return Sender(submitter, reg, store)


@pytest.fixture
def send_cls(cls: Holdout, submitter: Any, store: Store) -> Sender:
    return Sender(submitter, cls, store)


def predictions(holdout: Holdout, n_seeds: int = 2, seed: int = 5) -> dict[str, list[Any]]:
    """Finite predictions for ``holdout.ids`` in their registered order, one column per seed."""
    rng = np.random.default_rng(seed)
    y = np.asarray(holdout.y)
    return {
        f"pred.s{k}": (y + rng.normal(scale=50.0, size=y.size)).tolist() for k in range(n_seeds)
    }


def probabilities(holdout: Holdout, seed: int = 9) -> dict[str, list[Any]]:
    """One seed of Dirichlet probabilities for ``holdout.ids``, one column per class."""
    rng = np.random.default_rng(seed)
    classes = holdout.response["classes"]
    p = rng.dirichlet(np.ones(len(classes)), size=len(holdout.ids))
    return {f"prob.s0.{c}": p[:, j].tolist() for j, c in enumerate(classes)}


# ------------------------------------------------------------------ empty, type, malformed


@pytest.mark.parametrize("fmt", FORMATS)
def test_empty_body_is_400(send: Sender, fmt: str) -> None:
    before = row_counts(send.store)
    if fmt == "multipart":
        r = send.user.post(
            send.path,
            data={"model": "m", "file": (io.BytesIO(b""), "preds.csv")},
            content_type="multipart/form-data",
        )
    else:
        media = {"json": "application/json", "csv": CSV, "parquet": PARQUET}[fmt]
        r = send.user.post(f"{send.path}?model=m", data=b"", content_type=media)
    entry = send.refused(r, 400, "body", before)
    assert "empty" in entry["message"]


@pytest.mark.parametrize(
    ("headers", "field", "shown"),
    [
        ({}, "Content-Type", None),  # missing
        ({"Content-Type": "text/plain"}, "Content-Type", "text/plain"),
        ({"Content-Type": "image/png"}, "Content-Type", "image/png"),
        ({"Content-Type": "application/x-www-form-urlencoded"}, "Content-Type", "x-www-form"),
        ({"Content-Type": "text/csv; charset=latin-1"}, "Content-Type", "latin-1"),
        ({"Content-Type": "application/json", "Content-Encoding": "br"}, "Content-Encoding", "br"),
        ({"Content-Type": CSV, "Content-Encoding": "deflate, gzip"}, "Content-Encoding", "deflate"),
    ],
)
def test_wrong_or_missing_content_type_is_415(
    send: Sender, headers: dict[str, str], field: str, shown: str | None
) -> None:
    before = row_counts(send.store)
    body = csv_bytes(send.holdout.ids, predictions(send.holdout))
    r = send.user.post(f"{send.path}?model=m", data=body, headers=headers)
    entry = send.refused(r, 415, field, before)
    if shown is None:
        assert entry["examples"] == []
    else:
        _examples_quote(entry, [shown])


def test_registration_checks_the_content_type_too(owner: Any, store: Store) -> None:
    # The holdout endpoint reads bodies through the same functions.
    before = row_counts(store)
    r = owner.post(
        "/v1/holdouts", data=b"id,y_true\na,1\n", content_type="text/tab-separated-values"
    )
    entry = _refused(r, 415, "Content-Type")
    _examples_quote(entry, ["text/tab-separated-values"])
    assert row_counts(store) == before


MALFORMED = {
    "json": [
        (b'{"model": "m", "ids": ["a", ', "application/json", '"ids"'),
        (b'{"model": "m", "predictions": [NaN]}', "application/json", "predictions"),
        (b"\xff\xfe{}", "application/json", None),
        (b"[1, 2", "application/json", "[1, 2"),
    ],
    "csv": [
        (b"id,pred\nrow-0001,1.5,2.5\n", CSV, None),  # a row with an extra cell
        (b'id,pred\n"row-0001,1.5\n', CSV, None),  # unterminated quote
        (b"id,pred\nrow-\xff\xfe,1.5\n", CSV, None),  # invalid UTF-8
    ],
    "parquet": [
        (b"PAR1 not really parquet PAR1", PARQUET, None),
        (None, PARQUET, None),  # a real file cut in half (built in the test)
        (b"id,pred\nrow-0001,1.5\n", PARQUET, None),  # CSV sent as Parquet
    ],
}


@pytest.mark.parametrize(
    ("fmt", "case"), [(fmt, i) for fmt, cases in MALFORMED.items() for i in range(len(cases))]
)
def test_malformed_body_is_400(send: Sender, fmt: str, case: int) -> None:
    data, media, shown = MALFORMED[fmt][case]
    if data is None:
        whole = parquet_bytes(send.holdout.ids, predictions(send.holdout))
        data = whole[: len(whole) // 2]
    before = row_counts(send.store)
    r = send.user.post(f"{send.path}?model=m", data=data, content_type=media)
    entry = send.refused(r, 400, "body", before)
    assert entry["count"] == 1
    if shown is not None:  # JSON errors quote the text around the error
        _examples_quote(entry, [shown])


def test_malformed_json_registration_is_400(owner: Any, store: Store) -> None:
    # See also tests/api/test_errors.py::test_body_problems (the holdout endpoint's 400/415).
    before = row_counts(store)
    r = owner.post(
        "/v1/holdouts", data=b'{"name": "x", "ids": [1,,2]}', content_type="application/json"
    )
    _examples_quote(_refused(r, 400, "body"), ['"ids": [1,'])
    assert row_counts(store) == before


# ------------------------------------------------------------------------- size limits


def _bomb(size: int) -> bytes:
    """``size`` bytes of one repeated character, gzip-compressed (about 1000:1)."""
    return gzip.compress(b"0" * size, compresslevel=9)


@pytest.mark.parametrize("fmt", ["json", "csv", "multipart"])
def test_gzip_bomb_is_413(send: Sender, fmt: str) -> None:
    bomb = _bomb(20 * LIMITS["MAX_BODY_BYTES"])
    assert len(bomb) < LIMITS["MAX_BODY_BYTES"] // 10
    before = row_counts(send.store)
    if fmt == "multipart":
        r = send.user.post(
            send.path,
            data={"model": "m", "file": (io.BytesIO(bomb), "preds.csv.gz")},
            content_type="multipart/form-data",
        )
    else:
        media = "application/json" if fmt == "json" else CSV
        r = send.user.post(
            f"{send.path}?model=m",
            data=bomb,
            headers={"Content-Type": media, "Content-Encoding": "gzip"},
        )
    entry = send.refused(r, 413, "body", before)
    assert str(LIMITS["MAX_BODY_BYTES"]) in entry["message"]


def test_gzip_bomb_registration_is_413(owner: Any, store: Store) -> None:
    before = row_counts(store)
    r = owner.post(
        "/v1/holdouts?name=x&task=regression",
        data=_bomb(20 * LIMITS["MAX_BODY_BYTES"]),
        headers={"Content-Type": CSV, "Content-Encoding": "gzip"},
    )
    _refused(r, 413, "body")
    assert row_counts(store) == before


@pytest.mark.parametrize("fmt", FORMATS)
def test_body_over_the_size_limit_is_a_413_problem(send: Sender, fmt: str) -> None:
    # Registration with a JSON body: tests/api/test_errors.py::test_body_over_the_limit_is_413.
    # Here every format, so werkzeug's own MAX_CONTENT_LENGTH check (request.get_data and
    # the multipart parser) is seen to answer with a problem, not an HTML page.
    limit = LIMITS["MAX_BODY_BYTES"]
    rng = np.random.default_rng(0)  # random ids and values: no format compresses them away
    ids = [f"{i:08d}-{rng.bytes(12).hex()}" for i in range(limit // 16)]
    columns = {"pred.s0": rng.normal(size=len(ids)).tolist()}
    before = row_counts(send.store)
    r = send.post(fmt, ids, columns)
    entry = send.refused(r, 413, "body", before)
    sent = r.request.headers.get("Content-Length")
    assert entry["examples"] == [f"Content-Length: {sent}"] and int(sent) > limit
    assert "HELDOUT_MAX_BODY_BYTES" in r.get_json()["detail"]


def test_parquet_declaring_a_huge_unpacked_size_is_413(send: Sender) -> None:
    # A small Parquet file whose column pages unpack past the limit: the footer says so,
    # and nothing is decompressed.
    n = 4 * LIMITS["MAX_BODY_BYTES"]
    table = pa.table({"id": pa.array(["a"] * n), "pred": pa.array(np.zeros(n))})
    sink = io.BytesIO()
    pq.write_table(table, sink, compression="zstd", use_dictionary=False)
    assert len(sink.getvalue()) < LIMITS["MAX_BODY_BYTES"]
    before = row_counts(send.store)
    r = send.user.post(f"{send.path}?model=m", data=sink.getvalue(), content_type=PARQUET)
    send.refused(r, 413, "body", before)


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_more_seeds_than_the_limit_is_422(send: Sender, fmt: str) -> None:
    k = LIMITS["MAX_SEEDS"] + 3
    columns = predictions(send.holdout, n_seeds=k)
    before = row_counts(send.store)
    r = send.post(fmt, send.holdout.ids, columns)
    field = "predictions" if fmt == "json" else "columns"
    entry = send.refused(r, 422, field, before)
    assert entry["count"] == k and str(LIMITS["MAX_SEEDS"]) in entry["message"]
    # The seeds past the limit are the examples: their position (JSON) or column name.
    assert len(entry["examples"]) == k - LIMITS["MAX_SEEDS"]
    if fmt == "json":
        _examples_quote(entry, [f"predictions[{i}]" for i in range(LIMITS["MAX_SEEDS"], k)])
    else:
        _examples_quote(entry, [f"pred.s{i}" for i in range(LIMITS["MAX_SEEDS"], k)])


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_ids_over_the_length_limit_are_422(send: Sender, fmt: str) -> None:
    ids = list(send.holdout.ids)
    long_ids = [f"{'L' * LIMITS['MAX_ID_LENGTH']}-{i}" for i in range(12)]
    ids[-12:] = long_ids
    before = row_counts(send.store)
    r = send.post(fmt, ids, predictions(send.holdout))
    entry = send.refused(r, 422, "ids" if fmt == "json" else "id", before)
    assert entry["count"] == 12 and len(entry["examples"]) == 10
    # Examples show at most 60 characters of an id, so a prefix of each is what is quoted.
    _examples_quote(entry, [i[:40] for i in long_ids])
    assert str(LIMITS["MAX_ID_LENGTH"]) in entry["message"]


# ---------------------------------------------------------------------------------- ids

NFC_E = unicodedata.normalize("NFC", "caf\u00e9")
NFD_E = unicodedata.normalize("NFD", "caf\u00e9")
NON_ASCII_IDS = [
    NFC_E,  # U+00E9
    NFD_E,  # e + U+0301: another id, compared code point by code point
    "\u6771\u4eac-7",
    "\U0001f600-smile",
    "\u00df",
    "ss",
    "\u0130stanbul",
    "i\u0307stanbul",
    " padded ",
    "tab\there",
    "\u05e9\u05dc\u05d5\u05dd",
    "Zero\u200bWidth",
    "x" * LIMITS["MAX_ID_LENGTH"],
]


@pytest.fixture
def unicode_holdout(owner: Any) -> Holdout:
    rng = np.random.default_rng(23)
    ids = NON_ASCII_IDS + [f"r{i}" for i in range(100)]  # enough rows for any default policy
    y = (rng.normal(size=len(ids)) * 3.0 + 1.0).tolist()
    return register(owner, {"name": "unicode", "task": "regression", "ids": ids, "y_true": y})


@pytest.mark.parametrize("fmt", FORMATS)
def test_non_ascii_ids_are_accepted_and_matched_exactly(
    unicode_holdout: Holdout, submitter: Any, owner: Any, store: Store, fmt: str
) -> None:
    send = Sender(submitter, unicode_holdout, store)
    y = np.asarray(unicode_holdout.y)
    rng = np.random.default_rng(3)
    preds = y + rng.normal(size=(2, y.size))
    order = rng.permutation(y.size)
    ids = [unicode_holdout.ids[i] for i in order]
    columns = {f"pred.{k}": preds[k, order].tolist() for k in range(2)}
    r = send.post(fmt, ids, columns)
    assert r.status_code == 201, r.get_json()
    # The owner sees the full-set scores (submitters may see a guarded slice).
    full = owner.get(f"/v1/submissions/{r.get_json()['id']}").get_json()
    # reference: sklearn.metrics.mean_squared_error on the predictions in registered order;
    # a mix-up of any two ids (say NFC and NFD "cafe") would change it.
    expected = np.mean([mean_squared_error(y, preds[k]) for k in range(2)])
    assert full["scores"]["mse"] == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_normalized_spellings_are_other_ids(
    unicode_holdout: Holdout, submitter: Any, store: Store, fmt: str
) -> None:
    send = Sender(submitter, unicode_holdout, store)
    ids = list(unicode_holdout.ids)
    # The NFD spelling is replaced by the NFC one: NFC is now repeated, NFD missing.
    ids[ids.index(NFD_E)] = NFC_E
    ids[ids.index("i\u0307stanbul")] = "I\u0307stanbul"  # unknown: case is not folded
    before = row_counts(store)
    r = send.post(fmt, ids, {"pred.0": [1.0] * len(ids)})
    field = "ids" if fmt == "json" else "id"
    entry = send.refused(r, 422, field, before)
    messages = " ".join(e["message"] for e in r.get_json()["errors"])
    assert "repeated" in messages or "more than once" in messages
    assert "not in the holdout" in messages and "no row" in messages
    shown = " ".join(ex for e in r.get_json()["errors"] for ex in e["examples"])
    assert orjson.dumps("I\u0307stanbul").decode() in shown
    assert entry["count"] >= 1


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
@pytest.mark.parametrize("problem", ["missing", "unknown", "duplicate"])
def test_missing_unknown_and_duplicate_ids_are_422(send: Sender, fmt: str, problem: str) -> None:
    ids = list(send.holdout.ids)
    columns = predictions(send.holdout)
    if problem == "missing":  # 12 rows left out: holdout ids are public, so they are shown
        expected_examples = ids[:12]
        ids = ids[12:]
        columns = {k: v[12:] for k, v in columns.items()}
    elif problem == "unknown":  # 12 ids the holdout does not have, in place of 12 it has
        expected_examples = [f"stranger-{i}" for i in range(12)]
        ids[:12] = expected_examples
    else:  # one id sent three times in place of two others
        expected_examples = [ids[0]]
        ids[1] = ids[2] = ids[0]
    before = row_counts(send.store)
    r = send.post(fmt, ids, columns)
    entry = send.refused(r, 422, "ids" if fmt == "json" else "id", before)
    errors = r.get_json()["errors"]
    text = " ".join(e["message"] for e in errors)
    counts = {e["message"].split(":", 1)[1].split()[0] for e in errors}
    if problem == "missing":
        assert "no row" in text and "12" in counts
    elif problem == "unknown":
        assert "not in the holdout" in text and "12" in counts
        missing = [e for e in errors if "no row" in e["message"]]
        assert missing and missing[0]["count"] == 12
    else:
        assert "more than once" in text or "repeated" in text
    assert entry["examples"]
    shown = [ex for e in errors for ex in e["examples"]]
    assert len([s for s in shown if any(x in s for x in expected_examples)]) >= min(
        10, len(expected_examples)
    )


def test_mismatched_lengths_are_422(send: Sender) -> None:
    # Also tests/api/test_submissions.py::test_invalid_submissions_change_nothing (shorter
    # ids with shorter predictions: 'ids').
    columns = predictions(send.holdout)
    body = send.json_of(send.holdout.ids, columns)
    body["predictions"] = [p[:-3] for p in body["predictions"]]
    before = row_counts(send.store)
    entry = send.refused(send.post("json", [], {}, json_body=body), 422, "predictions", before)
    assert str(len(send.holdout.ids) - 3) in entry["message"]


def test_ragged_seeds_are_422(send: Sender) -> None:
    # A table cannot be ragged; its counterpart, an empty cell, is test_empty_cells_are_422.
    columns = predictions(send.holdout, n_seeds=3)
    body = send.json_of(send.holdout.ids, columns)
    body["predictions"][1] = body["predictions"][1][:-1]
    before = row_counts(send.store)
    entry = send.refused(send.post("json", [], {}, json_body=body), 422, "predictions", before)
    _examples_quote(entry, ["predictions[1]"])


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_empty_cells_are_422(send: Sender, fmt: str) -> None:
    columns = predictions(send.holdout)
    columns["pred.s1"][4] = None
    columns["pred.s1"][9] = None
    before = row_counts(send.store)
    entry = send.refused(send.post(fmt, send.holdout.ids, columns), 422, "pred.s1", before)
    assert entry["count"] == 2
    _examples_quote(entry, ["row 5", "row 10"])


@pytest.mark.parametrize("fmt", ["csv", "parquet", "multipart"])
def test_duplicate_column_names_are_422(send: Sender, fmt: str) -> None:
    columns = predictions(send.holdout)
    ids = send.holdout.ids
    if fmt == "parquet":
        arrays = [pa.array(ids), *(pa.array(v) for v in columns.values())]
        names = ["id", "pred.s0", "pred.s0"]
        sink = io.BytesIO()
        pq.write_table(pa.Table.from_arrays(arrays, names=names), sink)
        data, media = sink.getvalue(), PARQUET
    else:
        data = csv_bytes(ids, columns).replace(b"pred.s1", b"pred.s0", 1)
        media = CSV
    before = row_counts(send.store)
    if fmt == "multipart":
        r = send.user.post(
            send.path,
            data={"model": "m", "file": (io.BytesIO(data), "preds.csv")},
            content_type="multipart/form-data",
        )
    else:
        r = send.user.post(f"{send.path}?model=m", data=data, content_type=media)
    entry = send.refused(r, 422, "columns", before)
    assert entry["count"] == 1 and entry["examples"] == ['"pred.s0"']


# ------------------------------------------------------------------------------ numbers


NON_FINITE_TABLE = {"csv": ["nan", "inf", "-inf", "NaN"], "parquet": [np.nan, np.inf, -np.inf]}


@pytest.mark.parametrize("fmt", ["csv", "parquet", "multipart"])
def test_nan_and_infinity_in_tables_are_422(send: Sender, fmt: str) -> None:
    values = NON_FINITE_TABLE["parquet" if fmt == "parquet" else "csv"]
    columns = predictions(send.holdout)
    for j, v in enumerate(values):
        columns["pred.s0"][2 * j] = v
    before = row_counts(send.store)
    entry = send.refused(send.post(fmt, send.holdout.ids, columns), 422, "pred.s0", before)
    assert entry["count"] == len(values)
    _examples_quote(entry, ["NaN", "Infinity", "nan", "inf"])


@pytest.mark.parametrize(
    ("raw", "status", "field"),
    [
        # JSON has no literal for NaN or infinity: such a body is not JSON at all (400).
        (b"NaN", 400, "body"),
        (b"Infinity", 400, "body"),
        (b"1e999", 400, "body"),  # orjson refuses an overflowing literal
        # Spelled as text or null, the body is JSON with a value that is not a number.
        (b'"NaN"', 422, "predictions"),
        (b'"Infinity"', 422, "predictions"),
        (b"null", 422, "predictions"),
    ],
)
def test_nan_and_infinity_in_json(send: Sender, raw: bytes, status: int, field: str) -> None:
    # Also tests/api/test_submissions.py::test_non_finite_numbers_are_refused (sweep.complexity).
    body = send.json_of(send.holdout.ids, predictions(send.holdout))
    marker = 123456.5
    body["predictions"][0][3] = marker
    data = orjson.dumps(body).replace(orjson.dumps(marker), raw)
    before = row_counts(send.store)
    r = send.user.post(send.path, data=data, content_type="application/json")
    entry = send.refused(r, status, field, before)
    if status == 422:
        assert entry["count"] == 1
        _examples_quote(entry, ["predictions[0][3]"])
    else:
        _examples_quote(entry, [raw.decode()[:3]])


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_text_where_numbers_belong_is_422(send: Sender, fmt: str) -> None:
    columns = predictions(send.holdout)
    words = [f"word{i}" for i in range(13)]
    if fmt == "parquet":  # a Parquet column has one type: here a text column
        columns["pred.s1"] = [f"{v}" for v in columns["pred.s1"]]
    columns["pred.s1"][:13] = words
    if fmt == "json":
        columns["pred.s1"][13] = True  # booleans are not numbers either
        columns["pred.s1"][14] = "1.5"  # numeric text is not a number in JSON
    before = row_counts(send.store)
    r = send.post(fmt, send.holdout.ids, columns)
    field = "predictions" if fmt == "json" else "pred.s1"
    entry = send.refused(r, 422, field, before)
    assert entry["count"] == (15 if fmt == "json" else 13)
    assert len(entry["examples"]) == 10
    _examples_quote(entry, words)


# ------------------------------------------------------------------------ probabilities


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
@pytest.mark.parametrize("problem", ["out_of_range", "sum"])
def test_bad_probabilities_are_422(send_cls: Sender, fmt: str, problem: str) -> None:
    columns = probabilities(send_cls.holdout)
    names = list(columns)
    if problem == "out_of_range":
        # Rows still sum to 1, but a value lies outside [0, 1].
        for i in (0, 5, 6):
            columns[names[0]][i], columns[names[1]][i] = 1.25, -0.25 - columns[names[2]][i]
    else:
        for i in (1, 7):
            columns[names[0]][i] += 1e3 * PROBABILITY_SUM_TOLERANCE
    before = row_counts(send_cls.store)
    r = send_cls.post(fmt, send_cls.holdout.ids, columns)
    entry = send_cls.refused(r, 422, "probabilities", before)
    if problem == "out_of_range":
        assert entry["count"] >= 3
        _examples_quote(entry, ["1.25", "-0.2", "-0.3", "-0.4", "-0.5", "-0.6", "-1"])
    else:
        assert entry["count"] == 2
        _examples_quote(entry, ["row 2", "row 8", "[0][1]", "[0][7]"])


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_probability_tolerance_is_as_documented(send_cls: Sender, fmt: str) -> None:
    # FORMATS.md: each row sums to 1 within PROBABILITY_SUM_TOLERANCE (1e-6), absolute.
    columns = probabilities(send_cls.holdout)
    first = next(iter(columns))
    columns[first][3] += 0.5 * PROBABILITY_SUM_TOLERANCE
    r = send_cls.post(fmt, send_cls.holdout.ids, columns)
    assert r.status_code == 201, r.get_json()


@pytest.mark.parametrize("fmt", ["json", "csv", "parquet"])
def test_unknown_classes_are_422(send_cls: Sender, fmt: str) -> None:
    classes = send_cls.holdout.response["classes"]
    n = len(send_cls.holdout.ids)
    labels = [classes[i % len(classes)] for i in range(n)]
    strangers = ["qx7-dodo", "qx7-moa", "QX7-HERON"]  # case matters: not qx7-heron
    labels[:3] = strangers
    before = row_counts(send_cls.store)
    r = send_cls.post(fmt, send_cls.holdout.ids, {"pred.s0": labels})
    field = "predictions" if fmt == "json" else "pred.s0"
    entry = send_cls.refused(r, 422, field, before)
    assert entry["count"] == 3
    _examples_quote(entry, strangers)


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
def test_probability_column_of_an_unknown_class_is_422(send_cls: Sender, fmt: str) -> None:
    columns = probabilities(send_cls.holdout)
    columns["prob.s0.qx7-dodo"] = columns.pop(next(iter(columns)))
    before = row_counts(send_cls.store)
    entry = send_cls.refused(
        send_cls.post(fmt, send_cls.holdout.ids, columns), 422, "columns", before
    )
    assert entry["count"] == 1 and entry["examples"] == ['"prob.s0.qx7-dodo"']


# ------------------------------------------------------------------------ holdout labels


def test_refusals_never_quote_holdout_labels(send: Sender, send_cls: Sender) -> None:
    """Across many refusals, no registered target value appears in any response."""
    labels = [repr(v) for v in send.holdout.y] + [str(v) for v in send.holdout.y]
    responses = []
    columns = predictions(send.holdout)
    for fmt in ("json", "csv", "parquet"):
        short = {k: v[3:] for k, v in columns.items()}
        responses.append(send.post(fmt, send.holdout.ids[3:], short))
        responses.append(send.post(fmt, ["zz", *send.holdout.ids[1:]], columns))
        bad = dict(columns)
        bad["pred.s0"] = ["x", *(str(v) for v in columns["pred.s0"][1:])]
        responses.append(send.post(fmt, send.holdout.ids, bad))
    for r in responses:
        assert 400 <= r.status_code < 500
        text = r.get_data(as_text=True)
        assert not any(label in text for label in labels)


@pytest.mark.parametrize("fmt", ["json", "csv"])
def test_chunked_body_over_the_size_limit_is_a_413_problem(send: Sender, fmt: str) -> None:
    # No Content-Length (chunked transfer): werkzeug reads the body and stops at the limit.
    data = b"x" * (LIMITS["MAX_BODY_BYTES"] + 1)
    media = "application/json" if fmt == "json" else CSV
    before = row_counts(send.store)
    r = send.user.client.post(
        f"{send.path}?model=m",
        input_stream=io.BytesIO(data),
        headers={"Authorization": f"Bearer {send.user.token}", "Content-Type": media},
        environ_overrides={"wsgi.input_terminated": True, "HTTP_TRANSFER_ENCODING": "chunked"},
    )
    assert r.request.content_length is None
    entry = send.refused(r, 413, "body", before)
    assert entry["examples"] == []  # no Content-Length to show


def test_chunked_body_within_the_limit_is_read_whole(send: Sender) -> None:
    body = orjson.dumps(send.json_of(send.holdout.ids, predictions(send.holdout)))
    r = send.user.client.post(
        send.path,
        input_stream=io.BytesIO(body),
        headers={"Authorization": f"Bearer {send.user.token}", "Content-Type": "application/json"},
        environ_overrides={"wsgi.input_terminated": True, "HTTP_TRANSFER_ENCODING": "chunked"},
    )
    assert r.request.content_length is None
    assert r.status_code == 201, r.get_json()
