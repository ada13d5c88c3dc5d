"""The application factory."""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping
from typing import Any

from flask import Flask, Response

from service.settings import load_settings
from service.store import Store


def create_app(config: Mapping[str, Any] | None = None) -> Flask:
    """Build the Flask app: defaults, then ``HELDOUT_*`` variables, then ``config``.

    ``config`` keys are the settings' keys without the prefix (``DATABASE_URL``) and any
    Flask setting (``TESTING``). Nothing connects here: the store opens its engine on the
    first request of each process.
    """
    app = Flask(__name__)
    settings = load_settings(os.environ, config)
    app.config.from_mapping(settings)
    app.config["MAX_CONTENT_LENGTH"] = settings["MAX_BODY_BYTES"]
    logger = logging.getLogger("heldout")
    logger.setLevel(settings["LOG_LEVEL"])
    gunicorn_errors = logging.getLogger("gunicorn.error")
    if gunicorn_errors.handlers and not logger.handlers:
        # Under gunicorn, the service's log lines go to gunicorn's error log.
        logger.handlers = list(gunicorn_errors.handlers)
        logger.propagate = False

    app.extensions["heldout_store"] = Store(
        settings["DATABASE_URL"], label_cache_size=settings["LABEL_CACHE_SIZE"]
    )

    from . import docs, guarding, health, holdouts, submissions, timing
    from .errors import register_error_handlers

    register_error_handlers(app)
    timing.install(app)
    from . import logs, metrics

    logs.install(app)  # request ids and one JSON log line per request
    metrics.install(app, app.extensions["heldout_store"])  # GET /metrics
    for module in (health, holdouts, submissions, guarding, docs):
        app.register_blueprint(module.bp)
    from service.web import register_pages

    from . import charts

    app.register_blueprint(charts.bp)
    register_pages(app)  # the pages for people (service/web): sign-in session, CSP

    @app.after_request
    def _security_headers(response: Response) -> Response:
        # Scores and ids are for the token holder only: no shared cache may keep them.
        response.headers.setdefault("Cache-Control", "no-store")
        response.headers.setdefault("X-Content-Type-Options", "nosniff")
        return response

    return app


def get_store(app: Flask) -> Store:
    """The app's store (tests and the CLI use it outside a request)."""
    store = app.extensions["heldout_store"]
    assert isinstance(store, Store)
    return store


__all__ = ["create_app", "get_store"]
