"""Benchmark: a million-row, ten-seed regression submission end to end through gunicorn.

Run: ``.venv/bin/python tests/perf/bench_ingest.py [n] [k] [repeats] [--postgres URL] [--keep]``
(defaults 1e6, 10, 5; the database is a fresh SQLite file unless a PostgreSQL URL is given;
``--keep`` keeps the temporary directory with the files, else it is removed; ``--help``).
The last line printed is a JSON object.

What it does, all in one run:

1. Writes n string ids (25 characters, like ``crossing-0000042-1f0c9a7e``), their targets and
   k seeds of predictions; registers the holdout (a Parquet upload) with a fresh database;
   writes the submission, rows shuffled, as Parquet (pyarrow's defaults), CSV and JSON.
2. Starts ``gunicorn`` with the service's own config (one worker, loopback port) and posts
   each file ``repeats`` times, formats interleaved round by round (a busy neighbour slows
   every format alike), timing each request on the client: upload, parse, align ids,
   score, store, respond. ``<fmt>_worker_phases_ms``: the worker's own phases, from its
   ``Server-Timing`` header (``service/api/timing.py``); ``client_minus_worker`` is what
   the client saw beyond them (sending, the HTTP exchange). ``<fmt>_worker_cpu_ms``: the
   worker's CPU time for the request (all threads, ``/proc/<pid>/stat``).
3. Times the floor in this process, interleaved the same way: pyarrow reading the same file
   from disk (``pq.read_table``, ``pyarrow.csv.read_csv``, defaults; ``orjson.loads`` for
   JSON) plus the scoring-core calls the service makes (``floor_scoring_calls``: since the
   feedback/reserve slices, the full set and both slices), on arrays already in memory and
   in holdout order. ``<fmt>_ratio_to_floor`` = median request time / median floor time;
   ``<fmt>_ratio_to_floor_min`` fastest request / fastest floor (timeit's convention);
   ``<fmt>_cpu_ratio_to_floor`` the same in CPU time (steadier on a shared machine).
   The core calls often run slower in this process (a large heap, fresh pages) than in the
   worker, which flatters the ratio: ``<fmt>_ratio_to_strict_floor`` takes the faster of
   the two timings of the same calls (here, or the worker's ``score`` phase) for the floor.
4. Peak memory: for each format, on a fresh worker (the previous one stopped; the new one
   warmed by a tiny refused submission, which loads the holdout's ids and labels into the
   worker's cache), the rise of the worker's peak resident set (``VmHWM`` of
   ``/proc/<pid>/status``, reset through ``/proc/<pid>/clear_refs`` just before the request)
   over its resident set before it, divided by the decoded prediction arrays (k * n
   float64). ``peak_memory_ratio`` is the Parquet request's; CSV and JSON have their own keys.
   ``<fmt>_peak_memory_by_phase``: the same request's resident set sampled every few
   milliseconds from outside, its highest rise within each ``Server-Timing`` phase (phases
   placed back to back ending when the response arrived: approximate at their edges), over
   k * n float64 likewise: which phase sets the peak.
5. ``stored_bytes_per_submission``: every byte the database holds for one submission (each
   column of each row that belongs to it: report JSON, compressed per-row losses, slice
   reports, guard outcome, metadata), beside the Parquet payload's size.
6. ``align_ms``: ``align_ids`` in this process on the holdout ids as the store decodes them
   and the submitted ids as the Parquet reader gives them (Arrow text, what the service
   aligns), the holdout array a fresh copy each time so nothing is cached;
   ``align_warm_ms`` with the holdout's hash keys cached, as a worker has them after its
   first submission to that holdout; ``align_numpy_ids_ms`` cold with numpy text ids (a
   JSON body's).

Every figure is a median over ``repeats`` (minimum beside it, ``*_min``). The machine is
shared: run it several times and compare medians.
"""

from __future__ import annotations

import gc
import io
import json
import os
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

