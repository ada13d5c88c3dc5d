"""Several gunicorn replicas on one throwaway PostgreSQL cluster, and bounded load on them.

What the replica tests (``test_replicas.py``) and the load benchmark
(``tests/perf/bench_load.py``) share:

- ``PostgresCluster``: a PostgreSQL cluster of its own (data directory, socket directory and
  loopback port), run as user ``postgres`` through ``runuser``; the harness starts, stops
  and restarts it, so stopping it never touches the session's other cluster
  (``tests/conftest.py``). Every ``pg_ctl`` call waits at most ``PG_TIMEOUT`` seconds.
- ``prepare_database``: the schema through ``heldout db upgrade`` where the CLI has it,
  otherwise the tables from ``schema.py`` (what the service created before migrations).
- ``running_replicas``: N gunicorn processes (``running_gunicorn``: the README's command,
  each in its own process group, its own port and working directory) on one database;
  ``Replica.kill`` sends SIGKILL to a replica's whole process group (master and workers).
- ``RoundRobin``: a tiny client-side balancer over the replicas' base URLs, with an
  optional failover to the next replica when a connection fails.
- ``run_bounded``: runs a fixed list of jobs on a fixed number of client threads and gives
  up (raises) past a deadline; every request has its own timeout. Nothing loops forever.
- ``incomplete_submissions`` (SQL: submissions lacking their per-row losses, slice reports
  or guard outcome) and ``label_cache_counts`` (from ``/metrics``, when the service has it).
"""

from __future__ import annotations

import glob
import os
import re
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import FIRST_EXCEPTION, ThreadPoolExecutor, wait
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import requests
import sqlalchemy as sa

sys.path.insert(0, str(Path(__file__).resolve().parent))  # for tests/perf scripts

from gunicorn_server import RunningServer, free_port, running_gunicorn  # noqa: E402

from service.store import Store, schema  # noqa: E402

BIN = Path(sys.executable).parent
PG_TIMEOUT = 60  # seconds any one pg_ctl, initdb or createdb call may take
T = TypeVar("T")


class PostgresUnavailable(RuntimeError):
    """This machine cannot run a throwaway cluster (not root, no server binaries, no runuser)."""


def postgres_bindir() -> Path:
    """The newest installed PostgreSQL server's bin directory (15 preferred).

    Raises ``PostgresUnavailable`` with the reason when a cluster cannot be run here.
    """
    if os.geteuid() != 0:
        raise PostgresUnavailable("a throwaway cluster runs as user postgres and needs root")
    if shutil.which("runuser") is None:
        raise PostgresUnavailable("runuser not found; it runs the cluster as user postgres")
    preferred = Path("/usr/lib/postgresql/15/bin")
    if (preferred / "initdb").exists():
        return preferred
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
    if not found:
        raise PostgresUnavailable("PostgreSQL server binaries not found (tests/run installs them)")
    return Path(found[-1]).parent


def _as_postgres(*argv: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        ["runuser", "-u", "postgres", "--", *argv],
        check=True,
        capture_output=True,
        text=True,
        timeout=PG_TIMEOUT + 30,
    )


@dataclass
class PostgresCluster:
    """One throwaway cluster: its own data directory, socket directory and loopback port."""

    base: Path
    bindir: Path
    port: int
    running: bool = False

    @property
    def data(self) -> Path:
        return self.base / "data"

    @property
    def log(self) -> Path:
        return self.base / "server.log"

    def url(self, database: str) -> str:
        """SQLAlchemy URL of ``database`` in this cluster (trust authentication, loopback)."""
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/{database}"

    def init(self) -> None:
        """``initdb`` (UTF-8, trust authentication on loopback, no fsync: a throwaway)."""
        sockets = self.base / "sock"
        sockets.mkdir(exist_ok=True)
        shutil.chown(self.base, "postgres", "postgres")
        shutil.chown(sockets, "postgres", "postgres")
        _as_postgres(
            str(self.bindir / "initdb"), "-D", str(self.data), "-U", "postgres",
            "--auth=trust", "-E", "UTF8", "--no-sync",
        )

    def start(self) -> None:
        """Start the server and wait (bounded) until it accepts connections."""
        options = (
            f"-p {self.port} -k {self.base / 'sock'} -c listen_addresses=127.0.0.1 "
            "-c fsync=off -c synchronous_commit=off -c full_page_writes=off "
            "-c max_connections=200"
        )
        _as_postgres(
            str(self.bindir / "pg_ctl"), "-D", str(self.data), "-o", options,
            "-l", str(self.log), "-w", "-t", str(PG_TIMEOUT), "start",
        )
        self.running = True

    def stop(self, mode: str = "fast") -> None:
        """Stop the server: ``fast`` ends sessions and rolls back open transactions (what a
        restart does); ``immediate`` is a crash."""
        _as_postgres(
            str(self.bindir / "pg_ctl"), "-D", str(self.data), "-m", mode,
            "-w", "-t", str(PG_TIMEOUT), "stop",
        )
        self.running = False

    def restart(self, down_seconds: float = 0.0) -> None:
        """Stop (fast), stay down ``down_seconds``, start again."""
        self.stop("fast")
        time.sleep(down_seconds)
        self.start()

    def create_database(self, name: str) -> str:
        """Create an empty database; return its SQLAlchemy URL."""
        if not re.fullmatch(r"[a-z][a-z0-9_]{0,62}", name):
            raise ValueError(f"database name {name!r}: lower-case letters, digits and _")
        _as_postgres(
            str(self.bindir / "createdb"), "-h", "127.0.0.1", "-p", str(self.port),
            "-U", "postgres", name,
        )
        return self.url(name)


