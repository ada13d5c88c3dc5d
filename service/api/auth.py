"""Bearer tokens (RFC 6750), roles, and who may see which object.

Roles:

- ``admin``: everything an owner can do, for every owner's holdouts; cannot submit.
- ``owner``: registers holdouts and sees them with all their submissions. An owner token's
  identity is its group when it has one (``group:<name>``), otherwise the token itself
  (``token:<id>``); two owner tokens of the same group share their holdouts.
- ``submitter``: belongs to one group; sees the holdouts whose policy admits its group (all
  when ``policy.groups`` is absent) and submits to them; sees its own group's submissions.

No token or an unknown/revoked one: 401 with ``WWW-Authenticate: Bearer``. A role that may
not call the endpoint: 403. An object the caller may not see: 404, exactly as if it did not
exist.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar, cast

from flask import current_app, g, request

from service.store import HoldoutRecord, Store, SubmissionRecord, TokenRecord

from .errors import Forbidden, NotFound, Unauthorized

F = TypeVar("F", bound=Callable[..., Any])

REALM = 'Bearer realm="heldout"'
_MAX_TOKEN_LENGTH = 200


@dataclass(frozen=True)
class Principal:
    """The authenticated caller."""

    token: TokenRecord

    @property
    def role(self) -> str:
        return self.token.role

    @property
    def group(self) -> str | None:
        return self.token.group

    @property
    def owner(self) -> str:
        return self.token.owner_identity


def get_store() -> Store:
    return cast(Store, current_app.extensions["heldout_store"])


def _bearer_token() -> str:
    header = request.headers.get("Authorization")
    if not header:
        raise Unauthorized(
            "Send a token: 'Authorization: Bearer <token>'.", headers={"WWW-Authenticate": REALM}
        )
    scheme, _, credentials = header.partition(" ")
    credentials = credentials.strip()
    if scheme.lower() != "bearer" or not credentials or len(credentials) > _MAX_TOKEN_LENGTH:
        raise Unauthorized(
            "The Authorization header must be 'Bearer <token>'.",
            headers={"WWW-Authenticate": f'{REALM}, error="invalid_request"'},
        )
    return credentials


def authenticate() -> Principal:
    """The caller of this request, or 401."""
    token = get_store().authenticate(_bearer_token())
    if token is None:
        raise Unauthorized(
            "The token is unknown or has been revoked.",
            headers={"WWW-Authenticate": f'{REALM}, error="invalid_token"'},
        )
    return Principal(token)


def current_principal() -> Principal:
    return cast(Principal, g.principal)


def requires(*roles: str) -> Callable[[F], F]:
    """Authenticate the caller, then allow only ``roles`` (403 for the others)."""

    def decorate(view: F) -> F:
        @functools.wraps(view)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            principal = authenticate()
            if principal.role not in roles:
                raise Forbidden(
                    f"This needs a token with role {' or '.join(roles)}; "
                    f"yours has role {principal.role}."
                )
            g.principal = principal
            return view(*args, **kwargs)

        wrapper.roles = roles  # type: ignore[attr-defined]  (read by the OpenAPI builder)
        return cast(F, wrapper)

    return decorate


def may_see_holdout(principal: Principal, holdout: HoldoutRecord) -> bool:
    if principal.role == "admin":
        return True
    if principal.role == "owner":
        return holdout.owner == principal.owner
    groups = holdout.policy.get("groups")
    return groups is None or principal.group in groups


def visible_holdout(principal: Principal, holdout_id: str) -> HoldoutRecord:
    """The holdout if the caller may see it, else 404 (whether or not it exists)."""
    holdout = get_store().get_holdout(holdout_id)
    if holdout is None or not may_see_holdout(principal, holdout):
        raise NotFound(f"No holdout {holdout_id!r} is visible to this token.")
    return holdout


def visible_submission(
    principal: Principal, submission_id: str
) -> tuple[SubmissionRecord, HoldoutRecord]:
    """The submission and its holdout if the caller may see them, else 404."""
    store = get_store()
    submission = store.get_submission(submission_id)
    holdout = None if submission is None else store.get_holdout(submission.holdout_id)
    visible = (
        submission is not None
        and holdout is not None
        and may_see_holdout(principal, holdout)
        and (principal.role != "submitter" or submission.group == principal.group)
    )
    if not visible:
        raise NotFound(f"No submission {submission_id!r} is visible to this token.")
    assert submission is not None and holdout is not None
    return submission, holdout


__all__ = [
    "Principal",
    "authenticate",
    "current_principal",
    "get_store",
    "may_see_holdout",
    "requires",
    "visible_holdout",
    "visible_submission",
]
