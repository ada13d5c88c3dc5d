"""The token roles, apart from the store so that client commands start without SQLAlchemy."""

from __future__ import annotations

ROLES = ("admin", "owner", "submitter")
"""Every role a token can have: ``admin`` manages tokens, ``owner`` registers holdouts and
sees every slice of their own, ``submitter`` submits for one group."""
