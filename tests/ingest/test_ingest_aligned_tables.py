"""Ids aligned straight from Arrow text, and tables converted straight into holdout order.

``align_ids`` takes the submitted ids as a pyarrow string array too: ASCII ids are hashed
and compared as bytes, never widened to numpy text. ``submission_from_table`` with
``holdout_ids`` gathers every column into holdout order. Both must give exactly what the
numpy path gives: pandas' exact indexer is the reference for the order, and the
two-step path (convert, ``align_ids``, ``np.take``) for the arrays and messages.
"""

from __future__ import annotations

import io
import unicodedata

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import service.ingest.align as align_module
from service.ingest import (
    CSV_MEDIA_TYPE,
    PARQUET_MEDIA_TYPE,
    IngestError,
    Limits,
    align_ids,
    id_array,
    read_table,
    submission_from_table,
)

LIMITS = Limits()


def reference_order(holdout: list[str], submitted: list[str]) -> np.ndarray:
    # reference: pandas.Index.get_indexer (exact hash-table lookup on Python strings)
    return pd.Index(submitted, dtype=object).get_indexer(pd.Index(holdout, dtype=object))


def hold(values: list[str]) -> np.ndarray:
    return id_array(values, limits=LIMITS)


def error(fn, *args, **kwargs) -> IngestError:
    with pytest.raises(IngestError) as info:
        fn(*args, **kwargs)
    return info.value


@pytest.mark.parametrize(
    "make",
    [
        lambda i, r: f"crossing-{i:07d}-{r:08x}",  # equal lengths: a zero-copy byte view
        lambda i, r: f"v{i}-{'x' * (r % 9)}",  # varying lengths: NUL-padded rows
        lambda i, r: str(i),  # short, odd widths
    ],
)
def test_arrow_ids_align_like_pandas(make) -> None:
    rng = np.random.default_rng(4)
    holdout = [make(i, int(r)) for i, r in enumerate(rng.integers(1 << 30, size=4000))]
    submitted = [holdout[i] for i in rng.permutation(len(holdout))]
    h = hold(holdout)
    order = align_ids(h, pa.array(submitted, pa.string()))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    np.testing.assert_array_equal(order, align_ids(h.copy(), hold(submitted)))
    # a chunked array (as a CSV reader returns) aligns the same
    chunks = pa.chunked_array([submitted[:1000], submitted[1000:]], pa.string())
    np.testing.assert_array_equal(align_ids(h, chunks), order)


@pytest.mark.parametrize("dtype", ["<U7", "<U9", "<U12", "object"])
def test_any_holdout_text_layout(dtype: str) -> None:
    # Odd and even widths, wider than needed, Python strings: each hashed its own way.
    rng = np.random.default_rng(7)
    holdout = [f"k{i:05d}" + ("z" if i % 3 else "") for i in range(3000)]  # 6 or 7 chars
    submitted = [holdout[i] for i in rng.permutation(3000)]
    h = np.array(holdout, dtype=dtype)
    order = align_ids(h, pa.array(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))


