"""CSV submissions read from a stream a block at a time (``open_csv_stream``).

The streamed path must give exactly what reading the whole body gives (``read_table`` then
``submission_from_table``): the same arrays for a clean body, and for every bad one the same
problems, word for word, with the same counts and examples. Bodies here span several of
pyarrow's 1 MiB blocks, and the source hands them over in small uneven pieces, so rows cross
block and piece boundaries. The reference values are numpy's own arrays written out by
pyarrow's CSV writer; the reference refusals are the whole-body path's.
"""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

import service.ingest.streaming as streaming
from service.ingest import (
    CSV_MEDIA_TYPE,
    IngestError,
    Limits,
    StreamedCsv,
    holdout_from_table,
    id_array,
    open_csv_stream,
    read_table,
    submission_from_table,
)

LIMITS = Limits(max_seeds=8, max_id_length=40)
N, K = 40_000, 3  # about 2.4 MB of CSV: three blocks


class Pieces:
    """A body source that gives at most a few odd-sized pieces per read, like a socket."""

    def __init__(self, body: bytes, fail_after: int | None = None) -> None:
        self.data = io.BytesIO(body)
        self.sizes = iter([7, 65_537, 1, 300_001] * 1000)
        self.fail_after = fail_after
        self.sent = 0

    def read(self, n: int) -> bytes:
        if self.fail_after is not None and self.sent >= self.fail_after:
            raise ConnectionError("the client went away")
        piece = self.data.read(min(n, next(self.sizes)))
        self.sent += len(piece)
        return piece


@pytest.fixture(scope="module")
def case() -> dict:
    rng = np.random.default_rng(12)
    ids = [f"row-{i:06d}-{int(v):05x}" + "z" * (i % 3) for i, v in
           enumerate(rng.integers(1 << 20, size=N))]
    preds = rng.normal(3.0, 2.0, size=(K, N))
    perm = rng.permutation(N)
    table = pa.table({"id": pa.array([ids[i] for i in perm]),
                      **{f"pred.{s}": pa.array(preds[s, perm]) for s in range(K)}})
    sink = io.BytesIO()
    pacsv.write_csv(table, sink)
    body = sink.getvalue()
    assert len(body) > 2 * streaming.CSV_BLOCK_BYTES
    return {"ids": ids, "preds": preds, "body": body,
            "holdout": id_array(ids, limits=LIMITS)}


def streamed(body: bytes, holdout: np.ndarray, *, task: str = "regression", classes=None,
             source=None, read_task: str | None = "regression"):
    stream = open_csv_stream(source or Pieces(body), limits=LIMITS, task=read_task)
    return submission_from_table(stream, task=task, classes=classes, limits=LIMITS,
                                 holdout_ids=holdout)


def whole(body: bytes, holdout: np.ndarray, *, task: str = "regression", classes=None,
          read_task: str | None = "regression"):
    table = read_table(body, CSV_MEDIA_TYPE, limits=LIMITS, task=read_task)
    return submission_from_table(table, task=task, classes=classes, limits=LIMITS,
                                 holdout_ids=holdout)


def problems(fn, *args, **kwargs) -> list[dict]:
    with pytest.raises(IngestError) as info:
        fn(*args, **kwargs)
    return [{**p, "status": info.value.status} for p in info.value.to_problem_errors()]


def test_clean_body_streams_into_holdout_order(case, monkeypatch) -> None:
    calls = []
    original = StreamedCsv.table
    monkeypatch.setattr(StreamedCsv, "table", lambda self: calls.append(1) or original(self))
    got = streamed(case["body"], case["holdout"])
    assert calls == []  # read block by block: the whole body was never assembled
    # reference: the predictions as numpy made them, written by pyarrow.csv.write_csv
    np.testing.assert_array_equal(got.predictions, case["preds"])
    ref = whole(case["body"], case["holdout"])
    np.testing.assert_array_equal(got.predictions, ref.predictions)
    assert got.seeds == ref.seeds == ["0", "1", "2"]
    assert got.ids is case["holdout"]


def _lines(body: bytes) -> list[bytes]:
    return body.split(b"\n")


def _set_cell(body: bytes, row: int, column: int, value: bytes) -> bytes:
    lines = _lines(body)
    cells = lines[row].split(b",")
    cells[column] = value
    lines[row] = b",".join(cells)
    return b"\n".join(lines)


