"""align_ids against pandas' exact indexer, and its refusals."""

from __future__ import annotations

import unicodedata
from collections import Counter

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import service.ingest.align as align_module
from service.ingest import IngestError, Limits, align_ids, id_array, require_unique_ids

LIMITS = Limits()


def reference_order(holdout: list[str], submitted: list[str]) -> np.ndarray:
    # reference: pandas.Index.get_indexer (exact hash-table lookup on Python strings)
    return pd.Index(submitted, dtype=object).get_indexer(pd.Index(holdout, dtype=object))


def ids(values: list) -> np.ndarray:
    if not values:
        return np.array([], dtype="<U2")
    return id_array(values, limits=LIMITS)


def test_shuffled_ids_align_like_pandas():
    rng = np.random.default_rng(0)
    holdout = [f"row-{i}-{rng.integers(10**9)}" for i in range(5000)]
    submitted = [holdout[i] for i in rng.permutation(len(holdout))]
    order = align_ids(ids(holdout), ids(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    assert order.dtype == np.intp


def test_already_ordered_submission_gives_the_identity():
    holdout = [f"id{i}" for i in range(100)]
    order = align_ids(ids(holdout), ids(holdout))
    np.testing.assert_array_equal(order, np.arange(100))


@pytest.mark.parametrize("kind", ["object", "odd_width_unicode", "wider_unicode"])
def test_other_text_arrays_align_too(kind):
    rng = np.random.default_rng(1)
    holdout = [f"k{i:05d}" for i in range(3000)]  # 6 characters
    submitted = [holdout[i] for i in rng.permutation(len(holdout))]
    if kind == "object":
        h, s = np.array(holdout, dtype=object), np.array(submitted, dtype=object)
    elif kind == "odd_width_unicode":
        h, s = np.array([x + "z" for x in holdout]), np.array([x + "z" for x in submitted])
        holdout = h.tolist()
        submitted = s.tolist()
    else:
        h, s = np.array(holdout, dtype="<U6"), np.array(submitted, dtype="<U13")
    order = align_ids(h, s)
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))