# The service's workers run one BLAS thread each (service/api/gunicorn_conf.py); so does
# the floor, for a like-for-like comparison. Set before numpy loads.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
import orjson  # noqa: E402
import pyarrow as pa  # noqa: E402
import pyarrow.csv as pacsv  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402
import requests  # noqa: E402
import sqlalchemy as sa  # noqa: E402

from service.cli import gunicorn_argv  # noqa: E402
from service.ingest import Limits, align_ids, id_array, read_table  # noqa: E402
from service.settings import load_settings  # noqa: E402
from service.store import Store, schema  # noqa: E402

BIN = Path(sys.executable).parent
FORMATS = ("parquet", "csv", "json")
MEDIA = {"parquet": "application/vnd.apache.parquet", "csv": "text/csv", "json": "application/json"}
START_TIMEOUT = 120.0
REQUEST_TIMEOUT = 900.0


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _timed(fn: Callable[[], Any]) -> tuple[float, Any]:
    start = time.perf_counter()
    result = fn()
    return (time.perf_counter() - start) * 1000.0, result


def _proc_kb(pid: int, key: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1])
    raise KeyError(key)


def _cpu_ms(pid: int) -> float:
    """CPU time (user + system, every thread) a process has used, in milliseconds."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) * 1000.0 / os.sysconf("SC_CLK_TCK")


def _children(pid: int) -> list[int]:
    text = Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
    return [int(t) for t in text]


def _server_timing(value: str | None) -> dict[str, float]:
    phases: dict[str, float] = {}
    for part in (value or "").split(","):
        name, _, rest = part.strip().partition(";dur=")
        if name and rest:
            phases[name] = float(rest)
    return phases


# ------------------------------------------------------------------------------- data


def make_data(n: int, k: int, directory: Path) -> dict[str, Any]:
    rng = np.random.default_rng(20_261_202)
    ids = [f"crossing-{i:07d}-{int(v):08x}" for i, v in enumerate(rng.integers(1 << 30, size=n))]
    y = rng.normal(30.0, 5.0, size=n)
    preds = y + rng.normal(0.0, 2.0, size=(k, n))
    perm = rng.permutation(n)
    shuffled = pa.array([ids[i] for i in perm], pa.string())
    holdout = pa.table({"id": pa.array(ids, pa.string()), "y_true": pa.array(y)})
    sink = io.BytesIO()
    pq.write_table(holdout, sink)
    table = pa.table({"id": shuffled, **{f"pred.{s}": pa.array(preds[s, perm]) for s in range(k)}})
    files = {"parquet": directory / "submission.parquet", "csv": directory / "submission.csv"}
    pq.write_table(table, files["parquet"])
    pacsv.write_csv(table, files["csv"])
    body = {
        "model": "bench",
        "ids": shuffled.to_pylist(),
        "predictions": preds[:, perm].tolist(),
        "seeds": [str(s) for s in range(k)],
    }
    files["json"] = directory / "submission.json"
    files["json"].write_bytes(orjson.dumps(body))
    return {"y": y, "preds": preds, "holdout_parquet": sink.getvalue(), "files": files}


# ----------------------------------------------------------------------------- server


class Server:
    """``gunicorn`` with the service's config, one worker, on a loopback port."""

    def __init__(self, env: dict[str, str], directory: Path) -> None:
        self.env, self.directory = env, directory
        self.base = f"http://{env['HELDOUT_BIND']}"
        self.log = directory / "gunicorn.log"
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        argv = gunicorn_argv()
        argv[0] = str(BIN / argv[0])
        with self.log.open("ab") as sink:
            self.proc = subprocess.Popen(
                argv, env=self.env, stdout=sink, stderr=subprocess.STDOUT, cwd=self.directory,
                start_new_session=True,
            )
        deadline = time.monotonic() + START_TIMEOUT
        while True:
            assert self.proc.poll() is None, self.log.read_text()[-3000:]
            try:
                if requests.get(f"{self.base}/readyz", timeout=5).status_code == 200:
                    break
            except (requests.ConnectionError, requests.Timeout):
                pass
            if time.monotonic() > deadline:
                raise RuntimeError("gunicorn did not become ready")
            time.sleep(0.2)

    def worker(self) -> int:
        assert self.proc is not None
        deadline = time.monotonic() + START_TIMEOUT
        while True:
            workers = _children(self.proc.pid)
            if len(workers) == 1:
                return workers[0]
            if time.monotonic() > deadline:
                raise RuntimeError(f"expected one worker, found {workers}")
            time.sleep(0.1)

    def fresh_worker(self) -> int:
        """Stop the worker; the master starts a new one. Returns the new worker's pid."""
        old = self.worker()
        os.kill(old, signal.SIGTERM)
        deadline = time.monotonic() + START_TIMEOUT
        while True:
            assert self.proc is not None
            workers = _children(self.proc.pid)
            if len(workers) == 1 and workers[0] != old:
                return workers[0]
            if time.monotonic() > deadline:
                raise RuntimeError("no new worker")
            time.sleep(0.1)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=30)


