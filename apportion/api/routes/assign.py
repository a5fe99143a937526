"""The lookup path: which arm for this member? Reads only the in-process registry and the in-memory
key cache: no database, no fit, no lock.

Other systems call it thousands of times a second, so the two assign routes are answered by
`LookupGateway`, a pure ASGI middleware in front of the FastAPI router: it authenticates from the
key cache, reads the body up to its configured limit (413 beyond), validates it with the
pydantic adapters below (the very schema the OpenAPI document shows: a member_id of 1 to 200
characters, features an object, at most 10,000 members; malformed JSON, lone surrogates and
nesting deeper than pydantic's JSON parser allows are 422), walks the compiled plan, counts the
answer, and sends ready bytes. It does not go through the shared request middleware: it keeps
its own request id and Prometheus counters and writes no log line per lookup (a 500 is logged
with its request id). The FastAPI routes below declare the same operations for the OpenAPI
document and answer with the same functions when the gateway is not in front.

`GET /v1/plans/{plan}/compiled` returns the live version as a portable document
(docs/compiled-plan.md) with an ETag, answering 304 to a matching If-None-Match.
"""

from __future__ import annotations

import itertools
import json
import logging
import secrets
import time
from itertools import repeat
from operator import itemgetter
from typing import Any

import numpy as np
from fastapi import APIRouter, Request
from fastapi.responses import Response
from pydantic import TypeAdapter, ValidationError

from apportion.errors import ApportionError, InvalidInput, NotFound, PayloadTooLarge
from apportion.observability import ASSIGNMENTS, LATENCY, REQUESTS
from apportion.schemas.assignments import (
    BATCH,
    SINGLE,
    AssignOut,
    BatchOut,
    CompiledPlanOut,
)
from apportion.usecases.auth import check_role
from apportion.usecases.live import portable_document

router = APIRouter(tags=["assignment"])
log = logging.getLogger("apportion.errors")
MAX_ERRORS = 20  # validation problems listed in one answer


def _inline(schema: dict[str, Any]) -> dict[str, Any]:
    """The adapter's JSON schema with its local `$defs` references inlined, so the operation's
    schema resolves inside the OpenAPI document (where `#/$defs/...` would point nowhere)."""
    defs = schema.pop("$defs", {})

    def walk(x: Any) -> Any:
        if isinstance(x, dict):
            ref = x.get("$ref")
            if isinstance(ref, str) and ref.startswith("#/$defs/"):
                return walk(dict(defs[ref[len("#/$defs/") :]]))
            return {k: walk(v) for k, v in x.items()}
        if isinstance(x, list):
            return [walk(v) for v in x]
        return x

    return walk(schema)


_PLAN_PARAMETER = {
    "in": "path",
    "name": "plan",
    "required": True,
    "schema": {"title": "Plan", "type": "string"},
}


def _openapi(adapter: TypeAdapter[Any]) -> dict[str, Any]:
    return {
        "parameters": [_PLAN_PARAMETER],
        "requestBody": {
            "required": True,
            "content": {"application/json": {"schema": _inline(adapter.json_schema())}},
        },
    }


_PROBLEM: dict[str, Any] = {"content": {"application/problem+json": {}}}
_RESPONSES: dict[int | str, dict[str, Any]] = {
    401: {"description": "no or unknown API key", **_PROBLEM},
    403: {"description": "the key's role may not read plans", **_PROBLEM},
    404: {"description": "no live version: use your fallback", **_PROBLEM},
    413: {"description": "the body is larger than the configured limit", **_PROBLEM},
    422: {"description": "the body does not match the schema", **_PROBLEM},
}

# ---- the core, shared by the gateway and the declared routes ---------------------------------
_JSON = b"application/json"
_PROBLEM_TYPE = b"application/problem+json"
# (plan, version, arm) -> the counter child; `labels()` costs more than the increment itself.
_COUNTERS: dict[tuple[str, int, str], Any] = {}
# id(answer) -> (answer, its JSON text, its JSON bytes, its arm's counter child). The compiled plan
# shares equal answers between calls (apportion/lookup.py and the batch path keep them), so each
# is encoded once; the entry holds the answer, so its id cannot be reused while it is cached.
_ENCODED: dict[int, tuple[Any, str, bytes, Any]] = {}
_MAX_CACHED = 65_536  # both caches are cleared when full (old plan versions drop out)


def _counter(plan: str, version: int, arm: str) -> Any:
    key = (plan, version, arm)
    child = _COUNTERS.get(key)
    if child is None:
        if len(_COUNTERS) >= _MAX_CACHED:
            _COUNTERS.clear()
        child = _COUNTERS[key] = ASSIGNMENTS.labels(plan, str(version), arm)
    return child


def _encoded(plan: str, a: Any) -> tuple[Any, str, bytes, Any]:
    hit = _ENCODED.get(id(a))
    if hit is None or hit[0] is not a:
        text = json.dumps(a.to_dict())
        if len(_ENCODED) >= _MAX_CACHED:
            _ENCODED.clear()
        hit = _ENCODED[id(a)] = (a, text, text.encode(), _counter(plan, a.plan_version, a.arm))
    return hit