def test_non_ascii_arrow_ids_fall_back_exactly() -> None:
    nfc = unicodedata.normalize("NFC", "caf\u00e9")
    nfd = unicodedata.normalize("NFD", "caf\u00e9")
    holdout = [nfc, nfd, "\u6771\u4eac", "plain", "\U0001f600"]
    submitted = ["plain", "\U0001f600", nfd, "\u6771\u4eac", nfc]
    order = align_ids(hold(holdout), pa.array(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    repeated = ["plain", "\U0001f600", nfc, nfc, "\u6771\u4eac"]
    err = error(align_ids, hold(holdout), pa.array(repeated))
    messages = " ".join(p["message"] for p in err.to_problem_errors())
    assert "more than once" in messages and "no row" in messages


@pytest.mark.parametrize(
    "submitted",
    [
        ["a1", "a2", "stranger", "a4", "a5"],  # unknown
        ["a1", "a2", "a3", "a4"],  # missing
        ["a1", "a1", "a3", "a4", "a5"],  # repeated
        ["a1", "a2", "a3", "a4", "a5-but-longer-than-any-holdout-id"],  # too long to match
        ["a1", "a2", "a3", "a4", "a"],  # shorter than any holdout id
    ],
)
def test_arrow_ids_report_what_numpy_ids_report(submitted: list[str]) -> None:
    holdout = ["a1", "a2", "a3", "a4", "a5"]
    from_arrow = error(align_ids, hold(holdout), pa.array(submitted))
    from_numpy = error(align_ids, hold(holdout), hold(submitted))
    assert from_arrow.to_problem_errors() == from_numpy.to_problem_errors()


def test_holdout_with_a_longer_id_than_any_submitted() -> None:
    # The submitted rows are narrower than the holdout's text: the holdout's longer id must
    # not match a prefix of it.
    holdout = ["ab", "cd", "efgh"]
    err = error(align_ids, hold(holdout), pa.array(["cd", "ab", "ef"]))
    assert err.examples == ['"ef"']


@pytest.mark.parametrize("weakness", [5, 1])
def test_colliding_byte_hashes_never_misalign(monkeypatch, weakness: int) -> None:
    """With hashes that collide on purpose (on both sides alike), pairing is still exact."""
    real_text, real_bytes = align_module._row_hash, align_module._byte_row_hash
    monkeypatch.setattr(align_module, "_row_hash", lambda u: real_text(u) % np.uint64(weakness))
    monkeypatch.setattr(
        align_module, "_byte_row_hash", lambda rows: real_bytes(rows) % np.uint64(weakness)
    )
    rng = np.random.default_rng(2)
    holdout = [f"c{i}" for i in range(400)]
    submitted = [holdout[i] for i in rng.permutation(400)]
    order = align_ids(hold(holdout), pa.array(submitted))
    np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    err = error(align_ids, hold(holdout), pa.array(submitted[:-1] + ["not-there"]))
    assert err.examples == ['"not-there"']


@pytest.mark.parametrize("dtype", ["<U40", "<U41", "<U64"])
def test_holdout_and_submitted_bytes_hash_alike(dtype: str) -> None:
    # The property the byte path relies on: the same ids give the same keys whether they
    # come from the holdout's numpy text or from Arrow (then both are sorted alike).
    rng = np.random.default_rng(3)
    values = [f"id-{int(r)}" * (1 + int(r) % 3) for r in rng.integers(10**6, size=500)]
    h = np.array(values, dtype=dtype)
    bits = 9
    held = align_module._holdout_ascii_keys(h, bits, None)
    assert held is not None
    keys_from_text, longest, cached = held
    rows, length = align_module._ascii_rows(pa.array(values))
    assert longest == length == max(map(len, values)) and not cached
    low = np.uint64((1 << bits) - 1)
    keys = (align_module._byte_row_hash(rows) & ~low) | np.arange(500, dtype=np.uint64)
    np.testing.assert_array_equal(np.sort(keys), keys_from_text)
    assert align_module._holdout_ascii_keys(np.array(["caf\u00e9", "x"]), 1, None) is None


def test_cached_holdout_keys_serve_arrow_ids_and_are_never_trusted() -> None:
    rng = np.random.default_rng(5)
    holdout = [f"k{i}" for i in range(2000)]
    h = hold(holdout)
    for _ in range(2):
        submitted = [holdout[i] for i in rng.permutation(2000)]
        order = align_ids(h, pa.array(submitted))
        np.testing.assert_array_equal(order, reference_order(holdout, submitted))
    assert align_module._holdout_byte_keys.get(h) is not None
    h[0], h[1] = h[1], h[0]  # stale cached keys: the answer must still be exact
    holdout[0], holdout[1] = holdout[1], holdout[0]
    submitted = [holdout[i] for i in rng.permutation(2000)]
    np.testing.assert_array_equal(
        align_ids(h, pa.array(submitted)), reference_order(holdout, submitted)
    )


ascii_id = st.text(alphabet=st.characters(min_codepoint=33, max_codepoint=126), min_size=1,
                   max_size=12)


@settings(max_examples=100, derandomize=True, deadline=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(holdout=st.lists(ascii_id, min_size=1, max_size=50, unique=True), data=st.data())
def test_arrow_and_numpy_paths_agree(holdout: list[str], data: st.DataObject) -> None:
    submitted = list(data.draw(st.permutations(holdout)))
    drop = data.draw(st.integers(0, min(2, len(submitted) - 1)))
    submitted = submitted[drop:] + data.draw(st.lists(ascii_id, max_size=3))
    h = hold(holdout)
    try:
        expected = align_ids(h.copy(), hold(submitted))
    except IngestError as exc:
        assert error(align_ids, h, pa.array(submitted)).to_problem_errors() == (
            exc.to_problem_errors()
        )
        return
    np.testing.assert_array_equal(align_ids(h, pa.array(submitted)), expected)
    np.testing.assert_array_equal(expected, reference_order(holdout, submitted))


# ------------------------------------------------------------------ tables into holdout order


def _body(table: pa.Table, media: str) -> bytes:
    sink = io.BytesIO()
    if media == PARQUET_MEDIA_TYPE:
        pq.write_table(table, sink)
    else:
        import pyarrow.csv as pacsv

        pacsv.write_csv(table, sink)
    return sink.getvalue()


def _two_step(table: pa.Table, holdout: np.ndarray, **kw):
    """The reference: convert in the order sent, align, then take (the previous way)."""
    sent = submission_from_table(table, limits=LIMITS, **kw)
    order = align_ids(holdout, sent.ids)

    def take(a: np.ndarray | None) -> np.ndarray | None:
        return None if a is None else np.take(a, order, axis=1)

    return sent, take(sent.predictions), take(sent.labels), take(sent.probabilities)


@pytest.mark.parametrize("media", [PARQUET_MEDIA_TYPE, CSV_MEDIA_TYPE])
def test_regression_table_comes_back_in_holdout_order(media: str) -> None:
    rng = np.random.default_rng(11)
    holdout = [f"r{i}-{int(v)}" for i, v in enumerate(rng.integers(10**6, size=3000))]
    perm = rng.permutation(3000)
    preds = rng.normal(size=(3, 3000))
    table = pa.table({"id": [holdout[i] for i in perm],
                      **{f"pred.s{k}": preds[k, perm] for k in range(3)}})
    table = read_table(_body(table, media), media, task="regression")
    h = hold(holdout)
    got = submission_from_table(table, task="regression", classes=None, limits=LIMITS,
                                holdout_ids=h)
    _, want, _, _ = _two_step(table, h, task="regression", classes=None)
    np.testing.assert_array_equal(got.predictions, want)
    np.testing.assert_array_equal(got.predictions, preds)  # the rows as generated
    assert got.ids is h and got.seeds == ["s0", "s1", "s2"]


def test_classification_table_comes_back_in_holdout_order() -> None:
    rng = np.random.default_rng(12)
    classes = ["ant", "bee", "cow"]
    holdout = [f"x{i}" for i in range(500)]
    perm = rng.permutation(500)
    probs = rng.dirichlet(np.ones(3), size=(2, 500))
    labels = rng.integers(0, 3, size=(2, 500))
    columns = {"id": [holdout[i] for i in perm]}
    for k in range(2):
        columns[f"pred.{k}"] = [classes[c] for c in labels[k, perm]]
        for j, c in enumerate(classes):
            columns[f"prob.{k}.{c}"] = probs[k, perm, j]
    table = pa.table(columns)
    h = hold(holdout)
    got = submission_from_table(table, task="classification", classes=classes, limits=LIMITS,
                                holdout_ids=h)
    _, _, want_labels, want_probs = _two_step(table, h, task="classification", classes=classes)
    np.testing.assert_array_equal(got.labels, want_labels)
    np.testing.assert_array_equal(got.labels, labels)
    np.testing.assert_array_equal(got.probabilities, want_probs)
    np.testing.assert_array_equal(got.probabilities, probs)


def test_id_and_value_problems_are_reported_together() -> None:
    holdout = [f"h{i}" for i in range(20)]
    sent = holdout[::-1]
    sent[0] = "stranger"
    values = np.arange(20, dtype=float)
    values[5] = np.nan
    table = pa.table({"id": sent, "pred": values})
    err = error(submission_from_table, table, task="regression", classes=None, limits=LIMITS,
                holdout_ids=hold(holdout))
    problems = err.to_problem_errors()
    assert [p["field"] for p in problems] == ["id", "id", "pred"]
    assert problems[0]["examples"] == ['"stranger"']
    assert problems[2]["examples"] == ["row 6 = NaN"]  # the row as sent, not as aligned
    # Without a holdout, the value problem alone (ids are not checked against anything).
    err = error(submission_from_table, table, task="regression", classes=None, limits=LIMITS)
    assert [p["field"] for p in err.to_problem_errors()] == ["pred"]
