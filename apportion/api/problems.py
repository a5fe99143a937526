"""Every error leaves the service as RFC 9457 problem+json: domain errors, request validation,
unknown routes and methods, and unexpected exceptions (a 500 that shows no internals)."""

from __future__ import annotations

import json
import logging
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

from apportion.errors import ApportionError

log = logging.getLogger("apportion.errors")
PROBLEM = "application/problem+json"
TYPE_BASE = "https://apportion.invalid/problems/"


def problem_response(
    status: int,
    title: str,
    detail: str,
    slug: str,
    *,
    errors: list[dict[str, Any]] | None = None,
    request: Request | None = None,
    headers: dict[str, str] | None = None,
    **extra: Any,
) -> Response:
    body: dict[str, Any] = {
        "type": TYPE_BASE + slug,
        "title": title,
        "status": status,
        "detail": detail,
    }
    if errors:
        body["errors"] = errors
    body.update(extra)
    if request is not None:
        body["instance"] = request.url.path
        rid = getattr(request.state, "request_id", None)
        if rid:
            body["request_id"] = rid
    return Response(
        json.dumps(body, default=str), status_code=status, media_type=PROBLEM, headers=headers
    )


def _domain(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, ApportionError)
    headers = {"WWW-Authenticate": "Bearer"} if exc.status == 401 else None
    return problem_response(
        exc.status,
        exc.title,
        exc.detail,
        exc.slug,
        errors=exc.errors,
        request=request,
        headers=headers,
        **exc.extra,
    )


def _field_problem(e: dict[str, Any]) -> tuple[str, str]:
    """(field, problem) of one pydantic error, in words a client can act on."""
    loc = [str(p) for p in e.get("loc", ()) if p != "body"]
    msg = str(e.get("msg", "")).removeprefix("Value error, ")
    if e.get("type") == "json_invalid":  # FastAPI puts the character position in `loc`
        where = f" at character {loc[-1]}" if loc else ""
        return "body", f"invalid JSON{where}: {(e.get('ctx') or {}).get('error', msg)}"
    value = e.get("input")
    if e.get("type") == "string_pattern_mismatch" and isinstance(value, str) and "\x00" in value:
        msg = "text must not contain the NUL character"
    return ".".join(loc), msg


def _validation(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, RequestValidationError)
    errors = []
    for e in exc.errors():
        field, problem = _field_problem(e)
        errors.append({"field": field, "problem": problem, "type": e.get("type")})
    names = "; ".join(f"{e['field'] or 'body'} ({e['problem']})" for e in errors[:5])
    return problem_response(
        422,
        "Invalid request",
        f"the request does not match the schema: {names}",
        "invalid-request",
        errors=errors,
        request=request,
    )


_TITLES = {
    404: ("Not found", "not-found"),
    405: ("Method not allowed", "method-not-allowed"),
    401: ("Authentication required", "unauthenticated"),
    415: ("Unsupported media type", "unsupported-media-type"),
}


def _unparsable(cause: BaseException) -> str:
    """Why FastAPI could not parse a body (it raises a bare 400 with the cause chained)."""
    if isinstance(cause, RecursionError):
        return "the JSON body nests too deeply"
    if isinstance(cause, UnicodeDecodeError):
        return f"the body is not valid UTF-8 (byte {cause.object[cause.start : cause.start + 1]!r} at position {cause.start})"
    if isinstance(cause, ValueError) and "digits" in str(cause):
        return f"a number in the JSON body is too long ({cause})"
    return f"the body could not be parsed ({type(cause).__name__})"


def _http(request: Request, exc: Exception) -> Response:
    assert isinstance(exc, StarletteHTTPException)
    title, slug = _TITLES.get(exc.status_code, ("Error", "error"))
    detail = exc.detail if isinstance(exc.detail, str) else title
    if exc.status_code == 400 and exc.__cause__ is not None:
        title, slug, detail = "Unreadable body", "unreadable-body", _unparsable(exc.__cause__)
    if exc.status_code == 404 and detail == "Not Found":
        detail = f"no route matches {request.method} {request.url.path}"
    if exc.status_code == 405:
        detail = f"{request.method} is not allowed on {request.url.path}"
    return problem_response(
        exc.status_code, title, detail, slug, request=request, headers=getattr(exc, "headers", None)
    )


def _unexpected(request: Request, exc: Exception) -> Response:
    rid = getattr(request.state, "request_id", None)
    log.error("unexpected error", exc_info=exc, extra={"request_id": rid, "path": request.url.path})
    return problem_response(
        500,
        "Internal error",
        "an unexpected error occurred; quote the request id when reporting it",
        "internal",
        request=request,
    )


def install(app: FastAPI) -> None:
    app.add_exception_handler(ApportionError, _domain)
    app.add_exception_handler(RequestValidationError, _validation)
    app.add_exception_handler(StarletteHTTPException, _http)
    app.add_exception_handler(Exception, _unexpected)
