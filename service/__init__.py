"""Heldout: sealed held-out ground truth and the scoring of prediction submissions.

``service.scoring`` is the pure computation core; ``create_app`` builds the HTTP service.
Flask is imported only when an app is built, so the scoring core never pulls it in.
"""

from __future__ import annotations

from typing import Any


def create_app(config: dict[str, Any] | None = None) -> Any:
    """Build the Flask application (see ``service.api.app.create_app``)."""
    from .api.app import create_app as _create_app

    return _create_app(config)


__all__ = ["create_app"]
