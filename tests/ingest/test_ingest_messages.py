"""Every item-level refusal names its field and count and shows the submitter's own items."""

from __future__ import annotations

import re

import pyarrow as pa
import pytest

from service.ingest import (
    CSV_MEDIA_TYPE,
    IngestError,
    Limits,
    align_ids,
    float_matrix,
    id_array,
    label_matrix,
    probability_tensor,
    read_table,
    submission_from_table,
    target_vector,
)

LIMITS = Limits(max_id_length=8)


def _csv(text: str, task: str = "regression", classes=None):
    table = read_table(text.encode(), CSV_MEDIA_TYPE, task=task)
    return submission_from_table(table, task=task, classes=classes, limits=LIMITS)


CASES = {
    "non-string ids": (lambda: id_array(["a", True, 2.5] * 6, limits=LIMITS), ["true", "2.5"]),
    "long ids": (lambda: id_array(["abcdefghijk", "ok"], limits=LIMITS), ["abcdefghijk"]),
    "text predictions": (
        lambda: float_matrix([[1.0, "x"] * 8], field="predictions", n_rows=16, limits=LIMITS),
        ['"x"'],
    ),
    "nan predictions": (
        lambda: float_matrix([float("nan"), 1.0], field="predictions", n_rows=2,
                             limits=LIMITS),
        ["NaN"],
    ),
    "ragged seeds": (
        lambda: float_matrix([[1.0], [1.0, 2.0]], field="predictions", n_rows=None,
                             limits=LIMITS),
        ["2 values"],
    ),
    "probability sums": (
        lambda: probability_tensor([[0.5, 0.4]] * 12, field="probabilities", n_rows=12,
                                   n_classes=2, limits=LIMITS),
        ["sums to 0.9"],
    ),
    "unknown labels": (
        lambda: label_matrix(["zz", "a"], field="labels", classes=["a"], n_rows=2,
                             limits=LIMITS),
        ['"zz"'],
    ),
    "text targets": (lambda: target_vector(["q", 1.0], task="regression"), ['"q"']),
    "unknown ids": (
        lambda: align_ids(id_array(["a", "b"], limits=LIMITS), id_array(["a", "q"],
                                                                        limits=LIMITS)),
        ['"q"'],
    ),
    "csv cells": (lambda: _csv("id,pred\na,x1\nb,2\n"), ['"x1"']),
    "csv labels": (lambda: _csv("id,pred\na,dog\n", "classification", ["cat"]), ['"dog"']),
    "csv columns": (lambda: _csv("id,pred,extra\na,1,2\n"), ['"extra"']),
}


@pytest.mark.parametrize("name", list(CASES))
def test_message_names_field_count_and_the_submitters_items(name):
    fn, shown = CASES[name]
    with pytest.raises(IngestError) as info:
        fn()
    for problem in info.value.to_problem_errors():
        message = problem["message"]
        assert message.startswith(problem["field"] + ":")
        assert re.search(rf"\b{problem['count']}\b", message)
        assert 1 <= len(problem["examples"]) <= 10
        for example in problem["examples"]:
            assert example in message
    first = info.value.to_problem_errors()[0]
    assert all(any(s in e for e in first["examples"]) for s in shown)


def test_more_than_ten_bad_items_show_the_first_ten():
    value = [[str(i) for i in range(40)]]
    with pytest.raises(IngestError) as info:
        float_matrix(value, field="predictions", n_rows=40, limits=LIMITS)
    err = info.value
    assert err.count == 40 and len(err.examples) == 10
    assert err.examples == [f'predictions[0][{i}] = "{i}"' for i in range(10)]
    assert "first 10 of 40 shown" in err.message


def test_table_examples_use_row_numbers_counted_after_the_header():
    table = pa.table({"id": ["a", "b", "c"], "pred": ["1", "x", "3"]})
    with pytest.raises(IngestError) as info:
        submission_from_table(table, task="regression", classes=None, limits=LIMITS)
    assert info.value.examples == ['row 2 = "x"']