@contextmanager
def throwaway_postgres() -> Iterator[PostgresCluster]:
    """A new cluster, started; stopped (immediate) and removed on exit."""
    cluster = PostgresCluster(
        Path(tempfile.mkdtemp(prefix="heldout-replicas-pg-")), postgres_bindir(), free_port()
    )
    try:
        cluster.init()
        cluster.start()
        yield cluster
    finally:
        if cluster.running or (cluster.data / "postmaster.pid").exists():
            subprocess.run(
                ["runuser", "-u", "postgres", "--", str(cluster.bindir / "pg_ctl"),
                 "-D", str(cluster.data), "-m", "immediate", "-w", "-t", str(PG_TIMEOUT), "stop"],
                capture_output=True,
                timeout=PG_TIMEOUT + 30,
            )
        shutil.rmtree(cluster.base, ignore_errors=True)


def prepare_database(url: str) -> str:
    """Give an empty database the service's schema; return how (``upgrade`` or ``create_all``).

    ``heldout db upgrade`` (the migrations) where the command exists; before it did, the
    service created its tables from ``schema.py`` at start, which is what this falls back to.
    """
    env = {**os.environ, "HELDOUT_DATABASE_URL": url}
    done = subprocess.run(
        [str(BIN / "heldout"), "db", "upgrade"],
        env=env, capture_output=True, text=True, timeout=120,
    )
    if done.returncode == 0:
        return "upgrade"
    if "invalid choice" not in done.stderr:
        raise RuntimeError(f"heldout db upgrade failed ({done.returncode}):\n{done.stderr}")
    store = Store(url)
    try:
        store.init_schema()
    finally:
        store.dispose()
    return "create_all"


# -- replicas ------------------------------------------------------------------------------


def process_group_members(pgid: int) -> list[int]:
    """Pids of the running (not zombie) processes in process group ``pgid``, from /proc."""
    members = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            text = stat.read_text()
        except OSError:  # the process ended meanwhile
            continue
        # "pid (comm) state ppid pgrp ...": comm may hold spaces, so split after its ")".
        fields = text[text.rindex(")") + 2 :].split()
        if int(fields[2]) == pgid and fields[0] != "Z":
            members.append(int(stat.parent.name))
    return members


@dataclass
class Replica:
    """One gunicorn process group (master and workers) serving the shared database."""

    name: str
    server: RunningServer

    @property
    def base(self) -> str:
        return self.server.base

    @property
    def pid(self) -> int:
        return self.server.proc.pid

    def kill(self) -> None:
        """``kill -9`` of the whole process group (the master and every worker), no warning.

        Returns once no process of the group runs any more (bounded: 10 seconds).
        """
        os.killpg(self.pid, signal.SIGKILL)
        self.server.proc.wait(timeout=10)
        deadline = time.monotonic() + 10
        while self.group_alive() and time.monotonic() < deadline:
            time.sleep(0.05)

    def group_alive(self) -> bool:
        """Whether a process of the replica's process group still runs (zombies excepted:
        a killed worker stays one until whoever inherited it reaps it)."""
        return bool(process_group_members(self.pid))

    def worker_pids(self) -> list[int]:
        """The master's children (the gunicorn workers), from /proc."""
        path = Path(f"/proc/{self.pid}/task/{self.pid}/children")
        try:
            return [int(p) for p in path.read_text().split()]
        except OSError:
            return []


