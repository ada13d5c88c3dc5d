"""The OpenAPI 3.1 document, generated from the views and the marshmallow schemas.

Each view declares its contract with ``@operation(...)`` (summary, body and query schemas,
success response); ``requires(...)`` adds the roles. ``build_spec`` walks the app's URL map,
so a route that exists is documented and a documented route exists. ``heldout openapi``
writes the result to ``openapi/openapi.yaml``, which a test compares with this output.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping
from importlib import metadata
from typing import Any, TypeVar

import yaml
from apispec import APISpec
from apispec.ext.marshmallow import MarshmallowPlugin
from flask import Flask

from . import schemas
from .errors import PROBLEM_MEDIA_TYPE, ProblemBody

F = TypeVar("F", bound=Callable[..., Any])

OPENAPI_VERSION = "3.1.0"
_ATTRIBUTE = "__heldout_operation__"

_STATUS_TEXT = {
    200: "OK",
    201: "Created",
    303: "See Other (the pages' redirects)",
    400: "Malformed request",
    401: "No token, or an unknown or revoked one",
    403: "The token's role may not do this",
    404: "No such object, or not one this token may see",
    406: "No representation matches Accept",
    409: "Conflicts with stored state",
    413: "Body larger than HELDOUT_MAX_BODY_BYTES",
    415: "Unsupported Content-Type or Content-Encoding",
    422: "Well-formed but invalid content; errors names each field",
    429: "Quota used up; Retry-After gives the seconds until it renews",
    503: "Database unreachable",
}

_PATH_PARAMETERS = {
    "holdout_id": "Holdout id, as returned at registration (ho_...).",
    "submission_id": "Submission id (sub_...).",
    "name": "Sweep name, as given in the submissions' sweep.name.",
}

DESCRIPTION = """\
Holds held-out ground truth under seal and scores prediction submissions: error metrics with
confidence intervals, bias and variance across seeds, overfitting flags.