@contextmanager
def running(server: Server) -> Iterator[Server]:
    server.start()
    try:
        yield server
    finally:
        server.stop()


class RssSampler:
    """The resident set of a process, read from ``/proc`` every few milliseconds on a
    thread while a request runs (``with RssSampler(pid) as s: ...``)."""

    def __init__(self, pid: int, every: float = 0.002) -> None:
        self.pid, self.every = pid, every
        self.samples: list[tuple[float, int]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)
        self.end = 0.0

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                self.samples.append((time.perf_counter(), _proc_kb(self.pid, "VmRSS")))
            except (OSError, KeyError, ValueError):
                pass
            time.sleep(self.every)

    def __enter__(self) -> RssSampler:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.end = time.perf_counter()
        self._stop.set()
        self._thread.join()

    def peaks_by_phase(self, phases: dict[str, float], base_kb: int, unit: int) -> dict[str, float]:
        """Highest rise over ``base_kb`` within each phase, in units of ``unit`` bytes."""
        out: dict[str, float] = {}
        start = self.end - sum(phases.values()) / 1000.0
        for name, ms in phases.items():
            stop = start + ms / 1000.0
            inside = [kb for t, kb in self.samples if start <= t < stop]
            if inside:
                out[name] = round((max(inside) - base_kb) * 1024 / unit, 2)
            start = stop
        return out


# ------------------------------------------------------------------------------ floor


def scoring_call(store: Store, holdout_id: str, preds: np.ndarray) -> tuple[str, Callable[[], Any]]:
    """The scoring-core calls the service makes for this submission, on in-memory arrays."""
    from service.api import evaluate

    holdout = store.get_holdout(holdout_id)
    assert holdout is not None
    arrays = store.holdout_arrays(holdout_id)
    sub = evaluate.SubmissionInput(
        model="bench", predictions=preds, labels=None, probabilities=None,
        seeds=[str(s) for s in range(preds.shape[0])], train=None, sweep=None,
    )
    options = evaluate.options_from(load_settings(os.environ))
    try:
        from service.api import guarding
    except ImportError:
        guarding = None  # type: ignore[assignment]
    if guarding is not None and hasattr(guarding, "score_slices"):
        return (
            "service.api.guarding.score_slices (core reports on the full set and on each "
            "slice, row losses)",
            lambda: guarding.score_slices(holdout, arrays, sub, options),
        )
    return (
        "service.api.evaluate.evaluate (regression report and row losses)",
        lambda: evaluate.evaluate(holdout, arrays, sub, options),
    )


# ------------------------------------------------------------------------------ stored


