"""CSV and Parquet bodies: reading (checked against pandas and pyarrow's writers) and layout."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from service.ingest import (
    CSV_MEDIA_TYPE,
    PARQUET_MEDIA_TYPE,
    IngestError,
    Limits,
    holdout_from_table,
    read_table,
    submission_from_table,
)
from service.scoring import PROBABILITY_SUM_TOLERANCE

LIMITS = Limits()
DEMO = Path(__file__).resolve().parents[2] / "demo_data"


def parquet_bytes(table: pa.Table, **kwargs) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink, **kwargs)
    return sink.getvalue()


def csv_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pacsv.write_csv(table, sink)
    return sink.getvalue()


def csv_submission(text: str, task: str = "regression", classes=None, *, typed: bool = True,
                   limits: Limits = LIMITS):
    table = read_table(text.encode(), CSV_MEDIA_TYPE, task=task if typed else None,
                       limits=limits)
    return submission_from_table(table, task=task, classes=classes, limits=limits)


def error_of(fn, *args, **kwargs) -> IngestError:
    with pytest.raises(IngestError) as info:
        fn(*args, **kwargs)
    return info.value


# ------------------------------------------------------------------------------ reading


@pytest.mark.parametrize("typed", [True, False])
def test_csv_numbers_match_python_float(typed):
    rng = np.random.default_rng(0)
    values = rng.normal(scale=1e3, size=(2, 300)) * rng.choice([1, 1e-12, 1e12], size=(2, 300))
    ids = [f"r{i}" for i in range(300)]
    frame = pd.DataFrame({"id": ids, "pred.a": values[0], "pred.b": values[1]})
    text = frame.to_csv(index=False)
    got = csv_submission(text, typed=typed)
    # reference: Python's csv module and float() (correctly rounded decimal to double)
    rows = list(csv.reader(io.StringIO(text)))[1:]
    expected = np.array([[float(r[1]) for r in rows], [float(r[2]) for r in rows]])
    np.testing.assert_array_equal(got.predictions, expected)
    np.testing.assert_array_equal(got.predictions, values)
    assert got.ids.tolist() == [r[0] for r in rows]
    assert got.seeds == ["a", "b"]


def test_csv_ids_are_always_text():
    text = "id,pred\n007,1\n1e5,2\n1.50,3\nTRUE,4\n-0,5\n"
    got = csv_submission(text)
    # reference: pandas.read_csv(dtype=str) keeps the same cells as written
    ref = pd.read_csv(io.StringIO(text), dtype=str)["id"].tolist()
    assert got.ids.tolist() == ref == ["007", "1e5", "1.50", "TRUE", "-0"]


def test_csv_and_parquet_of_one_table_read_the_same():
    rng = np.random.default_rng(3)
    table = pa.table({
        "id": [f"ü-{i}" for i in range(50)],
        "pred.x": rng.normal(size=50),
        "pred.y": rng.normal(size=50),
    })
    a = submission_from_table(read_table(parquet_bytes(table), PARQUET_MEDIA_TYPE),
                              task="regression", classes=None, limits=LIMITS)
    b = csv_submission(csv_bytes(table).decode())
    assert a.ids.tolist() == b.ids.tolist() == table.column("id").to_pylist()
    # reference: the values pyarrow wrote; CSV text from pyarrow round-trips doubles
    expected = np.vstack([table.column("pred.x").to_numpy(), table.column("pred.y").to_numpy()])
    np.testing.assert_array_equal(a.predictions, expected)
    np.testing.assert_array_equal(b.predictions, expected)


def test_utf8_byte_order_mark_is_skipped():
    text = "id,pred\na,1\n"
    bom = read_table(text.encode("utf-8-sig"), CSV_MEDIA_TYPE)
    # reference: Python's utf-8-sig codec writes the BOM U+FEFF that readers skip
    assert text.encode("utf-8-sig").startswith(b"\xef\xbb\xbf")
    assert bom.column_names == ["id", "pred"]


def test_media_type_parameters():
    assert read_table(b"id,pred\na,1\n", "Text/CSV; charset=UTF-8").num_rows == 1
    for media_type in ("text/plain", "application/json", "", "text/csv; charset=latin-1"):
        err = error_of(read_table, b"id,pred\na,1\n", media_type)
        assert err.status == 415 and err.field == "Content-Type"


@pytest.mark.parametrize("body", [
    b"id,pred\na,1\nb\n",                 # ragged row
    b"id,pred\na,\xff\xfe\n",             # not UTF-8
    b"id,pred",                           # header without line end or rows is not a table
    b"\n\n",                              # no header
    b'id,pred\n"a,1\n',                   # unterminated quote
])
def test_malformed_csv_is_400(body):
    err = error_of(read_table, body, CSV_MEDIA_TYPE)
    assert err.status == 400 and err.field == "body" and "CSV" in err.message


def test_malformed_csv_message_counts_lines_like_an_editor():
    err = error_of(read_table, b"id,pred\na,1\nb\n", CSV_MEDIA_TYPE)
    assert "line 3" in err.message


def test_empty_body_is_400():
    for media_type in (CSV_MEDIA_TYPE, PARQUET_MEDIA_TYPE):
        assert error_of(read_table, b"", media_type).status == 400


def test_malformed_parquet_is_400():
    good = parquet_bytes(pa.table({"id": ["a", "b"], "pred": [1.0, 2.0]}))
    for body in (b"PAR1 not really", good[: len(good) // 2], good[:-9] + b"xxxxxxxxx",
                 b"id,pred\na,1\n"):
        err = error_of(read_table, body, PARQUET_MEDIA_TYPE)
        assert err.status == 400 and "Parquet" in err.message


def test_duplicate_column_names_are_422_in_csv_and_parquet():
    err = error_of(read_table, b"id,pred,pred,id\na,1,2,a\n", CSV_MEDIA_TYPE)
    assert (err.status, err.field, err.count) == (422, "columns", 2)
    assert err.examples == ['"id"', '"pred"']
    table = pa.table([pa.array(["a"]), pa.array([1.0]), pa.array([2.0])],
                     names=["id", "pred", "pred"])
    err = error_of(read_table, parquet_bytes(table), PARQUET_MEDIA_TYPE)
    assert err.status == 422 and err.examples == ['"pred"']


def test_row_limits_are_413():
    limits = Limits(max_rows=3)
    text = b"id,pred\n" + b"".join(f"r{i},1\n".encode() for i in range(4))
    assert error_of(read_table, text, CSV_MEDIA_TYPE, limits=limits).status == 413
    table = pa.table({"id": [f"r{i}" for i in range(4)], "pred": [1.0] * 4})
    assert error_of(read_table, parquet_bytes(table), PARQUET_MEDIA_TYPE,
                    limits=limits).status == 413


def test_parquet_that_unpacks_past_the_byte_limit_is_413():
    table = pa.table({"id": [f"r{i}" for i in range(200_000)], "pred": np.zeros(200_000)})
    body = parquet_bytes(table, compression="zstd")
    limits = Limits(max_body_bytes=2 * len(body))
    err = error_of(read_table, body, PARQUET_MEDIA_TYPE, limits=limits)
    assert err.status == 413 and "unpacks" in err.message


# ------------------------------------------------------------------------------ holdouts


def test_holdout_regression_and_classification():
    ids, y = holdout_from_table(read_table(b"id,y_true\nb,1.5\na,-2\n", CSV_MEDIA_TYPE),
                                task="regression")
    assert ids.tolist() == ["b", "a"] and y.tolist() == [1.5, -2.0]
    table = pa.table({"id": pa.array([10, 20, 30]), "y_true": pa.array([1, 0, 1])})
    ids, y = holdout_from_table(read_table(parquet_bytes(table), PARQUET_MEDIA_TYPE),
                                task="classification")
    assert ids.tolist() == ["10", "20", "30"] and y.tolist() == ["1", "0", "1"]


def test_holdout_refusals():
    def holdout(text: str, task: str = "regression"):
        return holdout_from_table(read_table(text.encode(), CSV_MEDIA_TYPE), task=task)

    err = error_of(holdout, "id,y_true\na,1\nb,2\na,3\nb,4\n")
    assert err.field == "id" and err.count == 2 and err.examples == ['"a"', '"b"']
    err = error_of(holdout, "id,y_true,notes\na,1,x\n")
    assert err.field == "columns" and err.examples == ['"notes"']
    err = error_of(holdout, "id,target\na,1\n")
    assert err.field == "columns" and "'y_true' is missing" in err.message
    err = error_of(holdout, "id,y_true\na,1\nb,\nc,nan\nd,x\n")
    assert err.field == "y_true" and err.count == 2
    assert err.examples == ['row 2 = ""', 'row 4 = "x"']
    err = error_of(holdout, "id,y_true\na,1\nc,inf\n")
    assert err.examples == ["row 2 = Infinity"]
    err = error_of(holdout, "id,y_true\na,cat\n,dog\n", "classification")
    assert err.field == "id" and err.examples == ['row 2 = ""']
    err = error_of(holdout, "id,y_true\n", "regression")
    assert err.status == 422 and "no rows" in err.message


def test_parquet_nulls_floats_and_booleans_are_refused_where_they_do_not_belong():
    def holdout(table: pa.Table, task: str = "regression"):
        return holdout_from_table(read_table(parquet_bytes(table), PARQUET_MEDIA_TYPE), task=task)

    err = error_of(holdout, pa.table({"id": ["a", None, "c"], "y_true": [1.0, 2.0, 3.0]}))
    assert err.field == "id" and err.examples == ["row 2 = null"]
    err = error_of(holdout, pa.table({"id": [1.5, 2.5], "y_true": [1.0, 2.0]}))
    assert err.field == "id" and "double" in err.message
    err = error_of(holdout, pa.table({"id": ["a", "b"], "y_true": [True, False]}))
    assert err.field == "y_true" and "boolean" in err.message
    err = error_of(holdout, pa.table({"id": ["a", "b"], "y_true": [True, False]}),
                   "classification")
    assert err.field == "y_true" and "boolean" in err.message
    err = error_of(holdout, pa.table({"id": ["a", "b"], "y_true": [1.0, None]}))
    assert err.examples == ["row 2 = null"]


# --------------------------------------------------------------------------- submissions


def test_one_unlabeled_seed_and_labelled_seeds():
    one = csv_submission("id,pred\na,1\nb,2\n")
    assert one.seeds == ["0"] and one.predictions.shape == (1, 2)
    many = csv_submission("id,pred.first,pred.s-2,pred.3\na,1,2,3\nb,4,5,6\n")
    assert many.seeds == ["first", "s-2", "3"]
    assert many.predictions.tolist() == [[1, 4], [2, 5], [3, 6]]
    assert many.labels is None and many.probabilities is None


def test_layout_refusals_name_the_columns():
    err = error_of(csv_submission, "id,pred,pred.a\nx,1,2\n")
    assert err.field == "columns" and err.examples == ['"pred.a"']
    err = error_of(csv_submission, "id,pred.a.b,pred.\nx,1,2\n")
    assert err.count == 2 and err.examples == ['"pred.a.b"', '"pred."']
    err = error_of(csv_submission, "id,prediction,pred\nx,1,2\n")
    assert err.examples == ['"prediction"'] and "not part of the layout" in err.message
    err = error_of(csv_submission, "id,pred,prob.a\nx,1,1\n")
    assert err.examples == ['"prob.a"'] and "classification" in err.message
    err = error_of(csv_submission, "pred\n1\n")
    assert "'id' is missing" in err.message
    err = error_of(csv_submission, "id\nx\n")
    assert "no prediction columns" in err.message


def test_prediction_cells_that_are_not_finite_numbers():
    text = "id,pred.a,pred.b\nx,1,abc\ny,,2\nz,nan,-inf\nw,TRUE,1e999\n"
    for typed in (True, False):
        err = error_of(csv_submission, text, typed=typed)
        problems = err.to_problem_errors()
        assert [p["field"] for p in problems] == ["pred.a", "pred.b"]
        assert problems[0]["examples"] == ['row 2 = ""', 'row 4 = "TRUE"']
        assert problems[1]["examples"] == ['row 1 = "abc"']
    err = error_of(csv_submission, "id,pred.a,pred.b\nx,nan,1\ny,2,-inf\nz,3,1e999\n")
    problems = err.to_problem_errors()
    assert problems[0]["examples"] == ["row 1 = NaN"]
    # reference: IEEE 754: 1e999 overflows to infinity (as Python's float("1e999") does)
    assert float("1e999") == float("inf")
    assert problems[1]["examples"] == ["row 2 = -Infinity", "row 3 = Infinity"]


def test_parquet_boolean_predictions_are_refused():
    table = pa.table({"id": ["a", "b"], "pred": [True, False]})
    err = error_of(submission_from_table, table, task="regression", classes=None, limits=LIMITS)
    assert err.field == "pred" and err.count == 2 and err.examples == ["row 1 = true",
                                                                      "row 2 = false"]


def test_seed_limit_in_tables():
    limits = Limits(max_seeds=2)
    err = error_of(csv_submission, "id,pred.a,pred.b,pred.c\nx,1,2,3\n", limits=limits)
    assert err.status == 422 and "3 seeds" in err.message


def test_non_ascii_ids_in_tables_are_kept_exactly():
    ids = ["café", "cafe\u0301", "日本-1", "🙂"]
    table = pa.table({"id": ids, "pred": [1.0, 2.0, 3.0, 4.0]})
    for body, media in ((csv_bytes(table), CSV_MEDIA_TYPE),
                        (parquet_bytes(table), PARQUET_MEDIA_TYPE)):
        got = submission_from_table(read_table(body, media), task="regression", classes=None,
                                    limits=LIMITS)
        assert got.ids.tolist() == ids


# ------------------------------------------------------------------------- classification

CLASSES = ["on_time", "late", "very.late"]


def test_classification_labels_and_probabilities_per_seed():
    text = (
        "id,pred.a,pred.b,prob.a.on_time,prob.a.late,prob.a.very.late,"
        "prob.b.very.late,prob.b.late,prob.b.on_time\n"
        "x,late,on_time,0.2,0.7,0.1,0.0,0.0,1.0\n"
        "y,very.late,late,0.1,0.1,0.8,0.3,0.6,0.1\n"
    )
    got = csv_submission(text, "classification", CLASSES)
    assert got.seeds == ["a", "b"]
    assert got.labels.tolist() == [[1, 2], [0, 1]]
    # probabilities come back in the holdout's class order whatever the column order
    np.testing.assert_array_equal(got.probabilities[1], [[1.0, 0.0, 0.0], [0.1, 0.6, 0.3]])
    assert got.predictions is None


def test_one_seed_classification_and_labels_or_probabilities_alone():
    got = csv_submission("id,pred,prob.late,prob.on_time,prob.very.late\nx,late,1,0,0\n",
                         "classification", CLASSES)
    assert got.seeds == ["0"] and got.probabilities.tolist() == [[[0.0, 1.0, 0.0]]]
    got = csv_submission("id,pred.a\nx,late\n", "classification", CLASSES)
    assert got.probabilities is None and got.labels.tolist() == [[1]]
    got = csv_submission("id,prob.late,prob.on_time,prob.very.late\nx,0.5,0.5,0\n",
                         "classification", CLASSES)
    assert got.labels is None and got.seeds == ["0"]
    got = csv_submission("id,prob.s.late,prob.s.on_time,prob.s.very.late\nx,0.5,0.5,0\n",
                         "classification", CLASSES)
    assert got.labels is None and got.seeds == ["s"]


def test_parquet_integer_labels_match_text_classes():
    table = pa.table({"id": ["a", "b", "c"], "pred": pa.array([1, 0, 1], pa.int8()),
                      "prob.0": [0.2, 0.9, 0.4], "prob.1": [0.8, 0.1, 0.6]})
    got = submission_from_table(table, task="classification", classes=["0", "1"], limits=LIMITS)
    assert got.labels.tolist() == [[1, 0, 1]]


def test_unknown_and_missing_classes_never_name_the_holdouts_classes():
    secret = ["sealed-a", "sealed-b", "sealed-c"]
    text = (
        "id,pred,prob.sealed-a,prob.sealed-b,prob.sealed-c\n"
        "x,guess,0.2,0.3,0.5\ny,sealed-b,0,1,0\n"
    )
    err = error_of(csv_submission, text, "classification", secret)
    assert err.field == "pred" and err.examples == ['row 1 = "guess"']
    err = error_of(csv_submission, "id,pred,prob.sealed-a,prob.sealed-b\nx,sealed-a,1,0\n",
                   "classification", secret)
    assert err.field == "columns" and "2 of 3" in err.examples[0]
    err = error_of(csv_submission, "id,pred,prob.sealed-a,prob.other\nx,sealed-a,1,0\n",
                   "classification", secret)
    assert err.examples == ['"prob.other"']
    for text in ("id,pred,prob.sealed-a,prob.sealed-b\nx,guess,1,0\n",):
        with pytest.raises(IngestError) as info:
            csv_submission(text, "classification", secret)
        for problem in info.value.to_problem_errors():
            assert "sealed-c" not in problem["message"]
            assert not any("sealed-c" in e for e in problem["examples"])


def test_labels_and_probabilities_must_cover_the_same_seeds():
    err = error_of(csv_submission,
                   "id,pred.a,pred.b,prob.a.on_time,prob.a.late,prob.a.very.late\nx,late,late,0,1,0\n",
                   "classification", CLASSES)
    assert err.examples == ['"pred.b"']


def test_probability_checks_in_tables():
    text = (
        "id,pred,prob.on_time,prob.late,prob.very.late\n"
        f"x,late,0.2,0.8,{PROBABILITY_SUM_TOLERANCE * 0.5}\n"
        "y,late,1.5,-0.5,0\n"
        "z,late,0.3,0.3,0.3\n"
    )
    err = error_of(csv_submission, text, "classification", CLASSES)
    problems = err.to_problem_errors()
    assert problems[0]["examples"] == ["row 2 prob.on_time = 1.5", "row 2 prob.late = -0.5"]
    assert problems[1]["examples"] == ["row 3 sums to 0.9"]


# --------------------------------------------------------------------------------- demo


def test_demo_submissions_parse():
    reg = read_table((DEMO / "example_submission.csv").read_bytes(), CSV_MEDIA_TYPE,
                     task="regression")
    got = submission_from_table(reg, task="regression", classes=None, limits=LIMITS)
    # reference: pandas.read_csv of the same file
    ref = pd.read_csv(DEMO / "example_submission.csv", dtype={"id": str})
    np.testing.assert_array_equal(got.predictions, ref.drop(columns="id").to_numpy().T)
    cls = read_table((DEMO / "example_submission_classification.csv").read_bytes(),
                     CSV_MEDIA_TYPE, task="classification")
    got = submission_from_table(cls, task="classification",
                                classes=["on_time", "late", "very_late"], limits=LIMITS)
    assert got.labels.shape == got.probabilities.shape[:2] == (2, 12)


def test_untyped_csv_with_many_blocks_names_every_bad_cell():
    rows = [f"r{i},{i * 0.5}" for i in range(200_000)]
    rows[3] = "r3,oops"
    rows[150_000] = "r150000,"
    text = "id,pred\n" + "\n".join(rows) + "\n"
    table = read_table(text.encode(), CSV_MEDIA_TYPE)  # untyped: pred is read as text
    assert table.column("pred").num_chunks > 1
    err = error_of(submission_from_table, table, task="regression", classes=None, limits=LIMITS)
    assert err.count == 2 and err.examples == ['row 4 = "oops"', 'row 150001 = ""']


def test_parquet_dictionary_and_large_string_ids():
    ids = ["b", "a", "c"]
    for column in (pa.array(ids).dictionary_encode(), pa.array(ids, pa.large_string())):
        table = pa.table({"id": column, "y_true": [1.0, 2.0, 3.0]})
        got, _ = holdout_from_table(read_table(parquet_bytes(table), PARQUET_MEDIA_TYPE),
                                    task="regression")
        assert got.tolist() == ids


def test_parquet_nan_and_infinite_predictions_are_refused():
    table = pa.table({"id": ["a", "b", "c"], "pred.s": [1.0, float("nan"), float("-inf")]})
    body = parquet_bytes(table)
    err = error_of(lambda: submission_from_table(read_table(body, PARQUET_MEDIA_TYPE),
                                                 task="regression", classes=None, limits=LIMITS))
    assert (err.field, err.count) == ("pred.s", 2)
    assert err.examples == ["row 2 = NaN", "row 3 = -Infinity"]


def test_long_empty_and_nul_ids_in_tables():
    limits = Limits(max_id_length=4)
    table = pa.table({"id": ["abcd", "abcde", "", "a\x00"], "pred": [1.0, 2.0, 3.0, 4.0]})
    err = error_of(submission_from_table, table, task="regression", classes=None, limits=limits)
    problems = err.to_problem_errors()
    assert [p["examples"] for p in problems] == [
        ['row 3 = ""'], ['row 2 = "abcde"'], ['row 4 = "a\\u0000"'],
    ]
    assert all(p["field"] == "id" for p in problems)