@contextmanager
def running_replicas(
    workdir: Path,
    database_url: str,
    *,
    count: int = 2,
    workers: int = 2,
    settings: Mapping[str, str] | None = None,
) -> Iterator[list[Replica]]:
    """``count`` gunicorn replicas of ``workers`` workers each on ``database_url``.

    Each is started by ``running_gunicorn`` (bounded wait for ``/readyz``) in its own
    working directory and port, and stopped on exit unless it was killed before.
    """
    env = {
        "HELDOUT_DATABASE_URL": database_url,
        "HELDOUT_WORKERS": str(workers),
        "HELDOUT_BOOTSTRAP_RESAMPLES": "100",
        **(settings or {}),
    }
    names = [f"replica-{chr(ord('a') + k)}" for k in range(count)]
    managers = []
    for name in names:
        prometheus = workdir / name / "prometheus"  # one directory per replica's workers
        prometheus.mkdir(parents=True, exist_ok=True)
        replica_env = {**env, "PROMETHEUS_MULTIPROC_DIR": str(prometheus)}
        managers.append(running_gunicorn(workdir / name, replica_env))
    with ExitStack() as stack:
        # Started side by side (each waits for its own /readyz); every one that started is
        # stopped on exit, also when another failed to start.
        with ThreadPoolExecutor(max_workers=count) as pool:
            futures = [pool.submit(manager.__enter__) for manager in managers]
            wait(futures)
        for manager, future in zip(managers, futures, strict=True):
            if future.exception() is None:
                stack.push(manager.__exit__)
        servers = [future.result() for future in futures]  # raises a start failure
        replicas = [Replica(name, server) for name, server in zip(names, servers, strict=True)]
        # Runs first on exit: every live replica gets SIGTERM at once, so that they stop side
        # by side (each manager then waits for its own).
        stack.callback(_terminate, replicas)
        yield replicas


def _terminate(replicas: Sequence[Replica]) -> None:
    for replica in replicas:
        if replica.server.proc.poll() is None:
            try:
                os.killpg(replica.pid, signal.SIGTERM)
            except ProcessLookupError:
                pass


# -- client side ---------------------------------------------------------------------------


@dataclass
class Answer:
    """One request's outcome: the replica that answered (or failed), status or error."""

    base: str
    status: int | None  # None: no HTTP answer (connection refused or reset, timeout)
    headers: Mapping[str, str] = field(default_factory=dict)
    body: Any = None  # parsed JSON, or the text when not JSON
    seconds: float = 0.0
    error: str | None = None  # the exception's type name when status is None
    attempts: list[tuple[str, str]] = field(default_factory=list)  # failed (base, error)

    @property
    def content_type(self) -> str:
        return self.headers.get("Content-Type", "")


class RoundRobin:
    """Client-side round-robin over replicas' base URLs (one ``requests.Session`` per thread).

    ``send(..., failover=True)`` tries the next replica when a request gets no HTTP answer
    at all (connection refused or reset, timeout), at most once per replica: what a load
    balancer does with a dead backend. Safe for submissions only with an Idempotency-Key.
    """

    def __init__(self, bases: Sequence[str], *, timeout: float = 60.0) -> None:
        self.bases = list(bases)
        self.timeout = timeout
        self._next = 0
        self._lock = threading.Lock()
        self._local = threading.local()

    def next_base(self) -> str:
        return self.bases[self._take()]

    def _take(self) -> int:
        with self._lock:
            index = self._next % len(self.bases)
            self._next += 1
        return index

    def _session(self) -> requests.Session:
        session = getattr(self._local, "session", None)
        if session is None:
            session = self._local.session = requests.Session()
        return session

    def send_to(self, base: str, method: str, path: str, **kwargs: Any) -> Answer:
        """One request to one replica; never raises for a missing answer."""
        started = time.monotonic()
        try:
            response = self._session().request(
                method, base + path, timeout=self.timeout, **kwargs
            )
        except requests.RequestException as exc:
            # A broken pooled connection must not be reused for the next request.
            self._local.session = None
            return Answer(base, None, seconds=time.monotonic() - started,
                          error=type(exc).__name__)
        try:
            body: Any = response.json()
        except ValueError:
            body = response.text
        return Answer(base, response.status_code, dict(response.headers), body,
                      time.monotonic() - started)

    def send(self, method: str, path: str, *, failover: bool = False, **kwargs: Any) -> Answer:
        """A request to the next replica in turn (and, with ``failover``, the ones after it)."""
        failed: list[tuple[str, str]] = []
        first = self._take()  # then the replicas after it, each once
        for step in range(len(self.bases) if failover else 1):
            base = self.bases[(first + step) % len(self.bases)]
            answer = self.send_to(base, method, path, **kwargs)
            if answer.status is not None or not failover:
                answer.attempts = failed
                return answer
            failed.append((answer.base, answer.error or "?"))
        answer.attempts = failed
        return answer


