"""gunicorn settings from the service's own settings table.

Use: ``gunicorn --config python:service.api.gunicorn_conf 'service:create_app()'``.
Command-line options given to gunicorn override these. The master creates missing tables
once before forking workers (``on_starting``); each worker opens its own database engine on
its first request (no ``preload_app``: a pooled connection must not cross a fork). Access
log lines carry the path without the query string, and never a body.
"""

from __future__ import annotations

import os
import time
from typing import Any

# One BLAS/OpenMP thread per worker process (common practice for multi-process servers): the
# workers are the parallelism, and small BLAS calls in a busy multi-threaded pool stall the
# scoring core by an order of magnitude (measured with tests/perf/bench_binary.py). Set before
# anything imports numpy; an operator's explicit value wins.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

from service.settings import load_settings  # noqa: E402

_settings = load_settings(os.environ)

bind = [_settings["BIND"]]
workers = _settings["WORKERS"]
timeout = _settings["TIMEOUT"]
preload_app = False
accesslog = "-"
errorlog = "-"
access_log_format = '%(h)s %(t)s "%(m)s %(U)s" %(s)s %(b)s %(M)sms'
# gunicorn's runtime control socket (one per user home by default) is not used: several
# instances on one machine would share its path.
control_socket_disable = True


_START_ATTEMPTS = 15
_START_PAUSE_SECONDS = 2.0


def on_starting(server: Any) -> None:
    """Create missing tables once, in the master, then drop its connections.

    The database may still be starting (a compose stack): retry for about 30 seconds, then
    give up so that the supervisor restarts the service.
    """
    from sqlalchemy.exc import OperationalError

    from service.store import Store

    store = Store(_settings["DATABASE_URL"])
    try:
        for attempt in range(1, _START_ATTEMPTS + 1):
            try:
                store.init_schema()
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