Authenticate with `Authorization: Bearer <token>` (tokens come from `heldout tokens create`).
Roles: `admin` (everything owners can do, for every owner), `owner` (registers holdouts and
sees their submissions; an owner token with a group shares its holdouts with the group's
other owner tokens), `submitter` (one group; submits to the holdouts its group may use and
sees its own group's submissions). Objects a token may not see answer 404.

Every error is an RFC 9457 problem (`application/problem+json`) with `errors`, one entry per
bad field: `{field, message, count, examples}`. No response contains a label, a per-row loss
or a per-row residual.
"""


def operation(
    *,
    summary: str,
    tag: str,
    description: str = "",
    body: Mapping[str, Any] | None = None,
    query: type[schemas.Schema] | None = None,
    response: tuple[int, Any] = (200, None),
    alternatives: Mapping[int, tuple[str, Any]] | None = None,
    errors: tuple[int, ...] = (),
    headers: tuple[Mapping[str, Any], ...] = (),
    response_headers: Mapping[str, Mapping[str, Any]] | None = None,
) -> Callable[[F], F]:
    """Attach the OpenAPI description of one view.

    ``body`` maps media types to a schema class (or a raw schema dict); ``response`` is the
    success status and its schema class, or a mapping of media type to schema for content
    negotiation; ``alternatives`` other success statuses as (description, schema), e.g.
    200 for an idempotent repeat; ``errors`` the problem statuses besides the 401/403 that
    ``requires`` implies; ``headers`` request header parameters (OpenAPI Parameter objects
    without ``in``); ``response_headers`` the success response's headers (Header objects).
    """

    def decorate(view: F) -> F:
        setattr(
            view,
            _ATTRIBUTE,
            {
                "summary": summary,
                "tag": tag,
                "description": description,
                "body": body,
                "query": query,
                "response": response,
                "alternatives": dict(alternatives or {}),
                "errors": errors,
                "headers": tuple(headers),
                "response_headers": dict(response_headers or {}),
            },
        )
        return view

    return decorate


def _content(value: Any) -> dict[str, Any]:
    if isinstance(value, Mapping):
        return {media: {"schema": schema} for media, schema in value.items()}
    return {"application/json": {"schema": value}}


def _version() -> str:
    try:
        return metadata.version("heldout")
    except metadata.PackageNotFoundError:  # pragma: no cover - running from a bare checkout
        return "0.0.0"


def build_spec(app: Flask) -> dict[str, Any]:
    """The OpenAPI 3.1 document of ``app`` as a dict (deterministic order)."""
    marshmallow_plugin = MarshmallowPlugin()
    spec = APISpec(
        title="Heldout",
        version=_version(),
        openapi_version=OPENAPI_VERSION,
        plugins=[marshmallow_plugin],
        info={"description": DESCRIPTION},
    )
    marshmallow_plugin.map_to_openapi_type(schemas.JsonArray, "array", None)
    spec.components.security_scheme(
        "bearerAuth", {"type": "http", "scheme": "bearer", "description": "hdt_... token"}
    )
    spec.components.schema("Problem", schema=ProblemBody)
    for status, text in _STATUS_TEXT.items():
        if status >= 400:
            spec.components.response(
                f"Problem{status}",
                {"description": text, "content": {PROBLEM_MEDIA_TYPE: {"schema": ProblemBody}}},
            )

    tags: dict[str, None] = {}
    rules = sorted(app.url_map.iter_rules(), key=lambda r: (r.rule, r.endpoint))
    paths: dict[str, dict[str, Any]] = {}
    for rule in rules:
        view = app.view_functions.get(rule.endpoint)
        doc = getattr(view, _ATTRIBUTE, None)
        if doc is None:
            continue
        roles = getattr(view, "roles", None)
        path = re.sub(r"<(?:[a-z]+:)?([a-z_]+)>", r"{\1}", rule.rule)
        parameters: list[dict[str, Any]] = [
            {
                "in": "path",
                "name": name,
                "required": True,
                "schema": {"type": "string"},
                "description": _PATH_PARAMETERS[name],
            }
            for name in sorted(rule.arguments)
        ]
        if doc["query"] is not None:
            parameters.append({"in": "query", "schema": doc["query"]})
        parameters.extend({"in": "header", **header} for header in doc["headers"])
        status, response_schema = doc["response"]
        responses: dict[str, Any] = {
            str(status): {"description": _STATUS_TEXT[status], "content": _content(response_schema)}
        }
        if doc["response_headers"]:
            responses[str(status)]["headers"] = doc["response_headers"]
        for alt_status, (alt_text, alt_schema) in doc["alternatives"].items():
            responses[str(alt_status)] = {
                "description": alt_text,
                "content": _content(alt_schema),
            }
        error_statuses = set(doc["errors"])
        if roles:
            error_statuses |= {401, 403} if set(roles) != {"admin", "owner", "submitter"} else {401}
        for error_status in sorted(error_statuses):
            responses[str(error_status)] = f"Problem{error_status}"
        roles_text = f"\n\nRoles: {', '.join(roles)}." if roles else ""
        description = (doc["description"] + roles_text).strip()
        op: dict[str, Any] = {
            "operationId": rule.endpoint.replace(".", "_"),
            "summary": doc["summary"],
            "tags": [doc["tag"]],
            "security": [{"bearerAuth": []}] if roles else [],
            "parameters": parameters,
            "responses": responses,
        }
        if description:
            op["description"] = description
        if doc["body"] is not None:
            op["requestBody"] = {"required": True, "content": _content(doc["body"])}
        if not parameters:
            del op["parameters"]
        tags[doc["tag"]] = None
        methods = sorted(m for m in rule.methods or () if m not in {"HEAD", "OPTIONS"})
        for method in methods:
            paths.setdefault(path, {})[method.lower()] = op
    for tag in tags:
        spec.tag({"name": tag})
    for path in sorted(paths):
        spec.path(path=path, operations=paths[path])
    document = spec.to_dict()
    order = ("openapi", "info", "tags", "paths", "components")
    return {key: document[key] for key in order if key in document} | {
        key: value for key, value in document.items() if key not in order
    }


class _Dumper(yaml.SafeDumper):
    """Block style for multi-line text, and no anchors or aliases for shared objects."""

    def ignore_aliases(self, data: Any) -> bool:
        return True


def _text(dumper: yaml.SafeDumper, value: str) -> yaml.ScalarNode:
    style = "|" if "\n" in value else None
    return dumper.represent_scalar("tag:yaml.org,2002:str", value, style=style)


_Dumper.add_representer(str, _text)


def spec_yaml(app: Flask) -> str:
    """The document as YAML, the form committed in ``openapi/openapi.yaml``."""
    return yaml.dump(
        build_spec(app), Dumper=_Dumper, sort_keys=False, allow_unicode=True, width=100
    )


__all__ = ["OPENAPI_VERSION", "build_spec", "operation", "spec_yaml"]
