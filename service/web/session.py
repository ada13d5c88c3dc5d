"""The pages' sign-in session and CSRF tokens.

A person signs in by pasting an API token into a POST form. The token is checked once
(``Store.authenticate``) and never kept: the session cookie, signed with
``HELDOUT_SECRET_KEY`` (Flask's ``SecureCookieSessionInterface``), holds the token's id, a
check value ``HMAC-SHA256(secret key, stored token hash)``, the time of sign-in and a CSRF
token. Every page request reloads the token by id and recomputes the check, so revoking the
token (``heldout tokens revoke``) ends its sessions at once, and a forged cookie needs both
the secret key and the stored hash. Sessions also end ``SESSION_HOURS`` after sign-in.

The cookie is ``HttpOnly``, ``SameSite=Strict``, and ``Secure`` whenever the request came
over HTTPS. Forms carry the session's CSRF token (a hidden field compared in constant time)
and are refused when an ``Origin`` header names another site.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import time
from typing import Any

import sqlalchemy as sa
from flask import Flask, current_app, request, session
from flask.sessions import SecureCookieSessionInterface

from service.api.auth import Principal, get_store
from service.store import TokenRecord, schema

COOKIE_NAME = "heldout_session"
SESSION_HOURS = 12
CSRF_FIELD = "csrf_token"


class SessionInterface(SecureCookieSessionInterface):
    """Flask's signed-cookie session, marked ``Secure`` when the request used HTTPS."""

    def get_cookie_secure(self, app: Flask) -> bool:
        return bool(request.is_secure or super().get_cookie_secure(app))


def configure(app: Flask) -> None:
    """Cookie flags of the pages' session (the key is ``SECRET_KEY``, from the settings)."""
    app.session_interface = SessionInterface()
    app.config.update(
        SESSION_COOKIE_NAME=COOKIE_NAME,
        SESSION_COOKIE_HTTPONLY=True,
        SESSION_COOKIE_SAMESITE="Strict",
        SESSION_COOKIE_PATH="/",
    )


def sign_in_enabled() -> bool:
    """Whether a secret key is set (without one no session can be signed)."""
    return bool(current_app.config.get("SECRET_KEY"))


def _check_value(token_hash: str) -> str:
    key = str(current_app.config["SECRET_KEY"]).encode("utf-8")
    return hmac.new(key, token_hash.encode("ascii"), hashlib.sha256).hexdigest()


def _token_by_id(token_id: str) -> tuple[TokenRecord, str] | None:
    """The live token with this id and its stored hash, or None (revoked or unknown)."""
    t = schema.tokens
    with get_store().engine.connect() as conn:
        row = conn.execute(sa.select(t).where(t.c.id == token_id, t.c.revoked_at.is_(None))).first()
    if row is None:
        return None
    record = TokenRecord(
        row.id, row.role, row.group_name, row.label, row.created_at, row.revoked_at
    )
    return record, row.token_hash


def csrf_token() -> str:
    """This session's CSRF token (made on first use)."""
    token = session.get("csrf")
    if not isinstance(token, str):
        token = secrets.token_urlsafe(32)
        session["csrf"] = token
    return token


def csrf_valid() -> bool:
    """The form's CSRF token matches the session's, and no foreign ``Origin`` sent it."""
    origin = request.headers.get("Origin")
    if origin is not None and origin != request.host_url.rstrip("/"):
        return False
    expected = session.get("csrf")
    given = request.form.get(CSRF_FIELD, "")
    return isinstance(expected, str) and hmac.compare_digest(expected, given)


def sign_in(secret: str) -> Principal | None:
    """Check an API token; on success start a fresh session for it (the token is not kept)."""
    token = get_store().authenticate(secret.strip()) if secret.strip() else None
    if token is None:
        return None
    found = _token_by_id(token.id)
    if found is None:
        return None
    session.clear()
    session["tid"] = token.id
    session["chk"] = _check_value(found[1])
    session["iat"] = int(time.time())
    session["csrf"] = secrets.token_urlsafe(32)
    return Principal(token)


def sign_out() -> None:
    session.clear()


def session_principal() -> Principal | None:
    """The principal of this request's session, or None (no, expired or revoked session)."""
    if not sign_in_enabled():
        return None
    token_id: Any = session.get("tid")
    check: Any = session.get("chk")
    issued: Any = session.get("iat")
    if not (isinstance(token_id, str) and isinstance(check, str) and isinstance(issued, int)):
        return None
    if time.time() - issued > SESSION_HOURS * 3600:
        session.clear()
        return None
    found = _token_by_id(token_id)
    if found is None or not hmac.compare_digest(check, _check_value(found[1])):
        session.clear()
        return None
    return Principal(found[0])


__all__ = [
    "COOKIE_NAME",
    "CSRF_FIELD",
    "SESSION_HOURS",
    "configure",
    "csrf_token",
    "csrf_valid",
    "session_principal",
    "sign_in",
    "sign_in_enabled",
    "sign_out",
]
