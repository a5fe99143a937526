"""The OpenAPI document as the service really behaves: FastAPI's generated document, finished here.

FastAPI knows the routes, their parameters and bodies, but not how this service answers errors or
who may call what. `finish` adds, for every operation:
- `security`: the bearer API key (`securitySchemes.apiKey`) on every /v1 route;
- the problem+json answers it can give (RFC 9457, one `Problem` schema): 401 and 403 where a key is
  needed, 404 where a path names something, 409 on state changes, 413 and 415 where a body is sent,
  422 for every request that does not match the schema (FastAPI declares it as application/json
  with its own shape; the service sends problem+json), and 500 everywhere;
so that a client, or a schema fuzzer, can trust that every answer it gets is described."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from fastapi import FastAPI

from apportion.schemas.common import Problem

PROBLEM_TYPE = "application/problem+json"
# the problem document's schema, from its one model (nested parts land in the components too)
PROBLEM_SCHEMA: dict[str, Any] = Problem.model_json_schema(
    ref_template="#/components/schemas/{model}"
)
PROBLEM_PARTS: dict[str, Any] = PROBLEM_SCHEMA.pop("$defs", {})
SECURITY_SCHEME = {
    "type": "http",
    "scheme": "bearer",
    "description": "an API key as 'Authorization: Bearer <key>'; the role a route needs is in its summary or the README",
}
_DESCRIPTIONS = {
    "401": "no API key, or an unknown or revoked one",
    "403": "the key's role may not do this",
    "404": "nothing by that name or number",
    "409": "the state changed or forbids this transition",
    "413": "the body is larger than the configured limit",
    "415": "the body's content type is not one the route reads",
    "422": "the request does not match the schema, or its content is invalid",
    "500": "an unexpected error; the answer names the request id, never internals",
}
_MUTATING = {"post", "put", "patch", "delete"}


def _problem(code: str, description: str | None = None) -> dict[str, Any]:
    return {
        "description": description or _DESCRIPTIONS[code],
        "content": {PROBLEM_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}},
    }


def _codes(path: str, method: str, op: dict[str, Any]) -> list[str]:
    codes = ["500"]
    if path.startswith("/v1/"):
        codes += ["401", "403"]
    if "{" in path:
        codes.append("404")
    if method in _MUTATING and path.startswith("/v1/"):
        codes.append("409")
    if "requestBody" in op:
        codes.append("413")
        content = op["requestBody"].get("content", {})
        if set(content) - {"application/json"}:
            codes.append("415")
    if op.get("parameters") or "requestBody" in op:
        codes.append("422")
    return codes


def finish(doc: dict[str, Any]) -> dict[str, Any]:
    """Complete `doc` in place (see the module docstring) and return it."""
    components = doc.setdefault("components", {})
    schemas = components.setdefault("schemas", {})
    schemas["Problem"] = PROBLEM_SCHEMA
    schemas.update(PROBLEM_PARTS)
    components["securitySchemes"] = {"apiKey": SECURITY_SCHEME}
    for path, item in doc.get("paths", {}).items():
        for method, op in item.items():
            if not isinstance(op, dict) or "responses" not in op:
                continue
            if path.startswith("/v1/"):
                op["security"] = [{"apiKey": []}]
            responses = op["responses"]
            for code in _codes(path, method, op):
                kept = responses.get(code, {})
                responses[code] = _problem(code, kept.get("description") or None)
                if kept.get("description") in ("Validation Error", "Successful Response"):
                    responses[code]["description"] = _DESCRIPTIONS[code]
    # FastAPI's own validation schemas are no longer referenced: drop them
    for name in ("HTTPValidationError", "ValidationError"):
        schemas.pop(name, None)
    return doc


def install(app: FastAPI) -> None:
    """Make `app.openapi()` return the finished document (built once, then cached by FastAPI)."""
    generate: Callable[[], dict[str, Any]] = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            finish(generate())  # generate() caches its dict on the app; finish completes it
        return app.openapi_schema  # type: ignore[return-value]

    app.openapi = openapi  # type: ignore[method-assign]
