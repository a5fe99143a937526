"""Plan versions and their lifecycle."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, status

from apportion.api.body import GuardedRoute
from apportion.api.deps import AnalystDep, ApproverDep, ReaderDep, ServicesDep
from apportion.api.fields import VersionPath
from apportion.api.params import PlanKey
from apportion.schemas.plans import (
    ActivateIn,
    DecisionIn,
    DraftIn,
    PlanList,
    PlanVersionView,
    PlanView,
    RollbackIn,
    Switched,
)
from apportion.usecases import plans as uc

router = APIRouter(prefix="/v1/plans", tags=["plans"], route_class=GuardedRoute)


@router.get("", summary="All plans with their live version", response_model=PlanList)
def list_plans(_: ReaderDep, services: ServicesDep) -> Any:
    return uc.list_plans(services)


@router.post(
    "/{plan}/versions",
    status_code=status.HTTP_201_CREATED,
    summary="Draft a plan version from a cohort model",
    responses={422: {"description": "invalid problem, or no allocation satisfies the guardrails"}},
    response_model=PlanVersionView,
    response_model_exclude_unset=True,
)
def draft(plan: PlanKey, body: DraftIn, actor: AnalystDep, services: ServicesDep) -> Any:
    return uc.draft_version(services, plan=plan, command=body, actor=actor)


@router.get(
    "/{plan}",
    summary="A plan: live version, revision, versions and activations",
    response_model=PlanView,
    response_model_exclude_unset=True,
)
def get_plan(plan: PlanKey, _: ReaderDep, services: ServicesDep) -> Any:
    return uc.get_plan(services, plan=plan)


@router.get(
    "/{plan}/versions/{version}",
    summary="A plan version with its report and its diff against the live version",
    response_model=PlanVersionView,
    response_model_exclude_unset=True,
)
def get_version(plan: PlanKey, version: VersionPath, _: ReaderDep, services: ServicesDep) -> Any:
    return uc.get_version(services, plan=plan, version=version)


@router.post(
    "/{plan}/versions/{version}/approve",
    summary="Approve a draft (not its author)",
    response_model=PlanVersionView,
    response_model_exclude_unset=True,
)
def approve(
    plan: PlanKey, version: VersionPath, body: DecisionIn, actor: ApproverDep, services: ServicesDep
) -> Any:
    return uc.decide(
        services, plan=plan, version=version, approve=True, reason=body.reason, actor=actor
    )


@router.post(
    "/{plan}/versions/{version}/reject",
    summary="Reject a draft",
    response_model=PlanVersionView,
    response_model_exclude_unset=True,
)
def reject(
    plan: PlanKey, version: VersionPath, body: DecisionIn, actor: ApproverDep, services: ServicesDep
) -> Any:
    return uc.decide(
        services, plan=plan, version=version, approve=False, reason=body.reason, actor=actor
    )


@router.post(
    "/{plan}/activate",
    summary="Make an approved version live",
    responses={409: {"description": "stale revision"}},
    response_model=Switched,
    response_model_exclude_unset=True,
)
def activate(plan: PlanKey, body: ActivateIn, actor: ApproverDep, services: ServicesDep) -> Any:
    return uc.activate(services, plan=plan, command=body, actor=actor)


@router.post(
    "/{plan}/rollback",
    summary="Return to the previously live version (or a named approved one)",
    response_model=Switched,
    response_model_exclude_unset=True,
)
def rollback(plan: PlanKey, body: RollbackIn, actor: ApproverDep, services: ServicesDep) -> Any:
    return uc.rollback(services, plan=plan, command=body, actor=actor)
