"""JSON values to arrays: ids, predictions, probabilities, labels and targets.

Every refusal is checked for its status, field, count and examples, and the examples are
checked to come from the submitter's own input.
"""

from __future__ import annotations

import unicodedata

import numpy as np
import orjson
import pytest

from service.ingest import (
    IngestError,
    Limits,
    float_matrix,
    id_array,
    label_matrix,
    probability_tensor,
    target_vector,
)
from service.scoring import PROBABILITY_SUM_TOLERANCE
from service.scoring._checks import ScoringInputError, as_seed_probabilities

LIMITS = Limits()


def raises(fn, *args, **kwargs) -> IngestError:
    with pytest.raises(IngestError) as info:
        fn(*args, **kwargs)
    return info.value


# --------------------------------------------------------------------------------------- ids


def test_ids_keep_strings_exactly_and_write_integers_in_decimal():
    raw = ["a", " a", "a ", "Ünïcødé", "日本", "🙂", 7, -12, 2**80, "0042"]
    ids = id_array(raw, limits=LIMITS)
    # reference: Python's str() of an int is its decimal text; strings are kept as sent
    assert ids.tolist() == [x if isinstance(x, str) else str(x) for x in raw]
    assert ids.dtype.kind == "U" and (ids.dtype.itemsize // 4) % 2 == 0


def test_ids_from_orjson_round_trip_non_ascii():
    raw = ["é", "e\u0301", "ß", "ﬁ"]
    ids = id_array(orjson.loads(orjson.dumps(raw)), limits=LIMITS)
    assert ids.tolist() == raw


def test_nfc_and_nfd_spellings_are_different_ids():
    # reference: unicodedata.normalize (Unicode Standard Annex #15)
    nfc = unicodedata.normalize("NFC", "café")
    nfd = unicodedata.normalize("NFD", "café")
    assert nfc != nfd
    ids = id_array([nfc, nfd], limits=LIMITS)
    assert ids[0] != ids[1]
    assert ids.tolist() == [nfc, nfd]


def test_ids_refuse_booleans_null_floats_and_containers_with_examples():
    raw = ["ok", True, None, 1.5, 2.0, [1], {"a": 1}, "fine", False]
    err = raises(id_array, raw, limits=LIMITS)
    assert (err.status, err.field, err.count) == (422, "ids", 7)
    assert err.examples == [
        "ids[1] = true", "ids[2] = null", "ids[3] = 1.5", "ids[4] = 2.0",
        "ids[5] = a list of 1 items", "ids[6] = an object with 1 keys", "ids[8] = false",
    ]
    assert "7 ids" in err.message and "boolean" in err.message


def test_ids_with_only_integers_and_booleans_are_refused():
    err = raises(id_array, [1, 2, True], limits=LIMITS)
    assert err.count == 1 and err.examples == ["ids[2] = true"]


@pytest.mark.parametrize("value", [None, "abc", 3, {"ids": []}])
def test_ids_must_be_a_list(value):
    err = raises(id_array, value, limits=LIMITS)
    assert err.status == 422 and err.field == "ids" and "list" in err.message


def test_ids_must_not_be_empty():
    err = raises(id_array, [], limits=LIMITS)
    assert err.status == 422 and "empty" in err.message


def test_empty_and_nul_ids_are_refused():
    err = raises(id_array, ["a", "", "b", ""], limits=LIMITS)
    assert err.count == 2 and err.examples == ['ids[1] = ""', 'ids[3] = ""']
    err = raises(id_array, ["a", "b\x00", "\x00c"], limits=LIMITS)
    assert err.count == 2 and "NUL" in err.message


def test_id_length_limit_counts_characters_not_bytes():
    limits = Limits(max_id_length=5)
    ok = id_array(["ééééé", "12345"], limits=limits)  # 5 characters, 10 bytes in UTF-8
    assert ok.tolist() == ["ééééé", "12345"]
    err = raises(id_array, ["abcdef", "ok", "ééééééé", 123456], limits=limits)
    assert (err.status, err.count) == (422, 3)
    assert err.examples == ['ids[0] = "abcdef"', 'ids[2] = "ééééééé"', 'ids[3] = "123456"']
    assert "longer than 5 characters" in err.message


def test_too_many_ids_is_413():
    err = raises(id_array, ["a", "b", "c"], limits=Limits(max_rows=2))
    assert err.status == 413 and "3" in err.message


def test_one_very_long_id_among_many_gives_an_object_array():
    raw = [f"r{i}" for i in range(70_000)] + ["x" * 256]
    ids = id_array(raw, limits=LIMITS)
    assert ids.dtype == object
    assert ids.tolist() == raw


def test_many_bad_ids_count_all_and_show_ten():
    raw = [True] * 25 + ["ok"]
    err = raises(id_array, raw, limits=LIMITS)
    assert err.count == 25 and len(err.examples) == 10
    assert err.examples[0] == "ids[0] = true" and err.examples[-1] == "ids[9] = true"


# ------------------------------------------------------------------------------- predictions


def test_float_matrix_matches_numpy_for_seeds_and_one_flat_seed():
    rng = np.random.default_rng(0)
    seeds = rng.normal(size=(3, 50))
    value = orjson.loads(orjson.dumps(seeds.tolist()))
    got = float_matrix(value, field="predictions", n_rows=50, limits=LIMITS)
    # reference: numpy float64 conversion of the same lists
    np.testing.assert_array_equal(got, np.asarray(value, dtype=np.float64))
    flat = float_matrix(value[0], field="predictions", n_rows=None, limits=LIMITS)
    assert flat.shape == (1, 50)
    np.testing.assert_array_equal(flat[0], np.asarray(value[0], dtype=np.float64))


def test_float_matrix_accepts_integers_including_huge_ones():
    value = [[1, 2**70, -3, 0.5]]
    got = float_matrix(value, field="p", n_rows=4, limits=LIMITS)
    # reference: Python float() rounds integers to the nearest double
    assert got.tolist() == [[1.0, float(2**70), -3.0, 0.5]]


def test_float_matrix_refuses_text_booleans_and_null_where_numbers_belong():
    value = [[1.0, "2.5", 3.0], [True, None, 1]]
    err = raises(float_matrix, value, field="predictions", n_rows=3, limits=LIMITS)
    assert (err.status, err.field, err.count) == (422, "predictions", 3)
    assert err.examples == [
        'predictions[0][1] = "2.5"', "predictions[1][0] = true", "predictions[1][1] = null",
    ]
    assert "1 text" in err.message and "1 boolean" in err.message and "1 null" in err.message


def test_booleans_alone_are_not_numbers_even_though_bool_is_an_int_in_python():
    err = raises(float_matrix, [True, False, True], field="p", n_rows=3, limits=LIMITS)
    assert err.count == 3 and "boolean" in err.message
    err = raises(float_matrix, [[1, True, 2]], field="p", n_rows=3, limits=LIMITS)
    assert err.examples == ["p[0][1] = true"]


def test_float_matrix_refuses_nan_and_infinity():
    value = [[0.0, float("nan"), 1.0], [float("inf"), 2.0, -float("inf")]]
    err = raises(float_matrix, value, field="predictions", n_rows=3, limits=LIMITS)
    assert err.count == 3
    assert err.examples == [
        "predictions[0][1] = NaN", "predictions[1][0] = Infinity", "predictions[1][2] = -Infinity",
    ]
    err = raises(float_matrix, [1.0, 10**400], field="p", n_rows=2, limits=LIMITS)
    assert err.count == 1 and "NaN or infinite" in err.message


def test_orjson_itself_rejects_nan_literals():
    # reference: RFC 8259 has no NaN or Infinity; orjson follows it
    for text in (b"[NaN]", b"[Infinity]", b"[-Infinity]"):
        with pytest.raises(orjson.JSONDecodeError):
            orjson.loads(text)


def test_ragged_seeds_and_wrong_lengths_name_the_seeds():
    err = raises(float_matrix, [[1, 2, 3], [1, 2], [1, 2, 3, 4]], field="predictions",
                 n_rows=None, limits=LIMITS)
    assert err.count == 2
    assert err.examples == ["predictions[1] has 2 values", "predictions[2] has 4 values"]
    err = raises(float_matrix, [[1, 2], [3, 4]], field="predictions", n_rows=3, limits=LIMITS)
    assert err.count == 2 and "expected 3 values per seed" in err.message
    err = raises(float_matrix, [1, 2], field="predictions", n_rows=3, limits=LIMITS)
    assert err.examples == ["predictions has 2 values"]


def test_mixing_numbers_and_lists_is_refused():
    err = raises(float_matrix, [[1, 2], 3, [4, 5]], field="p", n_rows=None, limits=LIMITS)
    assert err.count == 1 and err.examples == ["p[1] = 3"]


def test_seed_limit_is_enforced():
    limits = Limits(max_seeds=2)
    float_matrix([[1.0], [2.0]], field="p", n_rows=1, limits=limits)
    err = raises(float_matrix, [[1.0], [2.0], [3.0]], field="p", n_rows=1, limits=limits)
    assert err.status == 422 and "3 seeds" in err.message and "limit of 2" in err.message


@pytest.mark.parametrize("value", [[], [[]], [[], []], "1,2", None, {"a": [1]}])
def test_empty_or_non_list_predictions_are_refused(value):
    err = raises(float_matrix, value, field="p", n_rows=None, limits=LIMITS)
    assert err.status == 422 and err.field == "p"


def test_row_limit_is_413():
    err = raises(float_matrix, [[1, 2, 3]], field="p", n_rows=None, limits=Limits(max_rows=2))
    assert err.status == 413


# ------------------------------------------------------------------------------ probabilities


def test_probability_tensor_accepts_seeds_and_one_seed():
    rng = np.random.default_rng(1)
    q = rng.dirichlet(np.ones(3), size=(2, 20))
    got = probability_tensor(q.tolist(), field="probabilities", n_rows=20, n_classes=3,
                             limits=LIMITS)
    np.testing.assert_array_equal(got, q)
    one = probability_tensor(q[0].tolist(), field="probabilities", n_rows=20, n_classes=3,
                             limits=LIMITS)
    assert one.shape == (1, 20, 3)


def test_probability_sum_tolerance_agrees_with_the_scoring_core():
    inside = 0.5 + 0.9 * PROBABILITY_SUM_TOLERANCE
    outside = 0.5 + 1.5 * PROBABILITY_SUM_TOLERANCE
    good = [[0.5, inside], [1.0, 0.0]]
    got = probability_tensor(good, field="q", n_rows=2, n_classes=2, limits=LIMITS)
    # reference: service.scoring._checks.as_seed_probabilities (the core's own rule)
    np.testing.assert_array_equal(as_seed_probabilities(good, 2, 2), got)
    bad = [[0.5, outside], [1.0, 0.0]]
    with pytest.raises(ScoringInputError):
        as_seed_probabilities(bad, 2, 2)
    err = raises(probability_tensor, bad, field="q", n_rows=2, n_classes=2, limits=LIMITS)
    assert err.count == 1 and err.examples[0].startswith("q[0] sums to 1.0000015")
    assert "1e-06" in err.message


def test_probabilities_outside_unit_interval_and_bad_sums_are_reported_together():
    value = [[[0.2, 0.8], [1.5, -0.5], [0.3, 0.3]]]
    err = raises(probability_tensor, value, field="q", n_rows=3, n_classes=2, limits=LIMITS)
    assert err.count == 2 and err.examples == ["q[0][1][0] = 1.5", "q[0][1][1] = -0.5"]
    more = err.to_problem_errors()[1]
    assert more["count"] == 1 and more["examples"] == ["q[0][2] sums to 0.6"]


def test_probability_rows_with_wrong_width_text_or_nan():
    err = raises(probability_tensor, [[0.5, 0.5], [1.0]], field="q", n_rows=2, n_classes=2,
                 limits=LIMITS)
    assert err.examples == ["q[1] has 1 values"] and "expected 2" in err.message
    err = raises(probability_tensor, [[0.5, "0.5"], [1.0, False]], field="q", n_rows=2,
                 n_classes=2, limits=LIMITS)
    assert err.count == 2 and err.examples == ['q[0][1] = "0.5"', "q[1][1] = false"]
    err = raises(probability_tensor, [[0.5, float("nan")]], field="q", n_rows=1, n_classes=2,
                 limits=LIMITS)
    assert err.examples == ["q[0][1] = NaN"]
    err = raises(probability_tensor, [0.5, 0.5], field="q", n_rows=2, n_classes=2,
                 limits=LIMITS)
    assert "not lists" in err.message


# ------------------------------------------------------------------------------------- labels


def test_labels_match_classes_by_canonical_text():
    classes = ["0", "1", "cat", "2.5"]
    value = [[0, 1.0, "cat", 2.5], ["1", "0", 1, "2.5"]]
    got = label_matrix(value, field="labels", classes=classes, n_rows=4, limits=LIMITS)
    assert got.tolist() == [[0, 1, 2, 3], [1, 0, 1, 3]]
    assert got.dtype == np.intp


def test_unknown_labels_show_the_submitters_labels_and_never_the_classes():
    classes = ["sealed-alpha", "sealed-beta"]
    value = [["sealed-alpha", "guess", 3, "sealed-beta"]]
    err = raises(label_matrix, value, field="labels", classes=classes, n_rows=4, limits=LIMITS)
    assert err.count == 2 and err.examples == ['labels[0][1] = "guess"', "labels[0][2] = 3"]
    for problem in err.to_problem_errors():
        assert "sealed" not in problem["message"]
        assert not any("sealed" in e for e in problem["examples"])


def test_labels_refuse_booleans_null_and_nan():
    err = raises(label_matrix, ["a", True, None, float("nan")], field="labels", classes=["a"],
                 n_rows=4, limits=LIMITS)
    assert err.count == 3
    assert err.examples == ["labels[1] = true", "labels[2] = null", "labels[3] = NaN"]


def test_label_matrix_wants_distinct_classes():
    with pytest.raises(ValueError):
        label_matrix(["a"], field="labels", classes=["a", "a"], n_rows=1, limits=LIMITS)


# ------------------------------------------------------------------------------------ targets


def test_regression_targets_are_finite_floats():
    got = target_vector([1, 2.5, -3], task="regression")
    assert got.dtype == np.float64 and got.tolist() == [1.0, 2.5, -3.0]
    err = raises(target_vector, [1.0, float("nan"), "x"], task="regression")
    assert err.field == "y_true" and err.examples == ['y_true[2] = "x"']
    err = raises(target_vector, [1.0, float("nan")], task="regression")
    assert err.examples == ["y_true[1] = NaN"]


def test_classification_targets_are_canonical_text():
    got = target_vector([1, 1.0, "1", "cat", 0.25], task="classification")
    assert got.tolist() == ["1", "1", "1", "cat", "0.25"]
    err = raises(target_vector, ["a", "", True], task="classification")
    assert err.examples == ["y_true[2] = true"]
    err = raises(target_vector, ["a", ""], task="classification")
    assert err.examples == ['y_true[1] = ""']


def test_unknown_task_is_a_programming_error():
    with pytest.raises(ValueError):
        target_vector([1.0], task="ranking")


@pytest.mark.parametrize("value, example", [
    ([0.0, 1.0] * 500 + [True], "p[1000] = true"),    # many genuine 0s and 1s: full check
    ([0.5] * 1000 + [False], "p[1000] = false"),      # few suspects: only they are checked
    ([1, 0] * 10 + [True, 0.5], "p[20] = true"),
])
def test_a_boolean_hidden_among_exact_zeros_and_ones_is_found(value, example):
    # Arrow turns true/false into 1.0/0.0; the check must find them among genuine 0s and 1s
    err = raises(float_matrix, value, field="p", n_rows=None, limits=LIMITS)
    assert err.count == 1 and "boolean" in err.message and err.examples == [example]


def test_exact_zeros_and_ones_are_numbers():
    value = [0.0, 1.0] * 600 + [1, 0]
    got = float_matrix(value, field="p", n_rows=None, limits=LIMITS)
    # reference: Python float() of each item
    assert got.tolist() == [[float(v) for v in value]]


def test_ids_of_one_length_many_lengths_and_non_ascii_convert_alike():
    for raw in (
        [f"{i:06d}" for i in range(2000)],              # one length: the byte buffer is a matrix
        [str(i) for i in range(2000)],                  # many lengths: padded first
        [f"é{i}" for i in range(2000)],                 # non-ASCII: through Python strings
        [f"id{i}" for i in range(1999)] + ["x" * 7],    # odd longest length
    ):
        ids = id_array(raw, limits=LIMITS)
        assert ids.tolist() == raw
        assert ids.dtype.kind == "U" and (ids.dtype.itemsize // 4) % 2 == 0
