"""Fuzzing every parser: any input gives a result or an IngestError with a 4xx status.

Never another exception (a 500 in the service). Inputs are arbitrary JSON-like values (the
shapes orjson produces, plus lone surrogates it never would), arbitrary bytes, and valid
CSV/Parquet/gzip bodies with bytes flipped or cut off.
"""

from __future__ import annotations

import gzip
import io

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.ingest import (
    CSV_MEDIA_TYPE,
    PARQUET_MEDIA_TYPE,
    IngestError,
    Limits,
    align_ids,
    decode_body,
    float_matrix,
    holdout_from_table,
    id_array,
    label_matrix,
    probability_tensor,
    read_table,
    submission_from_table,
    target_vector,
)

LIMITS = Limits(max_body_bytes=1 << 20, max_seeds=4, max_id_length=16, max_rows=50)
FUZZ = settings(max_examples=150, derandomize=True, deadline=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
STATUSES = {400, 413, 415, 422}
CLASSES = ["a", "b", "1"]


def outcome(fn, *args, **kwargs):
    """Run a parser; an IngestError must carry a 4xx status and well-formed problem entries."""
    try:
        return fn(*args, **kwargs)
    except IngestError as err:
        assert err.status in STATUSES
        for problem in err.to_problem_errors():
            assert problem["field"] and problem["message"]
            assert isinstance(problem["count"], int) and problem["count"] >= 0
            assert len(problem["examples"]) <= 10
            assert all(isinstance(e, str) for e in problem["examples"])
        return err


surrogates = st.text(st.characters(min_codepoint=0xD800, max_codepoint=0xDFFF), min_size=1,
                     max_size=3)
scalars = st.one_of(
    st.none(), st.booleans(), st.integers(), st.integers(min_value=2**62, max_value=2**2000),
    st.floats(), st.text(max_size=20), surrogates,
    st.sampled_from(["a", "b", "1", "1.5", "", "\x00", "nan", "é", "e\u0301"]),
)
json_like = st.recursive(
    scalars,
    lambda children: st.lists(children, max_size=6) | st.dictionaries(
        st.text(max_size=4), children, max_size=3),
    max_leaves=30,
)
numbers = st.one_of(st.floats(), st.integers(-5, 5), st.sampled_from([0.0, 0.5, 1.0]))
near_valid = st.one_of(
    st.lists(numbers, min_size=1, max_size=6),
    st.lists(st.lists(st.one_of(numbers, scalars), min_size=1, max_size=4), min_size=1,
             max_size=5),
    st.lists(st.lists(st.lists(numbers, min_size=1, max_size=3), min_size=1, max_size=3),
             min_size=1, max_size=3),
    st.lists(st.sampled_from(["a", "b", 1, 1.0, "1", True, None]), min_size=1, max_size=6),
)
values = st.one_of(json_like, near_valid)


@FUZZ
@given(values, st.one_of(st.none(), st.integers(0, 6)))
def test_json_array_parsers_never_fail_otherwise(value, n_rows):
    result = outcome(id_array, value, limits=LIMITS)
    if isinstance(result, np.ndarray):
        assert result.ndim == 1 and all(isinstance(x, str) for x in result.tolist())
    result = outcome(float_matrix, value, field="predictions", n_rows=n_rows, limits=LIMITS)
    if isinstance(result, np.ndarray):
        assert result.ndim == 2 and np.isfinite(result).all()
    result = outcome(probability_tensor, value, field="probabilities", n_rows=n_rows,
                     n_classes=3, limits=LIMITS)
    if isinstance(result, np.ndarray):
        assert result.ndim == 3 and result.shape[2] == 3
        assert ((result >= 0) & (result <= 1)).all()
    result = outcome(label_matrix, value, field="labels", classes=CLASSES, n_rows=n_rows,
                     limits=LIMITS)
    if isinstance(result, np.ndarray):
        assert result.ndim == 2 and ((result >= 0) & (result < len(CLASSES))).all()
    for task in ("regression", "classification"):
        outcome(target_vector, value, task=task, limits=LIMITS)


@FUZZ
@given(st.lists(st.one_of(st.text(max_size=6), st.integers(0, 20)), min_size=1, max_size=12),
       st.lists(st.one_of(st.text(max_size=6), st.integers(0, 20)), min_size=1, max_size=12))
def test_align_never_fails_otherwise(holdout_raw, submitted_raw):
    holdout = outcome(id_array, holdout_raw, limits=LIMITS)
    submitted = outcome(id_array, submitted_raw, limits=LIMITS)
    if not isinstance(holdout, np.ndarray) or not isinstance(submitted, np.ndarray):
        return
    if len(set(holdout.tolist())) < holdout.size:
        return  # a holdout with repeated ids is refused before it is stored
    order = outcome(align_ids, holdout, submitted)
    if isinstance(order, np.ndarray):
        assert submitted[order].tolist() == holdout.tolist()


encodings = st.sampled_from([None, "", "identity", "gzip", "x-gzip", "br", "gzip, br", "GZIP"])


@FUZZ
@given(st.binary(max_size=300), encodings)
def test_decode_body_on_arbitrary_bytes(raw, encoding):
    result = outcome(decode_body, raw, encoding, limits=LIMITS)
    if isinstance(result, bytes):
        assert result


@FUZZ
@given(st.binary(min_size=1, max_size=2000), st.data())
def test_decode_body_on_damaged_gzip(payload, data):
    packed = bytearray(gzip.compress(payload))
    cut = data.draw(st.integers(1, len(packed)))
    flips = data.draw(st.lists(st.integers(0, len(packed) - 1), max_size=3))
    for i in flips:
        packed[i] ^= data.draw(st.integers(1, 255))
    result = outcome(decode_body, bytes(packed[:cut]), "gzip", limits=LIMITS)
    if isinstance(result, bytes) and not flips and cut == len(packed):
        assert result == payload


def _submission_and_holdout(table) -> None:
    if not isinstance(table, pa.Table):
        return
    for task, classes in (("regression", None), ("classification", CLASSES)):
        result = outcome(submission_from_table, table, task=task, classes=classes,
                         limits=LIMITS)
        if not isinstance(result, IngestError):
            k = len(result.seeds)
            assert result.ids.shape == (table.num_rows,) and 1 <= k <= LIMITS.max_seeds
        outcome(holdout_from_table, table, task=task, limits=LIMITS)


@FUZZ
@given(st.binary(max_size=400),
       st.sampled_from([CSV_MEDIA_TYPE, PARQUET_MEDIA_TYPE, "text/csv; charset=utf-8",
                        "application/json"]))
def test_read_table_on_arbitrary_bytes(body, media_type):
    _submission_and_holdout(outcome(read_table, body, media_type, limits=LIMITS))


header_names = st.sampled_from(["id", "y_true", "pred", "pred.s", "pred.t", "prob.a", "prob.b",
                                "prob.1", "prob.s.a", "prob.s.b", "prob.s.1", "x", "pred.a.b"])
cells = st.one_of(st.sampled_from(["", "1", "0.5", "a", "b", "nan", "inf", "-1e400", "TRUE",
                                   "007", "é", '"q,uoted"', " 1"]),
                  st.text(st.characters(blacklist_characters="\r\n", blacklist_categories=("Cs",)),
                          max_size=5))


@FUZZ
@given(st.lists(header_names, min_size=1, max_size=6), st.data(),
       st.sampled_from([None, "regression", "classification"]))
def test_read_table_on_generated_csv(names, data, task):
    rows = data.draw(st.lists(st.lists(cells, min_size=len(names), max_size=len(names)),
                              max_size=6))
    if data.draw(st.booleans()) and rows:
        rows[0] = rows[0][:-1]  # sometimes a ragged row
    text = "\n".join([",".join(names)] + [",".join(r) for r in rows]) + "\n"
    table = outcome(read_table, text.encode("utf-8"), CSV_MEDIA_TYPE, limits=LIMITS, task=task)
    _submission_and_holdout(table)


arrow_columns = st.sampled_from([
    pa.array(["a", "b", "1"]), pa.array([1, 2, 3]), pa.array([0.2, 0.5, float("nan")]),
    pa.array([True, False, True]), pa.array([None, None, None]), pa.array(["x", None, "y"]),
    pa.array([1.0, 0.0, 0.5]), pa.array([[1], [2], []]), pa.array([b"a", b"b", b"c"]),
    pa.array(["a", "a", "b"]).dictionary_encode(), pa.array([0.5, 0.5, 0.0]),
    pa.array(["a" * 40, "b", "c"]), pa.array([2**40, -1, 0]),
])


@FUZZ
@given(st.lists(st.tuples(header_names, arrow_columns), min_size=1, max_size=5), st.data())
def test_read_table_on_damaged_parquet(columns, data):
    table = pa.table([c for _, c in columns], names=[n for n, _ in columns])
    sink = io.BytesIO()
    pq.write_table(table, sink)
    body = bytearray(sink.getvalue())
    damage = data.draw(st.sampled_from(["none", "flip", "cut"]))
    if damage == "flip":
        for i in data.draw(st.lists(st.integers(0, len(body) - 1), min_size=1, max_size=4)):
            body[i] ^= data.draw(st.integers(1, 255))
    elif damage == "cut":
        body = body[: data.draw(st.integers(0, len(body) - 1))]
    result = outcome(read_table, bytes(body), PARQUET_MEDIA_TYPE, limits=LIMITS)
    _submission_and_holdout(result)
    _submission_and_holdout(table)  # the same table handed over directly


unit = st.floats(0.0, 1.0)
prob_rows = st.lists(unit.map(lambda p: [p, 1.0 - p]), min_size=1, max_size=5)


@FUZZ
@given(st.one_of(prob_rows, st.lists(prob_rows, min_size=1, max_size=3)), st.data())
def test_probability_tensor_on_near_valid_rows(value, data):
    if data.draw(st.booleans()):
        flat = value if not isinstance(value[0][0], list) else value[0]
        row = data.draw(st.integers(0, len(flat) - 1))
        flat[row][data.draw(st.integers(0, 1))] = data.draw(scalars)
    result = outcome(probability_tensor, value, field="probabilities", n_rows=None,
                     n_classes=2, limits=LIMITS)
    if isinstance(result, np.ndarray):
        np.testing.assert_allclose(result.sum(axis=2), 1.0, atol=1e-6)


table_scalars = st.one_of(  # what an Arrow column can hold (no lone surrogates, int64 range)
    st.none(), st.booleans(), st.integers(-(2**63), 2**63 - 1), st.floats(), st.text(max_size=8),
    st.sampled_from(["a", "b", "1", "1.5", "", "\x00", "nan", "é", "e\u0301", "x" * 40]),
)


@st.composite
def submission_tables(draw) -> tuple[pa.Table, str]:
    task = draw(st.sampled_from(["regression", "classification", "holdout"]))
    n = draw(st.integers(1, 6))
    ids = [f"i{j}" for j in range(n)]
    columns: dict[str, list] = {"id": ids}
    if task == "regression":
        for seed in draw(st.sampled_from([["pred"], ["pred.s"], ["pred.s", "pred.t"]])):
            columns[seed] = draw(st.lists(st.floats(-1e6, 1e6), min_size=n, max_size=n))
    elif task == "classification":
        seeds = draw(st.sampled_from([[None], ["s"], ["s", "t"]]))
        for seed in seeds:
            name = "pred" if seed is None else f"pred.{seed}"
            columns[name] = draw(st.lists(st.sampled_from(CLASSES), min_size=n, max_size=n))
            ps = draw(st.lists(unit, min_size=n, max_size=n))
            prefix = "prob." if seed is None else f"prob.{seed}."
            columns[prefix + "a"] = ps
            columns[prefix + "b"] = [1.0 - p for p in ps]
            columns[prefix + "1"] = [0.0] * n
    else:
        columns["y_true"] = draw(st.lists(st.floats(-10, 10), min_size=n, max_size=n))
    mutation = draw(st.sampled_from(["none", "cell", "drop", "add", "duplicate_id"]))
    names = list(columns)
    if mutation == "cell":
        name = draw(st.sampled_from(names))
        columns[name] = list(columns[name])
        columns[name][draw(st.integers(0, n - 1))] = draw(table_scalars)
    elif mutation == "drop" and len(names) > 1:
        del columns[draw(st.sampled_from(names))]
    elif mutation == "add":
        columns[draw(header_names)] = [draw(table_scalars) for _ in range(n)]
    elif mutation == "duplicate_id" and n > 1:
        columns["id"] = [ids[0]] + ids[:-1]
    arrays = []
    for values in columns.values():
        try:
            arrays.append(pa.array(values))
        except (pa.ArrowException, OverflowError):  # mixed kinds: write them all as text
            arrays.append(pa.array([str(v) for v in values]))
    return pa.table(arrays, names=list(columns)), task


@FUZZ
@given(submission_tables())
def test_table_readers_on_near_valid_tables(table_task):
    table, task = table_task
    sink = io.BytesIO()
    pq.write_table(table, sink)
    parquet = outcome(read_table, sink.getvalue(), PARQUET_MEDIA_TYPE, limits=LIMITS)
    sink = io.BytesIO()
    try:
        import pyarrow.csv as pacsv

        pacsv.write_csv(table, sink)
        csv_table = outcome(read_table, sink.getvalue(), CSV_MEDIA_TYPE, limits=LIMITS,
                            task=None if task == "holdout" else task)
    except pa.ArrowException:  # pyarrow cannot write nested columns as CSV
        csv_table = None
    for candidate in (table, parquet, csv_table):
        if not isinstance(candidate, pa.Table):
            continue
        if task == "holdout":
            outcome(holdout_from_table, candidate, task="regression", limits=LIMITS)
        else:
            outcome(submission_from_table, candidate, task=task,
                    classes=CLASSES if task == "classification" else None, limits=LIMITS)
    _submission_and_holdout(table)