def _mutations(body: bytes) -> dict[str, bytes]:
    lines = _lines(body)
    last = len(lines) - 2  # the body ends with a newline
    return {
        "text in a number column": _set_cell(_set_cell(body, 3, 2, b"abc"), last, 2, b"x"),
        "NaN and infinity": _set_cell(_set_cell(body, 9, 1, b"nan"), 30_000, 3, b"-inf"),
        "empty cell": _set_cell(body, 20_000, 1, b""),
        "empty id": _set_cell(body, 25_000, 0, b'""'),
        "long id": _set_cell(body, 31_000, 0, b"x" * 41),
        "unknown id": _set_cell(body, 17, 0, b"not-a-holdout-id"),
        "repeated id": b"\n".join([*lines[:5], lines[4], *lines[6:]]),
        "missing rows": b"\n".join(lines[:20_001]) + b"\n",
        "extra row": b"\n".join([*lines[:-1], b"extra-id,1,2,3", b""]),
        "ragged row": b"\n".join([*lines[:33_000], b"a,1", *lines[33_000:]]),
        "unknown column": body.replace(b'"pred.2"', b'"pred.2","extra"', 1).replace(
            b"\n", b",1\n").replace(b'"pred.2","extra",1', b'"pred.2","extra"', 1),
        "plain pred beside seeds": body.replace(b'"pred.0"', b'"pred"', 1),
        "repeated column": body.replace(b'"pred.2"', b'"pred.1"', 1),
        "no rows": lines[0] + b"\n",
        "header only, no newline": lines[0],
        "no id column": body.replace(b'"id"', b'"key"', 1),
    }


MUTATIONS = ["text in a number column", "NaN and infinity", "empty cell", "empty id", "long id",
             "unknown id", "repeated id", "missing rows", "extra row", "ragged row",
             "unknown column", "plain pred beside seeds", "repeated column", "no rows",
             "header only, no newline", "no id column"]


@pytest.mark.parametrize("name", MUTATIONS)
def test_refusals_are_those_of_the_whole_body(case, name: str) -> None:
    bad = _mutations(case["body"])[name]
    ref = problems(whole, bad, case["holdout"])
    assert problems(streamed, bad, case["holdout"]) == ref
    assert ref and ref[0]["status"] in (400, 413, 422)


def test_too_many_seeds_and_untyped_reads_fall_back_alike(case) -> None:
    header = b"id," + b",".join(b"pred.%d" % s for s in range(9))
    rows = [b"%s,%s" % (i.encode(), b",".join([b"1.5"] * 9)) for i in case["ids"][:50]]
    body = b"\n".join([header, *rows, b""])
    assert problems(streamed, body, case["holdout"]) == problems(whole, body, case["holdout"])
    # without the task the reader parses numbers as text: same arrays, the whole-body way
    got = streamed(case["body"], case["holdout"], read_task=None)
    np.testing.assert_array_equal(got.predictions, case["preds"])


def test_classification_reads_the_whole_body() -> None:
    body = b"id,pred.0,prob.0.a,prob.0.b\nu,a,0.75,0.25\nv,b,0.5,0.5\n"
    holdout = id_array(["v", "u"], limits=LIMITS)
    kw = {"task": "classification", "classes": ["a", "b"], "read_task": "classification"}
    got = streamed(body, holdout, **kw)
    ref = whole(body, holdout, **kw)
    np.testing.assert_array_equal(got.labels, ref.labels)
    np.testing.assert_array_equal(got.probabilities, ref.probabilities)
    bad = body.replace(b"0.75", b"0.8")  # a row summing to 1.05
    assert problems(streamed, bad, holdout, **kw) == problems(whole, bad, holdout, **kw)


def test_holdout_from_a_stream_is_the_whole_body_table() -> None:
    body = b"id,y_true\nb,1.5\na,-2\n"
    ids, y = holdout_from_table(open_csv_stream(Pieces(body), limits=LIMITS,
                                                task="regression"), task="regression")
    ref_ids, ref_y = holdout_from_table(read_table(body, CSV_MEDIA_TYPE, task="regression"),
                                        task="regression")
    assert ids.tolist() == ref_ids.tolist() == ["b", "a"]
    np.testing.assert_array_equal(y, ref_y)


def test_a_byte_order_mark_is_skipped(case) -> None:
    got = streamed(b"\xef\xbb\xbf" + case["body"], case["holdout"])
    np.testing.assert_array_equal(got.predictions, case["preds"])


def test_repeated_header_names_are_refused_at_once(case) -> None:
    bad = case["body"].replace(b'"pred.2"', b'"pred.1"', 1)
    assert problems(open_csv_stream, Pieces(bad), limits=LIMITS, task="regression") == problems(
        read_table, bad, CSV_MEDIA_TYPE, limits=LIMITS, task="regression")


@pytest.mark.parametrize("fail_after", [0, 10, 1_500_000])
def test_a_source_error_is_raised_again(case, fail_after: int) -> None:
    # A body that ends early (the service's source raises its 400 then) is never taken
    # for a complete one, wherever it stops.
    with pytest.raises(ConnectionError):
        streamed(case["body"], case["holdout"],
                 source=Pieces(case["body"], fail_after=fail_after))


def test_a_stream_is_streamed_once(case) -> None:
    stream = open_csv_stream(Pieces(case["body"]), limits=LIMITS, task="regression")
    submission_from_table(stream, task="regression", classes=None, limits=LIMITS,
                          holdout_ids=case["holdout"])
    with pytest.raises(RuntimeError):
        submission_from_table(stream, task="regression", classes=None, limits=LIMITS,
                              holdout_ids=case["holdout"])
