"""Plan versions and their lifecycle."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, status
from pydantic import BaseModel, Field, ValidationInfo, field_validator

from apportion.api.body import GuardedRoute
from apportion.api.deps import AnalystDep, ApproverDep, ReaderDep, ServicesDep
from apportion.api.fields import INT64_MAX, Reason, ShortText, Text, VersionPath
from apportion.api.params import PlanKey
from apportion.api.solver_options import SolverOptions, options_for
from apportion.usecases import plans as uc

router = APIRouter(prefix="/v1/plans", tags=["plans"], route_class=GuardedRoute)


class GuardrailIn(BaseModel):
    metric: ShortText
    threshold: float = Field(
        allow_inf_nan=False,
        description="allowed change against the baseline, signed in the harmful direction",
    )
    unit: Literal["absolute", "relative"] = Field(
        "absolute", description="absolute: the metric's units; relative: per cent of baseline"
    )
    confidence: float = Field(0.95, gt=0.5, lt=1, description="in (0.5, 1)")


class HoldoutIn(BaseModel):
    share: float = Field(0.05, ge=0, lt=1)
    arm: ShortText | None = Field(None, description="default: the control arm")


class DraftIn(BaseModel):
    model_id: int = Field(ge=1, le=INT64_MAX)
    success_metric: ShortText
    guardrails: list[GuardrailIn] = Field(default_factory=list, max_length=50)
    method: Literal["deterministic", "chance", "stochastic"] = "chance"
    allocation: Literal["mixed", "pure"] = "mixed"
    holdout: HoldoutIn = Field(default_factory=HoldoutIn)
    baseline: Literal["control", "best_arm", "live"] = "control"
    traffic_mix: list[Annotated[float, Field(ge=0, allow_inf_nan=False)]] | None = Field(
        None,
        max_length=100_000,
        description="per-cohort shares of the traffic to plan for (default: the model's)",
    )
    draws: int = Field(
        200,
        ge=0,
        le=20000,
        description="bootstrap draws of the impact report (above 1000 it runs as a job)",
    )
    seed: int = Field(0, ge=0, le=INT64_MAX)
    new_salt: bool = Field(
        False, description="re-randomize everyone instead of keeping the plan's salt"
    )
    notes: Text | None = Field(None, max_length=5000)
    comparison: int | None = Field(
        None,
        ge=1,
        le=INT64_MAX,
        description="the number of the experiment's comparison this draft's method follows; "
        "it must be done and have compared this model's method with this optimizer",
    )
    options: SolverOptions | None = Field(
        None, description="solver options; which ones depends on the method (422 otherwise)"
    )

    @field_validator("options", mode="before")
    @classmethod
    def _options_of_method(cls, value: Any, info: ValidationInfo) -> Any:
        return options_for(info.data.get("method", "chance"), value)


class DecisionIn(BaseModel):
    reason: Reason


class ActivateIn(BaseModel):
    version: int = Field(ge=1, le=INT64_MAX)
    reason: Reason
    expected_revision: int = Field(
        ge=0, le=INT64_MAX, description="the plan's revision you saw; 409 when it moved"
    )


class RollbackIn(BaseModel):
    reason: Reason
    to_version: int | None = Field(
        None, ge=1, le=INT64_MAX, description="default: the version live before the current one"
    )
    expected_revision: int | None = Field(None, ge=0, le=INT64_MAX)


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
    data["options"] = body.options.model_dump(exclude_none=True) if body.options else None
    data["holdout"] = {k: v for k, v in data["holdout"].items() if v is not None}
    return uc.draft_version(services, plan=plan, body=data, actor=actor)


@router.get("/{plan}", summary="A plan: live version, revision, versions and activations")
def get_plan(plan: PlanKey, _: ReaderDep, services: ServicesDep) -> dict[str, Any]:
    return uc.get_plan(services, plan=plan)


@router.get(
    "/{plan}/versions/{version}",
    summary="A plan version with its report and its diff against the live version",
)
def get_version(
    plan: PlanKey, version: VersionPath, _: ReaderDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.get_version(services, plan=plan, version=version)


@router.post("/{plan}/versions/{version}/approve", summary="Approve a draft (not its author)")
def approve(
    plan: PlanKey, version: VersionPath, body: DecisionIn, actor: ApproverDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.decide(
        services, plan=plan, version=version, approve=True, reason=body.reason, actor=actor
    )


@router.post("/{plan}/versions/{version}/reject", summary="Reject a draft")
def reject(
    plan: PlanKey, version: VersionPath, body: DecisionIn, actor: ApproverDep, services: ServicesDep
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
