"""gunicorn settings from the service's own settings table.

Use: ``gunicorn --config python:service.api.gunicorn_conf 'service:create_app()'``.
Command-line options given to gunicorn override these. The master refuses to start unless
the database is at this version's schema revision (``on_starting``; ``heldout db upgrade``
migrates), and each worker checks again as it boots on its own database engine (no
``preload_app``: a pooled connection must not cross a fork). Access
log lines carry the path without the query string, and never a body.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Any

# One BLAS/OpenMP thread per worker process (common practice for multi-process servers): the
# workers are the parallelism, and small BLAS calls in a busy multi-threaded pool stall the
# scoring core by an order of magnitude (measured with tests/perf/bench_binary.py). Set before
# anything imports numpy; an operator's explicit value wins.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

# prometheus-client's multiprocess mode (service/api/metrics.py): each worker writes its
# counters under this directory and /metrics sums them. A fresh directory per server start
# (removed at exit) unless the operator names one, whose stale files are removed at start.
_METRICS_DIR_MADE = not os.environ.get("PROMETHEUS_MULTIPROC_DIR")
if _METRICS_DIR_MADE:
    os.environ["PROMETHEUS_MULTIPROC_DIR"] = tempfile.mkdtemp(prefix="heldout-metrics-")

from service.api.logs import logconfig as _json_logconfig  # noqa: E402
from service.settings import load_settings  # noqa: E402

_settings = load_settings(os.environ)

bind = [_settings["BIND"]]
workers = _settings["WORKERS"]
timeout = _settings["TIMEOUT"]
preload_app = False
# Every line on stderr is one JSON object (service/api/logs.py); the service logs one line
# per request (method, URL rule, status, duration, request id), so gunicorn's access log is
# off.
accesslog = None
errorlog = "-"
logconfig_dict = _json_logconfig(_settings["LOG_LEVEL"])
# gunicorn's runtime control socket (one per user home by default) is not used: several
# instances on one machine would share its path.
control_socket_disable = True


_START_ATTEMPTS = 15
_START_PAUSE_SECONDS = 2.0


def on_starting(server: Any) -> None:
    """Refuse to start unless the database is at this version's schema revision.

    Runs once, in the master, before any worker forks. The database may still be starting
    (a compose stack): connection failures are retried for about 30 seconds, then the
    master exits so that the supervisor restarts it. A reachable database at another
    revision (or none) stops the master at once with ``SchemaVersionError``'s message, which
    names the revision found, the one expected and ``heldout db upgrade``. Nothing here
    creates or changes a table: migrating is ``heldout db upgrade``'s job.
    """
    from sqlalchemy.exc import OperationalError

    from service.store import Store
    from service.store.migrations import check_schema

    if not _METRICS_DIR_MADE:  # the operator's directory: last run's counts must not add up
        for stale in Path(os.environ["PROMETHEUS_MULTIPROC_DIR"]).glob("*.db"):
            stale.unlink()
    store = Store(_settings["DATABASE_URL"])
    try:
        for attempt in range(1, _START_ATTEMPTS + 1):
            try:
                revision = check_schema(store.engine)
                server.log.info("database schema at revision %s", revision)
                return
            except OperationalError as exc:
                if attempt == _START_ATTEMPTS:
                    raise
                server.log.warning(
                    "database not reachable (%s); retrying (%d/%d)",
                    type(exc.orig).__name__,
                    attempt,
                    _START_ATTEMPTS,
                )
                store.dispose()
                time.sleep(_START_PAUSE_SECONDS)
    finally:
        store.dispose()


def post_worker_init(worker: Any) -> None:
    """Check the schema revision again in each worker as it boots, on its own engine.

    A worker started later (after a crash) may find a database that another replica of a
    newer version has migrated meanwhile; it then fails to boot and gunicorn stops, rather
    than serving a schema it does not know. An unreachable database does not stop the
    worker: its requests answer 503 until the database is back.
    """
    from sqlalchemy.exc import OperationalError

    from service.api.app import get_store
    from service.store.migrations import check_schema

    try:
        check_schema(get_store(worker.wsgi).engine)
    except OperationalError as exc:
        worker.log.warning(
            "schema check skipped: database not reachable (%s)", type(exc.orig).__name__
        )


def child_exit(server: Any, worker: Any) -> None:
    """A worker ended: its live-gauge files stop counting (prometheus-client multiprocess)."""
    from prometheus_client import multiprocess

    multiprocess.mark_process_dead(worker.pid)


def on_exit(server: Any) -> None:
    """Remove the metrics directory this configuration made."""
    if _METRICS_DIR_MADE:
        shutil.rmtree(os.environ["PROMETHEUS_MULTIPROC_DIR"], ignore_errors=True)
