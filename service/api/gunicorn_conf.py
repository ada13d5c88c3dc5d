"""gunicorn settings from the service's own settings table.

Use: ``gunicorn --config python:service.api.gunicorn_conf 'service:create_app()'``.
Command-line options given to gunicorn override these. The master creates missing tables
once before forking workers (``on_starting``); each worker opens its own database engine on
its first request (no ``preload_app``: a pooled connection must not cross a fork). Access
log lines carry the path without the query string, and never a body.
"""

from __future__ import annotations

import os

from service.settings import load_settings

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


def on_starting(server: object) -> None:
    """Create missing tables once, in the master, then drop its connections."""
    from service.store import Store

    store = Store(_settings["DATABASE_URL"])
    try:
        store.init_schema()
    finally:
        store.dispose()
