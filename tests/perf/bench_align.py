"""Benchmark: id alignment and request parsing at a million rows.

Run: ``.venv/bin/python tests/perf/bench_align.py [n] [k] [repeats]`` (defaults 1e6, 10, 7).
The last line printed is a JSON object. Rounds are interleaved (a busy neighbour slows every
candidate alike); each figure is the median over rounds in milliseconds, with the minimum
beside it (``*_min_ms``).

- ``align_ms``: ``align_ids`` on n shuffled ids like ``crossing-0000042-1f0c9a7e`` (25
  characters; both sides from ``id_array``), the holdout array a fresh copy each round so
  nothing is cached, timed in a block of its own before the parsing candidates.
- ``align_warm_ms``: the same with one holdout array every round, as in the service, which
  keeps holdout ids in memory (their sorted hash keys are reused; every pairing is still
  verified exactly). ``align_short_ids_ms``: cold, ids like ``id0000042`` (9 characters).
- ``align_with_unknown_id_ms``: one unknown id (the exact path that builds the message).
- ``pandas_get_indexer_ms``: ``pandas.Index.get_indexer`` on the same ids as Python strings
  (one round: it is slow); ``align_speedup_vs_pandas`` = that / ``align_ms``.
- ``id_array_ms``: n orjson-parsed string ids to the array ``align_ids`` takes.
- ``orjson_loads_ms`` (for scale) and ``float_matrix_ms``: a JSON body with k seeds of n
  predictions: parsing it, then checking and converting the parsed lists.
- ``parquet_read_ms`` / ``parquet_submission_ms``, ``csv_read_ms`` / ``csv_submission_ms``:
  ``read_table`` then ``submission_from_table`` on an (id + k seed columns) table of n rows;
  CSV read with ``task="regression"`` (numbers parsed straight to float64) and, as
  ``csv_untyped_*``, without it (number columns read as text, parsed afterwards).
"""

from __future__ import annotations

import io
import json
import statistics
import sys
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import orjson
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from service.ingest import (
    CSV_MEDIA_TYPE,
    PARQUET_MEDIA_TYPE,
    IngestError,
    Limits,
    align_ids,
    float_matrix,
    id_array,
    read_table,
    submission_from_table,
)

LIMITS = Limits()


def _timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    result = fn()
    return (time.perf_counter() - start) * 1000.0, result


def _expect_error(holdout: np.ndarray, submitted: np.ndarray) -> None:
    try:
        align_ids(holdout, submitted)
    except IngestError as err:
        assert err.count == 1
        return
    raise AssertionError("an unknown id was not reported")


