"""The lookup path: which arm for this member? Reads only the in-process registry and the in-memory
key cache: no database, no fit, no lock. Written as plain `async def` handlers on the raw request
(no threadpool hop, no response-model validation) because other systems call it thousands of times
a second; the request schema is still declared for the OpenAPI document."""

from __future__ import annotations

import json
from itertools import repeat
from typing import Any

import numpy as np
from fastapi import APIRouter, Request
from fastapi.responses import Response
from pydantic import BaseModel, Field
from starlette.requests import ClientDisconnect

from service.errors import InvalidInput, NotFound
from service.observability import ASSIGNMENTS
from service.usecases.auth import check_role

router = APIRouter(tags=["assignment"])
MAX_BATCH = 10_000


class AssignIn(BaseModel):
    member_id: str = Field(min_length=1, max_length=200)
    features: dict[str, Any] = Field(default_factory=dict)


class AssignOut(BaseModel):
    arm: str
    cohort: int
    plan_version: int
    holdout: bool
    defaults_used: list[str]


class BatchIn(BaseModel):
    members: list[AssignIn] = Field(max_length=MAX_BATCH)


class BatchOut(BaseModel):
    assignments: list[AssignOut]


# `plan` is read from request.path_params (a declared path parameter costs FastAPI a validation
# pass per request); the OpenAPI document still describes it, as FastAPI would.
_PLAN_PARAMETER = {
    "in": "path",
    "name": "plan",
    "required": True,
    "schema": {"title": "Plan", "type": "string"},
}
_VALIDATION_RESPONSE = {
    "description": "Validation Error",
    "content": {
        "application/json": {"schema": {"$ref": "#/components/schemas/HTTPValidationError"}}
    },
}


def _openapi(model: type[BaseModel]) -> dict[str, Any]:
    return {
        "parameters": [_PLAN_PARAMETER],
        "requestBody": {
            "required": True,
            "content": {"application/json": {"schema": model.model_json_schema()}},
        },
        "responses": {"422": _VALIDATION_RESPONSE},
    }


_JSON_HEADER = (b"content-type", b"application/json")


class _JsonBytes(Response):
    """A 200 JSON response from ready bytes, skipping Response's header building."""

    def __init__(self, body: bytes) -> None:
        self.status_code = 200
        self.background = None
        self.body = body
        self.raw_headers = [(b"content-length", str(len(body)).encode("latin-1")), _JSON_HEADER]


# (plan, version, arm) -> the counter child; `labels()` costs more than the increment itself.
_COUNTERS: dict[tuple[str, int, str], Any] = {}
# (plan, version, arm, cohort, holdout, defaults) -> (JSON body, counter child) for single lookups.
_ANSWERS: dict[tuple[Any, ...], tuple[bytes, Any]] = {}
_MAX_CACHED = 65_536  # both caches are cleared when full (old plan versions drop out)


def _counter(plan: str, version: int, arm: str) -> Any:
    key = (plan, version, arm)
    child = _COUNTERS.get(key)
    if child is None:
        if len(_COUNTERS) >= _MAX_CACHED:
            _COUNTERS.clear()
        child = _COUNTERS[key] = ASSIGNMENTS.labels(plan, str(version), arm)
    return child


async def _body(request: Request) -> bytes:
    """The request body, read straight from the ASGI receive channel (what `request.body()`
    does, without its async generator); kept on the request so a later `body()` still works."""
    receive = request.receive
    chunks: list[bytes] = []
    while True:
        message = await receive()
        if message["type"] == "http.request":
            chunks.append(message.get("body", b""))
            if not message.get("more_body", False):
                break
        elif message["type"] == "http.disconnect":
            raise ClientDisconnect()
    raw = chunks[0] if len(chunks) == 1 else b"".join(chunks)
    request._body = raw  # Starlette's own cache of the body
    return raw


async def _json(request: Request) -> Any:
    raw = await _body(request)
    try:
        return json.loads(raw)
    except ValueError as exc:
        raise InvalidInput(
            f"the body is not valid JSON: {exc}",
            errors=[{"field": "body", "problem": "invalid JSON"}],
        ) from exc


def _compiled(request: Request, plan: str) -> Any:
    scope = request.scope
    header = None
    for k, v in scope["headers"]:  # what request.headers.get does, without building Headers
        if k == b"authorization":
            header = v.decode("latin-1")
            break
    services = scope["app"].state.services
    actor = services.keys.authenticate_cached(header)
    check_role(actor, "reader")
    compiled = services.plans.get(plan)
    if compiled is None:
        raise NotFound(f"plan '{plan}' has no live version; use your fallback")
    return compiled


