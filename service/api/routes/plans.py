"""Plan versions and their lifecycle."""

from __future__ import annotations

from typing import Any, Literal

from fastapi import APIRouter, status
from pydantic import BaseModel, Field

from service.api.deps import AnalystDep, ApproverDep, AuthenticatedRoute, ReaderDep, ServicesDep
from service.api.params import PlanKey
from service.usecases import plans as uc

router = APIRouter(prefix="/v1/plans", tags=["plans"], route_class=AuthenticatedRoute)


class GuardrailIn(BaseModel):
    metric: str
    threshold: float = Field(
        description="allowed change against the baseline, signed in the harmful direction"
    )
    unit: Literal["absolute", "relative"] = Field(
        "absolute", description="absolute: the metric's units; relative: per cent of baseline"
    )
    confidence: float = Field(0.95, description="in (0.5, 1)")


class HoldoutIn(BaseModel):
    share: float = Field(0.05, ge=0, lt=1)
    arm: str | None = Field(None, description="default: the control arm")


class DraftIn(BaseModel):
    model_id: int
    success_metric: str
    guardrails: list[GuardrailIn] = Field(default_factory=list, max_length=50)
    method: Literal["deterministic", "chance", "stochastic"] = "chance"
    allocation: Literal["mixed", "pure"] = "mixed"
    holdout: HoldoutIn = Field(default_factory=HoldoutIn)
    baseline: Literal["control", "best_arm", "live"] = "control"
    traffic_mix: list[float] | None = Field(
        None, description="per-cohort shares of the traffic to plan for (default: the model's)"
    )
    draws: int = Field(
        200,
        ge=0,
        le=20000,
        description="bootstrap draws of the impact report (above 1000 it runs as a job)",
    )
    seed: int = Field(0, ge=0)
    new_salt: bool = Field(
        False, description="re-randomize everyone instead of keeping the plan's salt"
    )
    notes: str | None = Field(None, max_length=5000)
    options: dict[str, Any] | None = Field(None, description="solver options")


class DecisionIn(BaseModel):
    reason: str = Field(
        min_length=1, max_length=5000, pattern=r"\S", description="why; recorded in the audit trail"
    )


class ActivateIn(BaseModel):
    version: int = Field(ge=1)
    reason: str = Field(
        min_length=1, max_length=5000, pattern=r"\S", description="why; recorded in the audit trail"
    )
    expected_revision: int = Field(
        ge=0, description="the plan's revision you saw; 409 when it moved"
    )


class RollbackIn(BaseModel):
    reason: str = Field(
        min_length=1, max_length=5000, pattern=r"\S", description="why; recorded in the audit trail"
    )
    to_version: int | None = Field(
        None, ge=1, description="default: the version live before the current one"
    )
    expected_revision: int | None = Field(None, ge=0)


@router.get("", summary="All plans with their live version")
def list_plans(_: ReaderDep, services: ServicesDep) -> dict[str, Any]:
    return {"plans": uc.list_plans(services)}


@router.post(
    "/{plan}/versions",
    status_code=status.HTTP_201_CREATED,
    summary="Draft a plan version from a cohort model",
    responses={422: {"description": "invalid problem, or no allocation satisfies the guardrails"}},
)
def draft(plan: PlanKey, body: DraftIn, actor: AnalystDep, services: ServicesDep) -> dict[str, Any]:
    data = body.model_dump()
    data["holdout"] = {k: v for k, v in data["holdout"].items() if v is not None}
    return uc.draft_version(services, plan=plan, body=data, actor=actor)


@router.get("/{plan}", summary="A plan: live version, revision, versions and activations")
def get_plan(plan: PlanKey, _: ReaderDep, services: ServicesDep) -> dict[str, Any]:
    return uc.get_plan(services, plan=plan)


@router.get(
    "/{plan}/versions/{version}",
    summary="A plan version with its report and its diff against the live version",
)
def get_version(plan: PlanKey, version: int, _: ReaderDep, services: ServicesDep) -> dict[str, Any]:
    return uc.get_version(services, plan=plan, version=version)


@router.post("/{plan}/versions/{version}/approve", summary="Approve a draft (not its author)")
def approve(
    plan: PlanKey, version: int, body: DecisionIn, actor: ApproverDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.decide(
        services, plan=plan, version=version, approve=True, reason=body.reason, actor=actor
    )


@router.post("/{plan}/versions/{version}/reject", summary="Reject a draft")
def reject(
    plan: PlanKey, version: int, body: DecisionIn, actor: ApproverDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.decide(
        services, plan=plan, version=version, approve=False, reason=body.reason, actor=actor
    )


@router.post(
    "/{plan}/activate",
    summary="Make an approved version live",
    responses={409: {"description": "stale revision"}},
)
def activate(
    plan: PlanKey, body: ActivateIn, actor: ApproverDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.activate(
        services,
        plan=plan,
        version=body.version,
        reason=body.reason,
        expected_revision=body.expected_revision,
        actor=actor,
    )


@router.post(
    "/{plan}/rollback", summary="Return to the previously live version (or a named approved one)"
)
def rollback(
    plan: PlanKey, body: RollbackIn, actor: ApproverDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.rollback(
        services,
        plan=plan,
        reason=body.reason,
        to_version=body.to_version,
        actor=actor,
        expected_revision=body.expected_revision,
    )
