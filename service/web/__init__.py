"""Pages for people: sign in with a token, then read holdouts, standings, submissions and
sweeps as tables and charts (server-rendered Jinja templates, one stylesheet, no script).

``register_pages(app)`` installs the signed session cookie (``session``) and the pages'
blueprint (``pages``). What a page shows is what the API's JSON shows the same token.
"""

from __future__ import annotations

from flask import Flask

from . import session
from .pages import PAGE_CSP, bp


def register_pages(app: Flask) -> None:
    """Add the pages and their session to ``app`` (called by ``create_app``)."""
    session.configure(app)
    app.register_blueprint(bp)


__all__ = ["PAGE_CSP", "register_pages"]