def main(n: int = 1_000_000, k: int = 10, repeats: int = 7) -> dict[str, Any]:
    rng = np.random.default_rng(20_261_202)
    ids = [f"crossing-{i:07d}-{rng.integers(1 << 30):08x}" for i in range(n)]
    perm = rng.permutation(n)
    holdout_body = orjson.dumps(ids)
    submitted_body = orjson.dumps([ids[i] for i in perm])
    holdout_list = orjson.loads(holdout_body)
    submitted_list = orjson.loads(submitted_body)
    holdout = id_array(holdout_list, limits=LIMITS)
    submitted = id_array(submitted_list, limits=LIMITS)

    preds = rng.normal(30.0, 5.0, size=(k, n))
    predictions_body = orjson.dumps(preds.tolist())
    table = pa.table({"id": pa.array(submitted_list, pa.string()),
                      **{f"pred.{s}": pa.array(preds[s]) for s in range(k)}})
    sink = io.BytesIO()
    pq.write_table(table, sink)
    parquet_body = sink.getvalue()
    sink = io.BytesIO()
    pacsv.write_csv(table, sink)
    csv_body = sink.getvalue()

    def csv_read(task: str | None) -> Callable[[], pa.Table]:
        return lambda: read_table(csv_body, CSV_MEDIA_TYPE, task=task, limits=LIMITS)

    def submission(source: pa.Table) -> Callable[[], Any]:
        return lambda: submission_from_table(source, task="regression", classes=None,
                                             limits=LIMITS)

    parsed = orjson.loads(predictions_body)
    parquet_table = read_table(parquet_body, PARQUET_MEDIA_TYPE, limits=LIMITS)
    csv_table = csv_read("regression")()
    csv_untyped_table = csv_read(None)()
    candidates: dict[str, Callable[[], Any]] = {
        "align": lambda: align_ids(holdout, submitted),
        "id_array": lambda: id_array(submitted_list, limits=LIMITS),
        "orjson_loads": lambda: orjson.loads(predictions_body),
        "float_matrix": lambda: float_matrix(parsed, field="predictions", n_rows=n,
                                             limits=LIMITS),
        "parquet_read": lambda: read_table(parquet_body, PARQUET_MEDIA_TYPE, limits=LIMITS),
        "parquet_submission": submission(parquet_table),
        "csv_read": csv_read("regression"),
        "csv_submission": submission(csv_table),
        "csv_untyped_read": csv_read(None),
        "csv_untyped_submission": submission(csv_untyped_table),
    }
    times: dict[str, list[float]] = {name: [] for name in candidates}
    checks: dict[str, Any] = {}
    # align_ids first, in a block of its own: the parsing candidates below allocate and free
    # hundreds of megabytes per round, which would otherwise be charged to whoever runs next.
    candidates.pop("align")
    for _ in range(repeats):
        fresh = holdout.copy()  # a holdout array never seen before: nothing cached
        elapsed, checks["align"] = _timed(lambda h=fresh: align_ids(h, submitted))
        times["align"].append(elapsed)
    align_ids(holdout, submitted)
    for _ in range(repeats):
        elapsed, _ = _timed(lambda: align_ids(holdout, submitted))
        times.setdefault("align_warm", []).append(elapsed)
    short = id_array([f"id{i:07d}" for i in range(n)], limits=LIMITS)
    short_shuffled = short[perm]
    for _ in range(repeats):
        fresh = short.copy()
        elapsed, short_order = _timed(lambda h=fresh: align_ids(h, short_shuffled))
        times.setdefault("align_short_ids", []).append(elapsed)
    assert short_shuffled[short_order].tolist() == short.tolist()
    wrong = submitted.copy()
    wrong[n // 2] = "not-a-holdout-id"
    for _ in range(max(1, repeats // 3)):
        elapsed, _ = _timed(lambda: _expect_error(holdout, wrong))
        times.setdefault("align_with_unknown_id", []).append(elapsed)
    for _ in range(repeats):
        for name, fn in candidates.items():
            elapsed, result = _timed(fn)
            times[name].append(elapsed)
            checks[name] = result
    order = checks["align"]
    assert submitted[order].tolist() == holdout.tolist()
    np.testing.assert_array_equal(checks["float_matrix"], preds)
    for name in ("parquet_submission", "csv_submission", "csv_untyped_submission"):
        np.testing.assert_array_equal(checks[name].predictions, preds)

    hold_index = pd.Index(holdout_list, dtype=object)
    pandas_ms, pandas_order = _timed(
        lambda: pd.Index(submitted_list, dtype=object).get_indexer(hold_index)
    )
    np.testing.assert_array_equal(pandas_order, order)

    out: dict[str, Any] = {"n": n, "k": k, "repeats": repeats}
    for name, values in times.items():
        out[f"{name}_ms"] = round(statistics.median(values), 1)
        out[f"{name}_min_ms"] = round(min(values), 1)
    out["pandas_get_indexer_ms"] = round(pandas_ms, 1)
    out["align_speedup_vs_pandas"] = round(pandas_ms / out["align_ms"], 2)
    out["csv_body_mb"] = round(len(csv_body) / 1e6, 1)
    out["parquet_body_mb"] = round(len(parquet_body) / 1e6, 1)
    return out


if __name__ == "__main__":
    args = [int(float(a)) for a in sys.argv[1:]]
    result = main(*args)
    for key, value in result.items():
        print(f"{key}: {value}")
    print(json.dumps(result))
