"""The lookup path: which arm for this member? Reads only the in-process registry and the in-memory
key cache: no database, no fit, no lock. Written as plain `async def` handlers on the raw request
(no threadpool hop, no response-model validation) because other systems call it thousands of times
a second; the request schema is still declared for the OpenAPI document."""

from __future__ import annotations

import json
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import Response
from pydantic import BaseModel, Field

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


def _body_schema(model: type[BaseModel]) -> dict[str, Any]:
    return {
        "requestBody": {
            "required": True,
            "content": {"application/json": {"schema": model.model_json_schema()}},
        }
    }


async def _json(request: Request) -> Any:
    raw = await request.body()
    try:
        return json.loads(raw)
    except ValueError as exc:
        raise InvalidInput(
            f"the body is not valid JSON: {exc}",
            errors=[{"field": "body", "problem": "invalid JSON"}],
        ) from exc


def _compiled(request: Request, plan: str) -> Any:
    services = request.app.state.services
    actor = services.keys.authenticate_cached(request.headers.get("authorization"))
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


@router.post(
    "/v1/plans/{plan}/assign",
    summary="Assign one member",
    response_model=AssignOut,
    openapi_extra=_body_schema(AssignIn),
    responses={404: {"description": "no live version"}},
)
async def assign(plan: str, request: Request) -> Response:
    compiled = _compiled(request, plan)
    member, features = _member(await _json(request), "body")
    a = compiled.assign(member, features)
    ASSIGNMENTS.labels(plan, str(a.plan_version), a.arm).inc()
    return Response(json.dumps(a.to_dict()), media_type="application/json")


@router.post(
    "/v1/plans/{plan}/assign/batch",
    summary="Assign up to 10,000 members in one call",
    response_model=BatchOut,
    openapi_extra=_body_schema(BatchIn),
    responses={404: {"description": "no live version"}},
)
async def assign_batch(plan: str, request: Request) -> Response:
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
    pairs = [_member(item, f"members[{i}]") for i, item in enumerate(items)]
    out = compiled.assign_batch([p[0] for p in pairs], [p[1] for p in pairs])
    counts: dict[str, int] = {}
    for a in out:
        counts[a.arm] = counts.get(a.arm, 0) + 1
    for arm, n in counts.items():
        ASSIGNMENTS.labels(plan, str(compiled.version), arm).inc(n)
    return Response(
        json.dumps({"assignments": [a.to_dict() for a in out]}), media_type="application/json"
    )


@router.get("/v1/bare", include_in_schema=False)
async def bare(request: Request) -> Response:
    """A constant answer through the same app and middleware: the reference of bench/serve.py."""
    return Response(
        b'{"arm":"control","cohort":0,"plan_version":1,"holdout":false,"defaults_used":[]}',
        media_type="application/json",
    )