def test_hash_collisions_never_misalign(monkeypatch):
    """Even a hash that sends every id to a handful of values must give the exact order."""
    real = align_module._row_hash

    def weak_hash(units):
        return real(units) % np.uint64(5)

    monkeypatch.setattr(align_module, "_row_hash", weak_hash)
    rng = np.random.default_rng(2)
    holdout = [f"c{i}" for i in range(400)]
    submitted = [holdout[i] for i in rng.permutation(400)]
    order = align_ids(ids(holdout), ids(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))

    monkeypatch.setattr(align_module, "_row_hash", lambda units: np.zeros(len(units), np.uint64))
    order = align_ids(ids(holdout), ids(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    # and with colliding hashes, an unknown id is still an unknown id
    bad = submitted[:-1] + ["not-there"]
    err = pytest.raises(IngestError, align_ids, ids(holdout), ids(bad)).value
    assert err.examples == ['"not-there"']


def test_unknown_duplicate_and_missing_ids_are_reported_together():
    holdout = [f"h{i}" for i in range(30)]
    submitted = holdout[:20] + ["h3", "h3", "h7"] + ["x1", "x2", "x1"]
    with pytest.raises(IngestError) as info:
        align_ids(ids(holdout), ids(submitted), field="ids")
    problems = info.value.to_problem_errors()
    # reference: Python set and Counter arithmetic on the same lists
    counts = Counter(submitted)
    unknown_rows = [s for s in submitted if s not in set(holdout)]
    duplicated = sorted(k for k, c in counts.items() if c > 1 and k in set(holdout))
    missing = [h for h in holdout if h not in counts]
    assert info.value.status == 422
    assert [p["count"] for p in problems] == [len(unknown_rows), len(duplicated), len(missing)]
    assert problems[0]["examples"] == ['"x1"', '"x2"']
    assert problems[1]["examples"] == ['"h3" (3 times)', '"h7" (2 times)']
    assert problems[2]["examples"] == [f'"{m}"' for m in missing[:10]]
    assert all(p["field"] == "ids" for p in problems)
    assert f"{sum(counts[k] for k in duplicated)} rows in all" in problems[1]["message"]


def test_missing_ids_only():
    holdout = ["a", "b", "c"]
    err = pytest.raises(IngestError, align_ids, ids(holdout), ids(["c", "a"])).value
    assert err.count == 1 and err.examples == ['"b"'] and "no row" in err.message
    assert len(err.to_problem_errors()) == 1


def test_nfc_and_nfd_ids_do_not_match():
    # reference: unicodedata.normalize; ids are compared code point by code point
    holdout = [unicodedata.normalize("NFC", "café"), "b"]
    submitted = [unicodedata.normalize("NFD", "café"), "b"]
    err = pytest.raises(IngestError, align_ids, ids(holdout), ids(submitted)).value
    kinds = [p["message"] for p in err.to_problem_errors()]
    assert "not in the holdout" in kinds[0] and "no row" in kinds[1]


def test_non_ascii_ids_align_exactly():
    holdout = ["ä", "日本", "🙂", "e\u0301", "plain"]
    submitted = ["plain", "🙂", "e\u0301", "ä", "日本"]
    order = align_ids(ids(holdout), ids(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))


def test_duplicate_holdout_ids_are_our_bug_not_the_users():
    with pytest.raises(ValueError):
        align_ids(ids(["a", "a", "b"]), ids(["a", "b", "a"]))
    with pytest.raises(ValueError):
        align_ids(ids(["a", "a", "b"]), ids(["a", "b"]))


def test_require_unique_ids():
    require_unique_ids(ids([f"u{i}" for i in range(1000)]))
    err = pytest.raises(IngestError, require_unique_ids, ids(["a", "b", "a", "c", "b", "a"])).value
    assert err.status == 422 and err.count == 2
    assert err.examples == ['"a"', '"b"'] and "6 rows" not in err.message
    assert "5 rows in all" in err.message


id_text = st.text(
    alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"),
    min_size=1, max_size=12,
)


@settings(max_examples=150, derandomize=True, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(
    holdout=st.lists(id_text, min_size=1, max_size=60, unique=True),
    data=st.data(),
)
def test_alignment_agrees_with_pandas_or_fails_with_exact_counts(holdout, data):
    extra = data.draw(st.lists(id_text, max_size=5))
    submitted = data.draw(st.permutations(holdout))
    drop = data.draw(st.integers(0, min(3, len(submitted))))
    submitted = list(submitted[drop:]) + extra
    h, s = ids(holdout), ids(submitted)
    counts = Counter(submitted)
    hset = set(holdout)
    clean = all(counts[x] == 1 for x in holdout) and all(x in hset for x in submitted)
    if clean:
        order = align_ids(h, s)
        np.testing.assert_array_equal(order, reference_order(holdout, submitted))
        assert [submitted[i] for i in order] == holdout
        return
    with pytest.raises(IngestError) as info:
        align_ids(h, s)
    problems = {p["message"].split(";")[0]: p for p in info.value.to_problem_errors()}
    # reference: Python set and Counter arithmetic
    unknown = sum(1 for x in submitted if x not in hset)
    duplicated = sum(1 for x, c in counts.items() if c > 1 and x in hset)
    missing = sum(1 for x in holdout if x not in counts)
    got = {"unknown": 0, "duplicated": 0, "missing": 0}
    for message, p in problems.items():
        if "not in the holdout" in message:
            got["unknown"] = p["count"]
            assert all(e[1:-1] in {orjson_text(x) for x in submitted} for e in p["examples"])
        elif "more than once" in message:
            got["duplicated"] = p["count"]
        elif "no row" in message:
            got["missing"] = p["count"]
    assert got == {"unknown": unknown, "duplicated": duplicated, "missing": missing}


def orjson_text(x: str) -> str:
    import orjson

    return orjson.dumps(x).decode()[1:-1]


@settings(max_examples=100, derandomize=True, deadline=None)
@given(st.lists(st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=8),
                max_size=30))
def test_fixed_width_text_converts_to_arrow_like_pyarrow(values):
    u = np.array(values, dtype="<U8") if values else np.array([], dtype="<U2")
    # reference: pyarrow's own conversion of numpy text
    assert align_module._unicode_to_arrow(u).to_pylist() == pa.array(u, pa.string()).to_pylist()


def test_repeats_are_found_even_when_every_hash_collides(monkeypatch):
    monkeypatch.setattr(align_module, "_row_hash", lambda units: np.zeros(len(units), np.uint64))
    require_unique_ids(ids(["a", "b", "c"]))
    err = pytest.raises(IngestError, require_unique_ids, ids(["a", "b", "a"])).value
    assert err.examples == ['"a"']
    with pytest.raises(ValueError):
        align_ids(ids(["a", "b", "a"]), ids(["a", "b", "c"]))


def test_cached_holdout_keys_are_reused_and_never_trusted():
    rng = np.random.default_rng(5)
    holdout = [f"k{i}" for i in range(2000)]
    h = ids(holdout)
    for _ in range(3):
        submitted = [holdout[i] for i in rng.permutation(2000)]
        order = align_ids(h, ids(submitted))
        np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    assert align_module._holdout_keys.get(h) is not None
    # change the holdout array in place: the cached keys are stale, the answer must not be
    h[0], h[1] = h[1], h[0]
    holdout[0], holdout[1] = holdout[1], holdout[0]
    submitted = [holdout[i] for i in rng.permutation(2000)]
    order = align_ids(h, ids(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    h[5] = "brand-new"
    err = pytest.raises(IngestError, align_ids, h, ids(submitted)).value
    assert err.examples == ['"k5"']  # the submission's k5 is no longer a holdout id


def test_an_unknown_id_whose_hash_equals_a_holdout_ids_hash_is_still_unknown(monkeypatch):
    def length_hash(units):  # equal for any two ids of equal length: collisions on purpose
        return (units != 0).sum(axis=1).astype(np.uint64) << np.uint64(40)

    monkeypatch.setattr(align_module, "_row_hash", length_hash)
    holdout = ["a", "bb", "ccc"]
    err = pytest.raises(IngestError, align_ids, ids(holdout), ids(["ccc", "zz", "a"])).value
    problems = err.to_problem_errors()
    assert problems[0]["examples"] == ['"zz"'] and "not in the holdout" in problems[0]["message"]
    assert problems[1]["examples"] == ['"bb"'] and "no row" in problems[1]["message"]
    order = align_ids(ids(holdout), ids(["ccc", "bb", "a"]))
    np.testing.assert_array_equal(order, reference_order(holdout, ["ccc", "bb", "a"]))