def _member(item: Any, where: str) -> tuple[str, dict[str, Any]]:
    if not isinstance(item, dict):
        raise InvalidInput(
            f"{where} must be an object with member_id and features", errors=[{"field": where}]
        )
    member = item.get("member_id")
    features = item.get("features", {})
    if not isinstance(member, str | int) or isinstance(member, bool) or member == "":
        raise InvalidInput(
            f"{where}.member_id must be a non-empty string",
            errors=[{"field": f"{where}.member_id"}],
        )
    if not isinstance(features, dict):
        raise InvalidInput(
            f"{where}.features must be an object", errors=[{"field": f"{where}.features"}]
        )
    return str(member), features


_ABSENT = object()


def _members(items: list[Any]) -> tuple[list[str], list[dict[str, Any]]]:
    """Ids and feature objects of a batch, checked as `_member` checks each item: whole-list
    type checks first, and the item-by-item loop only to name the first bad item."""
    n = len(items)
    if set(map(type, items)) <= {dict}:
        ids = list(map(dict.get, items, repeat("member_id", n)))
        feats = list(map(dict.get, items, repeat("features", n), repeat(_ABSENT, n)))
        if set(map(type, ids)) <= {str} and all(ids):
            if _ABSENT in feats:  # "features" may be left out: no features
                feats = [{} if f is _ABSENT else f for f in feats]
            if set(map(type, feats)) <= {dict}:
                return ids, feats
    pairs = [_member(item, f"members[{i}]") for i, item in enumerate(items)]
    return [p[0] for p in pairs], [p[1] for p in pairs]


@router.post(
    "/v1/plans/{plan}/assign",
    summary="Assign one member",
    response_model=AssignOut,
    openapi_extra=_openapi(AssignIn),
    responses={404: {"description": "no live version"}},
)
async def assign(request: Request) -> Response:
    plan = request.path_params["plan"]
    compiled = _compiled(request, plan)
    member, features = _member(await _json(request), "body")
    a = compiled.assign(member, features)
    key = (plan, a.plan_version, a.arm, a.cohort, a.holdout, a.defaults_used)
    hit = _ANSWERS.get(key)
    if hit is None:
        if len(_ANSWERS) >= _MAX_CACHED:
            _ANSWERS.clear()
        hit = _ANSWERS[key] = (
            json.dumps(a.to_dict()).encode(),
            _counter(plan, a.plan_version, a.arm),
        )
    hit[1].inc()
    return _JsonBytes(hit[0])


@router.post(
    "/v1/plans/{plan}/assign/batch",
    summary="Assign up to 10,000 members in one call",
    response_model=BatchOut,
    openapi_extra=_openapi(BatchIn),
    responses={404: {"description": "no live version"}},
)
async def assign_batch(request: Request) -> Response:
    plan = request.path_params["plan"]
    compiled = _compiled(request, plan)
    body = await _json(request)
    items = body.get("members") if isinstance(body, dict) else None
    if not isinstance(items, list):
        raise InvalidInput(
            'the body must be {"members": [{"member_id": ..., "features": {...}}, ...]}',
            errors=[{"field": "members"}],
        )
    if len(items) > MAX_BATCH:
        raise InvalidInput(
            f"a batch holds at most {MAX_BATCH} members; got {len(items)}",
            errors=[{"field": "members"}],
        )
    ids, feats = _members(items)
    distinct, index = compiled.assign_batch_compact(ids, feats)
    counts: dict[str, int] = {}
    for a, k in zip(distinct, np.bincount(index, minlength=len(distinct)).tolist(), strict=True):
        counts[a.arm] = counts.get(a.arm, 0) + k
    for arm, k in counts.items():
        _counter(plan, compiled.version, arm).inc(k)
    # each distinct answer is encoded once; the body is byte for byte what
    # json.dumps({"assignments": [a.to_dict() for a in out]}) gives
    parts = np.empty(len(distinct), dtype=object)
    parts[:] = [json.dumps(a.to_dict()) for a in distinct]
    body_out = '{"assignments": [' + ", ".join(parts.take(index).tolist()) + "]}"
    return _JsonBytes(body_out.encode())


@router.api_route("/v1/bare", methods=["GET", "POST"], include_in_schema=False)
async def bare(request: Request) -> Response:
    """A constant answer through the same app and middleware: the reference of bench/serve.py,
    which POSTs it the same bodies and header as the assign route (the body is not read)."""
    return Response(
        b'{"arm":"control","cohort":0,"plan_version":1,"holdout":false,"defaults_used":[]}',
        media_type="application/json",
    )