def _compiled(services: Any, plan: str, header: str | None) -> Any:
    actor = services.keys.authenticate_cached(header)
    check_role(actor, "reader")
    compiled = services.plans.get(plan)
    if compiled is None:
        raise NotFound(f"plan '{plan}' has no live version; use your fallback")
    return compiled


def _invalid(exc: ValidationError) -> InvalidInput:
    """A pydantic error as our 422, naming the fields; never echoes the input (it may be big)."""
    errs = exc.errors(include_url=False, include_input=False, include_context=False)
    if errs and errs[0]["type"] == "json_invalid":
        msg = errs[0]["msg"]
        return InvalidInput(
            f"the body is not valid JSON: {msg}",
            errors=[{"field": "body", "problem": msg, "type": "json_invalid"}],
        )
    out = [
        {
            "field": ".".join(str(p) for p in e["loc"]) or "body",
            "problem": e["msg"],
            "type": e["type"],
        }
        for e in errs[:MAX_ERRORS]
    ]
    names = ", ".join(e["field"] for e in out[:5])
    more = f" (and {len(errs) - MAX_ERRORS} more)" if len(errs) > MAX_ERRORS else ""
    return InvalidInput(f"the body does not match the schema: {names}{more}", errors=out)


def _parse(adapter: TypeAdapter[Any], raw: bytes) -> Any:
    """The body validated against the documented schema, or our 422 naming the fields."""
    try:
        return adapter.validate_json(raw)
    except ValidationError as exc:
        raise _invalid(exc) from None


_member_id = itemgetter("member_id")
_EMPTY: dict[str, Any] = {}


def answer_single(services: Any, plan: str, header: str | None, raw: bytes) -> bytes:
    compiled = _compiled(services, plan, header)
    body = _parse(SINGLE, raw)
    hit = _encoded(plan, compiled.assign(body["member_id"], body.get("features", _EMPTY)))
    hit[3].inc()
    return hit[2]


def answer_batch(services: Any, plan: str, header: str | None, raw: bytes) -> bytes:
    compiled = _compiled(services, plan, header)
    items = _parse(BATCH, raw)["members"]
    ids = list(map(_member_id, items))
    feats = list(map(dict.get, items, repeat("features"), repeat(_EMPTY)))
    distinct, index = compiled.assign_batch_compact(ids, feats)
    hits = [_encoded(plan, a) for a in distinct]
    counts: dict[Any, int] = {}
    for hit, k in zip(hits, np.bincount(index, minlength=len(hits)).tolist(), strict=True):
        counts[hit[3]] = counts.get(hit[3], 0) + k
    for child, k in counts.items():
        child.inc(k)
    # each distinct answer is encoded once; the body is byte for byte what
    # json.dumps({"assignments": [a.to_dict() for a in out]}) gives
    parts = np.empty(len(hits), dtype=object)
    parts[:] = [h[1] for h in hits]
    return ('{"assignments": [' + ", ".join(parts.take(index).tolist()) + "]}").encode()


def problem_bytes(exc: ApportionError, path: str, rid: str) -> bytes:
    body: dict[str, Any] = {
        "type": "https://apportion.invalid/problems/" + exc.slug,
        "title": exc.title,
        "status": exc.status,
        "detail": exc.detail,
    }
    if exc.errors:
        body["errors"] = exc.errors
    body.update(exc.extra)
    body["instance"] = path
    body["request_id"] = rid
    return json.dumps(body, default=str).encode()


# ---- the gateway ---------------------------------------------------------------------------
_SINGLE_ROUTE = "/v1/plans/{plan}/assign"
_BATCH_ROUTE = "/v1/plans/{plan}/assign/batch"
_METRICS: dict[tuple[str, int], tuple[Any, Any]] = {}


def _metrics(route: str, status: int) -> tuple[Any, Any]:
    m = _METRICS.get((route, status))
    if m is None:
        m = _METRICS[(route, status)] = (
            REQUESTS.labels(route, "POST", str(status)),
            LATENCY.labels(route),
        )
    return m


class _Disconnected(Exception):
    pass


