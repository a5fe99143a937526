"""The guardrail watch: upload post-launch rows, read the status, set automatic rollback."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from starlette.concurrency import run_in_threadpool

from apportion.api.body import UPLOAD_OPENAPI, GuardedRoute, read_limited
from apportion.api.deps import AnalystDep, ApproverDep, ReaderDep, ServicesDep
from apportion.api.fields import VersionQuery
from apportion.api.params import PlanKey
from apportion.schemas.watch import AutoRollbackIn, AutoRollbackView, MonitorResult, WatchView
from apportion.usecases import watch as uc

router = APIRouter(prefix="/v1/plans", tags=["watch"], route_class=GuardedRoute)


@router.post(
    "/{plan}/monitor",
    summary="Upload post-launch rows (member_id, features, holdout, metrics)",
    openapi_extra=UPLOAD_OPENAPI,
    response_model=MonitorResult,
    response_model_exclude_unset=True,
)
async def monitor(
    plan: PlanKey,
    request: Request,
    actor: AnalystDep,
    services: ServicesDep,
    version: VersionQuery = None,
) -> Any:
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


@router.get(
    "/{plan}/watch",
    summary="Guardrail status and interval history of the watched version",
    response_model=WatchView,
    response_model_exclude_unset=True,
)
def get_watch(
    plan: PlanKey, _: ReaderDep, services: ServicesDep, version: VersionQuery = None
) -> Any:
    return uc.get_watch(services, plan=plan, version=version)


@router.post(
    "/{plan}/auto-rollback",
    summary="Turn automatic rollback on or off (approver)",
    response_model=AutoRollbackView,
)
def auto_rollback(
    plan: PlanKey, body: AutoRollbackIn, actor: ApproverDep, services: ServicesDep
) -> Any:
    return uc.set_auto_rollback(services, plan=plan, command=body, actor=actor)