def stored_bytes(store: Store, submission_id: str) -> dict[str, int]:
    """Bytes of every value the database holds for one submission, by table."""

    def size(value: Any) -> int:
        if value is None:
            return 0
        if isinstance(value, (bytes, bytearray, memoryview)):
            return len(value)
        if isinstance(value, str):
            return len(value.encode("utf-8"))
        return 8  # numbers, booleans, timestamps

    out: dict[str, int] = {}
    with store.engine.connect() as conn:
        for table in schema.metadata.sorted_tables:
            if table.name == "submissions":
                where = table.c.id == submission_id
            elif "submission_id" in table.c:
                where = table.c.submission_id == submission_id
            else:
                continue
            total = 0
            for row in conn.execute(sa.select(table).where(where)):
                total += sum(size(v) for v in row)
            if total:
                out[table.name] = total
    return out


# ------------------------------------------------------------------------------- main


def _post(server: Server, token: str, holdout_id: str, fmt: str, body: bytes) -> requests.Response:
    path = f"{server.base}/v1/holdouts/{holdout_id}/submissions"
    if fmt != "json":
        path += "?model=bench"
    headers = {"Authorization": f"Bearer {token}", "Content-Type": MEDIA[fmt]}
    return requests.post(path, data=body, headers=headers, timeout=REQUEST_TIMEOUT)


def main(n: int = 1_000_000, k: int = 10, repeats: int = 5, database: str | None = None,
         keep: bool = False) -> dict:
    directory = Path(tempfile.mkdtemp(prefix="heldout-bench-"))
    try:
        return _main(directory, n, k, repeats, database)
    finally:
        if not keep:  # about half a gigabyte of files per run
            shutil.rmtree(directory, ignore_errors=True)