class LookupGateway:
    """Pure ASGI front answering `POST /v1/plans/{plan}/assign[/batch]` (see the module
    docstring); every other request (and the lifespan) passes to `app` untouched. `create_app`
    puts it in front of FastAPI's own per-request work."""

    def __init__(self, app: Any, services: Any) -> None:
        self.app = app
        self.services = services
        # request ids: a random per-process prefix and a counter (unique, and cheaper than a
        # random draw per request; ids need not be secret)
        self._rid_prefix = secrets.token_hex(6) + "-"
        self._rid_next = itertools.count(1).__next__

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] == "http" and scope["method"] == "POST":
            path: str = scope["path"]
            if path.startswith("/v1/plans/"):
                if path.endswith("/assign"):
                    plan, batch = path[10:-7], False
                elif path.endswith("/assign/batch"):
                    plan, batch = path[10:-13], True
                else:
                    plan = ""
                if plan and "/" not in plan:
                    await self._lookup(scope, receive, send, plan, batch)
                    return
        await self.app(scope, receive, send)

    async def _lookup(
        self, scope: dict[str, Any], receive: Any, send: Any, plan: str, batch: bool
    ) -> None:
        start = time.perf_counter()
        header = rid = length = None
        for k, v in scope["headers"]:
            if k == b"authorization":
                header = v.decode("latin-1")
            elif k == b"x-request-id":
                rid = v.decode("latin-1")[:100]
            elif k == b"content-length":
                length = v
        rid = rid or f"{self._rid_prefix}{self._rid_next():x}"
        services = self.services
        settings = services.settings
        route = _BATCH_ROUTE if batch else _SINGLE_ROUTE
        extra: list[tuple[bytes, bytes]] = []
        try:
            limit = settings.max_assign_batch_bytes if batch else settings.max_assign_bytes
            raw = await _read(receive, length, limit)
            body = (answer_batch if batch else answer_single)(services, plan, header, raw)
            status, ctype = 200, _JSON
        except _Disconnected:
            return
        except ApportionError as exc:
            status, ctype = exc.status, _PROBLEM_TYPE
            body = problem_bytes(exc, scope["path"], rid)
            if status == 401:
                extra.append((b"www-authenticate", b"Bearer"))
        except Exception as exc:  # a 500 without internals, logged with the request id
            log.error("unexpected error", exc_info=exc, extra={"request_id": rid, "path": route})
            status, ctype = 500, _PROBLEM_TYPE
            err = ApportionError(
                "an unexpected error occurred; quote the request id when reporting it"
            )
            body = problem_bytes(err, scope["path"], rid)
        await send(
            {
                "type": "http.response.start",
                "status": status,
                "headers": [
                    (b"content-length", str(len(body)).encode()),
                    (b"content-type", ctype),
                    (b"x-request-id", rid.encode("latin-1")),
                    *extra,
                ],
            }
        )
        await send({"type": "http.response.body", "body": body})
        count, latency = _metrics(route, status)
        count.inc()
        latency.observe(time.perf_counter() - start)


async def _read(receive: Any, declared: bytes | None, limit: int) -> bytes:
    """The body, refused with 413 once it is (or says it will be) longer than `limit`."""
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(
            f"the body is {int(declared)} bytes; the limit for this route is {limit} bytes"
        )
    chunks: list[bytes] = []
    size = 0
    while True:
        message = await receive()
        if message["type"] == "http.request":
            chunk = message.get("body", b"")
            size += len(chunk)
            if size > limit:
                raise PayloadTooLarge(f"the body exceeds this route's limit of {limit} bytes")
            chunks.append(chunk)
            if not message.get("more_body", False):
                return chunks[0] if len(chunks) == 1 else b"".join(chunks)
        elif message["type"] == "http.disconnect":
            raise _Disconnected()


# ---- the declared operations (the OpenAPI document; the gateway answers in front of them) ----
async def _declared(request: Request, batch: bool) -> Response:
    services = request.app.state.services
    s = services.settings
    limit = s.max_assign_batch_bytes if batch else s.max_assign_bytes
    try:
        raw = await _read(
            request.receive, request.headers.get("content-length", "").encode() or None, limit
        )
    except _Disconnected:
        return Response(status_code=400)
    header = request.headers.get("authorization")
    fn = answer_batch if batch else answer_single
    return Response(
        fn(services, request.path_params["plan"], header, raw), media_type="application/json"
    )


@router.post(
    _SINGLE_ROUTE,
    summary="Assign one member",
    response_model=AssignOut,
    openapi_extra=_openapi(SINGLE),
    responses=_RESPONSES,
)
async def assign(request: Request) -> Response:
    return await _declared(request, batch=False)


@router.post(
    _BATCH_ROUTE,
    summary="Assign up to 10,000 members in one call",
    response_model=BatchOut,
    openapi_extra=_openapi(BATCH),
    responses=_RESPONSES,
)
async def assign_batch(request: Request) -> Response:
    return await _declared(request, batch=True)


@router.get(
    "/v1/plans/{plan}/compiled",
    summary="The live version as a portable compiled plan (ETag; 304 on If-None-Match)",
    response_model=CompiledPlanOut,
    responses={
        304: {"description": "unchanged since the ETag sent in If-None-Match"},
        401: _RESPONSES[401],
        403: _RESPONSES[403],
        404: _RESPONSES[404],
    },
)
async def compiled_plan(request: Request, plan: str) -> Response:
    services = request.app.state.services
    compiled = _compiled(services, plan, request.headers.get("authorization"))
    body, content_hash = portable_document(compiled)
    etag = f'"{content_hash}"'
    headers = {"ETag": etag, "Cache-Control": "no-cache"}
    sent = request.headers.get("if-none-match")
    if sent is not None:
        tags = {t.strip().removeprefix("W/") for t in sent.split(",")}
        if etag in tags or "*" in tags:
            return Response(status_code=304, headers=headers)
    return Response(body, media_type="application/json", headers=headers)
