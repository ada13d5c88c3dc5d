"""Benchmark: small submissions from concurrent clients against two replicas on one PostgreSQL.

Run (as root: the database is a throwaway PostgreSQL cluster run as user ``postgres``)::

    .venv/bin/python tests/perf/bench_load.py [--clients 8] [--requests 400] [--rows 10000]
        [--seeds 5] [--format parquet|json] [--workers 2] [--holdouts 2] [--warmup 16]

The last line printed is a JSON object.

What it does (the harness of ``tests/e2e/replicas.py``):

1. Starts a throwaway PostgreSQL cluster, migrates a fresh database (``heldout db upgrade``)
   and starts two gunicorn replicas (the README's command, ``--workers`` each) on it.
2. Registers ``--holdouts`` regression holdouts of ``--rows`` rows with the default policy
   (the Ladder, feedback fraction 0.3, no quota) and makes one submitter group per client.
3. Prepares 16 distinct submission bodies per holdout before the clock starts (seeded
   random predictions, ``--seeds`` seeds, rows shuffled; Parquet by default, pyarrow's
   defaults, or JSON), so the clients spend their CPU on HTTP only.
4. ``--warmup`` requests first (not timed: imports, first connections, label caches), then
   ``--requests`` requests from ``--clients`` threads, each a submission to the holdouts in
   turn, spread over the replicas round-robin on the client side. Each client sends its own
   group's submissions only, so groups do not wait for each other's Ladder row lock.

Figures: ``throughput_rps`` (timed requests / wall time of the timed phase), ``p50_ms``,
``p90_ms``, ``p99_ms``, ``max_ms`` (client-side latency of each request: send, score,
store, answer), ``failed_share`` (share of timed requests not answered 201; must be 0),
``label_cache_hit_rate`` (hits / (hits + misses) of the per-worker holdout label cache over
the timed phase, from each replica's ``/metrics``; null when the service has no such
counter; ``label_cache_hit_rate_with_warmup`` counts the warm-up too, where each worker
decodes each holdout once), ``worker_phases_ms`` (median of each ``Server-Timing``
phase), the settings used, and per-replica request counts. The clients run on the same
2 cores as the replicas and PostgreSQL: the figures are for this whole machine, client
included. The settings record the load average when the run began: other work on the
machine slows every figure.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import platform
import re
import statistics
import sys
import tempfile
import time
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "e2e"))

from replicas import (  # noqa: E402
    Answer,
    RoundRobin,
    label_cache_counts,
    prepare_database,
    run_bounded,
    running_replicas,
    throwaway_postgres,
)

from service.store import Store  # noqa: E402

BODIES_PER_HOLDOUT = 16
PARQUET = "application/vnd.apache.parquet"


def _ids(n: int) -> np.ndarray:
    return np.array([f"row-{i:07d}" for i in range(n)])


def _bodies(y: np.ndarray, seeds: int, fmt: str, holdout: int) -> list[tuple[bytes, str, dict]]:
    """Distinct submissions to one holdout: (body, content type, query parameters)."""
    ids = _ids(y.shape[0])
    out = []
    for k in range(BODIES_PER_HOLDOUT):
        rng = np.random.default_rng([holdout, k])
        predictions = y + rng.normal(scale=rng.uniform(0.5, 3.0), size=(seeds, y.shape[0]))
        order = rng.permutation(y.shape[0])
        model = f"bench-{holdout}-{k}"
        if fmt == "parquet":
            columns = {"id": pa.array(ids[order])}
            for s in range(seeds):
                columns[f"pred.{s}"] = pa.array(predictions[s, order])
            sink = io.BytesIO()
            pq.write_table(pa.table(columns), sink)
            out.append((sink.getvalue(), PARQUET, {"model": model}))
        else:
            body = {
                "model": model,
                "ids": ids[order].tolist(),
                "predictions": predictions[:, order].tolist(),
            }
            out.append((orjson.dumps(body), "application/json", {}))
    return out


def _phases(answer: Answer) -> dict[str, float]:
    header = answer.headers.get("Server-Timing", "")
    return {
        m.group(1): float(m.group(2))
        for m in re.finditer(r"([a-z_]+);dur=([0-9.]+)", header)
    }


def _rate(before: tuple[float, float] | None, after: tuple[float, float] | None) -> Any:
    if before is None or after is None:
        return None, None, None
    hits, misses = after[0] - before[0], after[1] - before[1]
    total = hits + misses
    return (hits / total if total else None), hits, misses


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--clients", type=int, default=8)
    parser.add_argument("--requests", type=int, default=400)
    parser.add_argument("--rows", type=int, default=10_000)
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--format", choices=("parquet", "json"), default="parquet")
    parser.add_argument("--workers", type=int, default=2, help="gunicorn workers per replica")
    parser.add_argument("--holdouts", type=int, default=2)
    parser.add_argument("--warmup", type=int, default=16)
    parser.add_argument("--deadline", type=float, default=900.0, help="seconds, whole run")
    args = parser.parse_args(argv)

    with tempfile.TemporaryDirectory(prefix="heldout-bench-load-") as tmp, \
            throwaway_postgres() as cluster:
        url = cluster.create_database("bench_load")
        schema_by = prepare_database(url)
        store = Store(url)
        try:
            owner = store.create_token("owner", "bench")[1]
            groups = [store.create_token("submitter", f"c{c}")[1] for c in range(args.clients)]
        finally:
            store.dispose()
        settings = {"HELDOUT_BOOTSTRAP_RESAMPLES": "1000"}  # the service's default
        with running_replicas(
            Path(tmp), url, count=2, workers=args.workers, settings=settings
        ) as replicas:
            bases = [r.base for r in replicas]
            balancer = RoundRobin(bases, timeout=120.0)
            holdouts, bodies = [], []
            for h in range(args.holdouts):
                y = np.random.default_rng(1000 + h).normal(size=args.rows) * 10.0
                answer = balancer.send(
                    "POST", "/v1/holdouts",
                    headers={"Authorization": f"Bearer {owner}"},
                    json={"name": f"bench-{h}", "task": "regression",
                          "ids": _ids(args.rows).tolist(), "y_true": y.tolist()},
                )
                assert answer.status == 201, answer.body
                holdouts.append(answer.body["id"])
                bodies.append(_bodies(y, args.seeds, args.format, h))
            payload_bytes = statistics.median(len(b[0]) for per in bodies for b in per)

            def job(i: int) -> Answer:
                # The balancer takes the replicas in turn: step the holdout once per round
                # of replicas, so that every replica serves every holdout.
                h = (i // len(bases)) % len(holdouts)
                body, media_type, params = bodies[h][(i // 7) % BODIES_PER_HOLDOUT]
                token = groups[i % len(groups)]
                return balancer.send(
                    "POST", f"/v1/holdouts/{holdouts[h]}/submissions",
                    params=params, data=body,
                    headers={"Authorization": f"Bearer {token}", "Content-Type": media_type},
                )

            started = time.monotonic()
            load_before = os.getloadavg()[0]
            # A labelled counter has no sample before its first count: none yet is zero.
            cache_start = label_cache_counts(bases) or (0.0, 0.0)
            warm = run_bounded([lambda i=i: job(i) for i in range(args.warmup)],
                               clients=args.clients, deadline=args.deadline)
            warm_failed = sum(a.status != 201 for a in warm)
            cache_before = label_cache_counts(bases) or (0.0, 0.0)
            t0 = time.monotonic()
            answers = run_bounded(
                [lambda i=i: job(args.warmup + i) for i in range(args.requests)],
                clients=args.clients,
                deadline=max(1.0, args.deadline - (t0 - started)),
            )
            wall = time.monotonic() - t0
            cache_after = label_cache_counts(bases)

    failed = [a for a in answers if a.status != 201]
    ms = np.array([a.seconds * 1000.0 for a in answers])
    phases: dict[str, list[float]] = defaultdict(list)
    for a in answers:
        for name, value in _phases(a).items():
            phases[name].append(value)
    rate, hits, misses = _rate(cache_before, cache_after)
    rate_all, _, misses_all = _rate(cache_start, cache_after)
    result = {
        "throughput_rps": round(len(answers) / wall, 2),
        "p50_ms": round(float(np.percentile(ms, 50)), 1),
        "p90_ms": round(float(np.percentile(ms, 90)), 1),
        "p99_ms": round(float(np.percentile(ms, 99)), 1),
        "max_ms": round(float(ms.max()), 1),
        "failed_share": len(failed) / len(answers),
        "failed_statuses": dict(Counter(str(a.status or a.error) for a in failed)),
        "label_cache_hit_rate": None if rate is None else round(rate, 4),
        "label_cache_hits": hits,
        "label_cache_misses": misses,
        "label_cache_hit_rate_with_warmup": None if rate_all is None else round(rate_all, 4),
        "label_cache_misses_with_warmup": misses_all,
        "worker_phases_ms": {k: round(statistics.median(v), 2) for k, v in phases.items()},
        "requests_per_replica": dict(Counter(a.base for a in answers).most_common()),
        "wall_seconds": round(wall, 2),
        "warmup_failed": warm_failed,
        "settings": {
            "replicas": 2,
            "workers_per_replica": args.workers,
            "clients": args.clients,
            "requests": args.requests,
            "warmup_requests": args.warmup,
            "rows": args.rows,
            "seeds": args.seeds,
            "format": args.format,
            "payload_bytes_median": int(payload_bytes),
            "holdouts": args.holdouts,
            "groups": args.clients,
            "policy": "default (ladder guard, feedback_fraction 0.3, no quota)",
            "schema": schema_by,
            "database": "PostgreSQL (throwaway cluster, fsync off)",
            "cpus": os.cpu_count(),
            "load_average_1min_at_start": round(load_before, 2),
            "python": platform.python_version(),
        },
    }
    for key, value in result.items():
        if key != "settings":
            print(f"{key}: {value}")
    print(json.dumps(result))
    return 0 if not failed else 1


if __name__ == "__main__":
    sys.exit(main())
