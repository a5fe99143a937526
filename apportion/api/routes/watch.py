"""The guardrail watch: upload post-launch rows, read the status, set automatic rollback."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from pydantic import BaseModel, Field
from starlette.concurrency import run_in_threadpool

from apportion.api.body import UPLOAD_OPENAPI, GuardedRoute, read_limited
from apportion.api.deps import AnalystDep, ApproverDep, ReaderDep, ServicesDep
from apportion.api.fields import INT64_MAX, Reason, VersionQuery
from apportion.api.params import PlanKey
from apportion.usecases import watch as uc

router = APIRouter(prefix="/v1/plans", tags=["watch"], route_class=GuardedRoute)


class AutoRollbackIn(BaseModel):
    enabled: bool
    min_units_per_group: int = Field(
        1000,
        ge=1,
        le=INT64_MAX,
        description="plan-exposed and holdout members needed before it may act",
    )
    horizon: int | None = Field(
        None,
        ge=100,
        le=INT64_MAX,
        description="expected units per group; where the interval is tightest",
    )
    reason: Reason


@router.post(
    "/{plan}/monitor",
    summary="Upload post-launch rows (member_id, features, holdout, metrics)",
    openapi_extra=UPLOAD_OPENAPI,
)
async def monitor(
    plan: PlanKey,
    request: Request,
    actor: AnalystDep,
    services: ServicesDep,
    version: VersionQuery = None,
) -> dict[str, Any]:
    body = await read_limited(request, services.settings.max_upload_bytes)
    return await run_in_threadpool(
        uc.upload,
        services,
        plan=plan,
        body=body,
        content_type=request.headers.get("content-type", ""),
        actor=actor,
        version=version,
    )


@router.get("/{plan}/watch", summary="Guardrail status and interval history of the watched version")
def get_watch(
    plan: PlanKey, _: ReaderDep, services: ServicesDep, version: VersionQuery = None
) -> dict[str, Any]:
    return uc.get_watch(services, plan=plan, version=version)


@router.post("/{plan}/auto-rollback", summary="Turn automatic rollback on or off (approver)")
def auto_rollback(
    plan: PlanKey, body: AutoRollbackIn, actor: ApproverDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.set_auto_rollback(
        services,
        plan=plan,
        enabled=body.enabled,
        min_units_per_group=body.min_units_per_group,
        horizon=body.horizon,
        actor=actor,
        reason=body.reason,
    )