def _main(directory: Path, n: int, k: int, repeats: int, database: str | None) -> dict:
    url = database or f"sqlite:///{directory / 'bench.sqlite3'}"
    data = make_data(n, k, directory)
    files = data["files"]
    bodies = {fmt: files[fmt].read_bytes() for fmt in FORMATS}

    store = Store(url)
    if database:
        schema.metadata.drop_all(store.engine)
    store.init_schema()
    _, owner = store.create_token("owner", "bench-owner")
    _, submitter = store.create_token("submitter", "bench-group")
    store.dispose()
    env = {
        **os.environ,
        "HELDOUT_DATABASE_URL": url,
        "HELDOUT_BIND": f"127.0.0.1:{_free_port()}",
        "HELDOUT_WORKERS": "1",
        "HELDOUT_TIMEOUT": str(int(REQUEST_TIMEOUT)),
    }
    server = Server(env, directory)
    out: dict[str, Any] = {"n": n, "k": k, "repeats": repeats,
                           "database": "postgresql" if database else "sqlite"}
    out["body_mb"] = {fmt: round(len(b) / 1e6, 1) for fmt, b in bodies.items()}
    times: dict[str, list[float]] = {}
    phases: dict[str, list[dict[str, float]]] = {fmt: [] for fmt in FORMATS}
    cpu: dict[str, list[float]] = {fmt: [] for fmt in FORMATS}
    memory: dict[str, float] = {}
    by_phase: dict[str, dict[str, float]] = {}
    last_id: dict[str, str] = {}
    with running(server):
        r = requests.post(
            f"{server.base}/v1/holdouts?name=bench&task=regression",
            data=data["holdout_parquet"],
            headers={"Authorization": f"Bearer {owner}", "Content-Type": MEDIA["parquet"]},
            timeout=REQUEST_TIMEOUT,
        )
        assert r.status_code == 201, r.text[:2000]
        holdout_id = r.json()["id"]

        # The floor's inputs: the holdout as the store decodes it, predictions in its order.
        local = Store(url)
        arrays = local.holdout_arrays(holdout_id)
        scoring_name, score = scoring_call(local, holdout_id, data["preds"])
        out["floor_scoring_calls"] = scoring_name

        def warm() -> None:  # loads the holdout into the worker's cache; refused (422)
            tiny = orjson.dumps({"model": "w", "ids": ["x"], "predictions": [1.0]})
            w = _post(server, submitter, holdout_id, "json", tiny)
            assert w.status_code == 422, w.text[:500]

        warm()
        for fmt in FORMATS:  # first requests: imports, caches, page faults
            assert _post(server, submitter, holdout_id, fmt, bodies[fmt]).status_code == 201

        floors = {
            "parquet_read": lambda: pq.read_table(files["parquet"]),
            "csv_read": lambda: pacsv.read_csv(files["csv"]),
            "json_read": lambda: orjson.loads(files["json"].read_bytes()),
            "score": score,
        }
        worker = server.worker()
        for _ in range(repeats):
            for fmt in FORMATS:
                cpu_before = _cpu_ms(worker)
                elapsed, resp = _timed(
                    lambda f=fmt: _post(server, submitter, holdout_id, f, bodies[f])
                )
                cpu[fmt].append(_cpu_ms(worker) - cpu_before)
                assert resp.status_code == 201, resp.text[:2000]
                assert resp.json()["n_seeds"] == k
                times.setdefault(fmt, []).append(elapsed)
                phases[fmt].append(_server_timing(resp.headers.get("Server-Timing")))
                last_id[fmt] = resp.json()["id"]
            for name, fn in floors.items():
                gc.collect()
                cpu_before = time.process_time()
                elapsed, result = _timed(fn)
                cpu.setdefault(name, []).append(1000.0 * (time.process_time() - cpu_before))
                times.setdefault(name, []).append(elapsed)
                # Nothing of one floor outlives it: a parsed JSON body kept alive made every
                # garbage collection during the next one walk ten million objects.
                del result

        # Alignment in this process, as the service does it: the holdout's ids as the store
        # decodes them (a fresh copy each time: nothing cached), the submitted ids as the
        # Parquet reader gives them (Arrow text). Then with numpy text (a JSON body's ids).
        submitted = read_table(bodies["parquet"], MEDIA["parquet"], limits=Limits()).column("id")
        submitted = submitted.combine_chunks()
        submitted_numpy = id_array(submitted.to_pylist(), limits=Limits())
        for _ in range(repeats):
            fresh = arrays.ids.copy()
            elapsed, order = _timed(lambda h=fresh: align_ids(h, submitted))
            times.setdefault("align", []).append(elapsed)
            fresh = arrays.ids.copy()
            elapsed, order_numpy = _timed(lambda h=fresh: align_ids(h, submitted_numpy))
            times.setdefault("align_numpy_ids", []).append(elapsed)
        assert (submitted_numpy[order] == arrays.ids).all()
        assert (order == order_numpy).all()
        align_ids(arrays.ids, submitted)  # the holdout's keys are now cached, as in a worker
        for _ in range(repeats):
            elapsed, _ = _timed(lambda: align_ids(arrays.ids, submitted))
            times.setdefault("align_warm", []).append(elapsed)

        for fmt in FORMATS:
            pid = server.fresh_worker()
            warm()
            Path(f"/proc/{pid}/clear_refs").write_text("5")
            before_kb = _proc_kb(pid, "VmRSS")
            with RssSampler(pid) as sampler:
                resp = _post(server, submitter, holdout_id, fmt, bodies[fmt])
            assert resp.status_code == 201, resp.text[:2000]
            peak_kb = _proc_kb(pid, "VmHWM")
            memory[fmt] = (peak_kb - before_kb) * 1024 / (k * n * 8)
            by_phase[fmt] = sampler.peaks_by_phase(
                _server_timing(resp.headers.get("Server-Timing")), before_kb, k * n * 8
            )
        sizes = stored_bytes(local, last_id["parquet"])
        local.dispose()

    med = {name: statistics.median(v) for name, v in times.items()}
    floor = {
        "parquet": med["parquet_read"] + med["score"],
        "csv": med["csv_read"] + med["score"],
        "json": med["json_read"] + med["score"],
    }
    cpu_med = {name: statistics.median(v) for name, v in cpu.items()}
    cpu_floor = {
        "parquet": cpu_med["parquet_read"] + cpu_med["score"],
        "csv": cpu_med["csv_read"] + cpu_med["score"],
        "json": cpu_med["json_read"] + cpu_med["score"],
    }
    for fmt in FORMATS:
        out[f"{fmt}_ms"] = round(med[fmt], 1)
        out[f"{fmt}_min_ms"] = round(min(times[fmt]), 1)
        out[f"{fmt}_floor_ms"] = round(floor[fmt], 1)
        out[f"{fmt}_ratio_to_floor"] = round(med[fmt] / floor[fmt], 2)
        fastest_floor = min(times[f"{fmt}_read"]) + min(times["score"])
        out[f"{fmt}_ratio_to_floor_min"] = round(min(times[fmt]) / fastest_floor, 2)
        out[f"{fmt}_worker_cpu_ms"] = round(cpu_med[fmt], 1)
        out[f"{fmt}_floor_cpu_ms"] = round(cpu_floor[fmt], 1)
        out[f"{fmt}_cpu_ratio_to_floor"] = round(cpu_med[fmt] / cpu_floor[fmt], 2)
        names = list(dict.fromkeys(p for run in phases[fmt] for p in run))
        worker = {p: round(statistics.median(run.get(p, 0.0) for run in phases[fmt]), 1)
                  for p in names}
        if worker:
            worker["client_minus_worker"] = round(med[fmt] - sum(worker.values()), 1)
        out[f"{fmt}_worker_phases_ms"] = worker
        if "score" in worker:  # the same core calls, timed inside the worker
            strict = med[f"{fmt}_read"] + min(med["score"], worker["score"])
            out[f"{fmt}_ratio_to_strict_floor"] = round(med[fmt] / strict, 2)
    for name in ("parquet_read", "csv_read", "json_read", "score"):
        out[f"floor_{name}_ms"] = round(med[name], 1)
    out["align_ms"] = round(med["align"], 1)
    out["align_min_ms"] = round(min(times["align"]), 1)
    out["align_warm_ms"] = round(med["align_warm"], 1)
    out["align_numpy_ids_ms"] = round(med["align_numpy_ids"], 1)
    out["peak_memory_ratio"] = round(memory["parquet"], 2)
    out["peak_memory_ratio_csv"] = round(memory["csv"], 2)
    out["peak_memory_ratio_json"] = round(memory["json"], 2)
    for fmt in FORMATS:
        out[f"{fmt}_peak_memory_by_phase"] = by_phase[fmt]
    out["decoded_arrays_mb"] = round(k * n * 8 / 1e6, 1)
    out["stored_bytes_per_submission"] = sum(sizes.values())
    out["stored_bytes_by_table"] = sizes
    out["parquet_payload_bytes"] = len(bodies["parquet"])
    out["targets"] = {"parquet_ratio_to_floor": 3.0, "csv_ratio_to_floor": 1.5,
                      "align_ms": 150.0, "peak_memory_ratio": 4.0}
    return out


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(
        description="Ingest benchmark: one n-row, k-seed regression submission as Parquet, "
        "CSV and JSON through gunicorn, against a pyarrow-plus-scoring-core floor. The last "
        "line printed is a JSON object (keys in the module docstring)."
    )
    parser.add_argument("n", nargs="?", type=float, default=1_000_000, help="rows (1e6)")
    parser.add_argument("k", nargs="?", type=int, default=10, help="seeds (10)")
    parser.add_argument("repeats", nargs="?", type=int, default=5,
                        help="timed requests per format (5)")
    parser.add_argument("--postgres", metavar="URL", default=None,
                        help="a PostgreSQL database to use (its tables are dropped first)")
    parser.add_argument("--keep", action="store_true",
                        help="keep the temporary directory (files, database, gunicorn log)")
    args = parser.parse_args()
    result = main(int(args.n), args.k, args.repeats, database=args.postgres, keep=args.keep)
    for key, value in result.items():
        print(f"{key}: {value}")
    print(json.dumps(result))