def run_bounded(jobs: Sequence[Callable[[], T]], *, clients: int, deadline: float) -> list[T]:
    """Run ``jobs`` on ``clients`` threads; their results in order.

    Raises ``TimeoutError`` when they are not all done within ``deadline`` seconds (the
    jobs not yet started are cancelled), and re-raises the first job's exception.
    """
    with ThreadPoolExecutor(max_workers=clients) as pool:
        futures = [pool.submit(job) for job in jobs]
        done, pending = wait(futures, timeout=deadline, return_when=FIRST_EXCEPTION)
        for future in done:
            if future.exception() is not None:
                for other in pending:
                    other.cancel()
                raise future.exception()  # type: ignore[misc]
        if pending:
            for other in pending:
                other.cancel()
            raise TimeoutError(f"{len(pending)} of {len(jobs)} jobs unfinished after {deadline}s")
        return [future.result() for future in futures]


# -- checks on the database and the metrics ------------------------------------------------


def incomplete_submissions(url: str, holdout_ids: Sequence[str]) -> dict[str, list[str]]:
    """Submissions of these holdouts stored without all their parts, by what is missing.

    A scored submission is stored in one transaction as its row in ``submissions``, its
    per-row losses (``submission_data``), a report per slice (``submission_slices``: one
    for ``feedback`` and one for ``reserve`` when the holdout has a split) and the guard's
    outcome (``submission_guards``). Any submission lacking one is half stored.
    """
    s, d = schema.submissions, schema.submission_data
    sl, g, h = schema.submission_slices, schema.submission_guards, schema.holdouts
    slice_count = (
        sa.select(sa.func.count()).where(sl.c.submission_id == s.c.id).scalar_subquery()
    )
    queries = {
        "row_losses": sa.select(s.c.id)
        .outerjoin(d, d.c.submission_id == s.c.id)
        .where(d.c.submission_id.is_(None)),
        "guard": sa.select(s.c.id)
        .outerjoin(g, g.c.submission_id == s.c.id)
        .where(g.c.submission_id.is_(None)),
        "slices": sa.select(s.c.id)
        .join(h, h.c.id == s.c.holdout_id)
        .where(
            sa.case((h.c.feedback_rows.is_(None), 0), else_=2) != slice_count
        ),
    }
    engine = sa.create_engine(url)
    try:
        with engine.connect() as conn:
            return {
                part: sorted(conn.execute(q.where(s.c.holdout_id.in_(holdout_ids))).scalars())
                for part, q in queries.items()
            }
    finally:
        engine.dispose()


def scrape_metrics(base: str, timeout: float = 10.0) -> list[tuple[str, dict[str, str], float]]:
    """Every sample of ``GET /metrics`` as (name, labels, value); [] when there is no such page."""
    from prometheus_client.parser import text_string_to_metric_families

    try:
        response = requests.get(f"{base}/metrics", timeout=timeout)
    except requests.RequestException:
        return []
    if response.status_code != 200 or not response.headers.get(
        "Content-Type", ""
    ).startswith("text/plain"):
        return []
    return [
        (sample.name, dict(sample.labels), float(sample.value))
        for family in text_string_to_metric_families(response.text)
        for sample in family.samples
    ]


def label_cache_counts(bases: Sequence[str]) -> tuple[float, float] | None:
    """(hits, misses) of the per-worker holdout label cache, summed over replicas.

    Read from each replica's ``/metrics`` (multiprocess mode sums its own workers): any
    counter whose name mentions the label cache, split by ``hit``/``miss`` in its name or
    in a label value. None when no replica exposes such a counter.
    """
    hits = misses = 0.0
    seen = False
    for base in bases:
        for name, labels, value in scrape_metrics(base):
            if "label_cache" not in name or name.endswith("_created"):
                continue
            words = name + " " + " ".join(labels.values())
            if re.search(r"\bhits?\b|_hits?\b", words):
                hits += value
                seen = True
            elif re.search(r"\bmiss(es)?\b|_miss(es)?\b", words):
                misses += value
                seen = True
    return (hits, misses) if seen else None


__all__ = [
    "Answer",
    "PostgresCluster",
    "PostgresUnavailable",
    "Replica",
    "RoundRobin",
    "incomplete_submissions",
    "label_cache_counts",
    "postgres_bindir",
    "prepare_database",
    "process_group_members",
    "run_bounded",
    "running_replicas",
    "scrape_metrics",
    "throwaway_postgres",
]
