"""Method comparisons on an experiment's readout: start one as a job (202), read it, list them."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Response, status
from pydantic import BaseModel, Field

from apportion.api.body import GuardedRoute
from apportion.api.deps import AnalystDep, ReaderDep, ServicesDep
from apportion.api.fields import INT64_MAX, REASON_PATTERN, ShortText, Text, VersionPath
from apportion.api.params import ExperimentKey
from apportion.api.routes.plans import GuardrailIn
from apportion.usecases import comparisons as uc

router = APIRouter(tags=["comparisons"], route_class=GuardedRoute)


class ComparisonGuardrailIn(GuardrailIn):
    confidence: float | None = Field(  # type: ignore[assignment]
        None, gt=0.5, lt=1, description="in (0.5, 1); default: the comparison's confidence"
    )


class Override(BaseModel):
    reason: str = Field(min_length=3, max_length=2000, pattern=REASON_PATTERN)


class ComparisonIn(BaseModel):
    readout_version: int | None = Field(
        None, ge=1, le=INT64_MAX, description="compare on this readout (or give model_id)"
    )
    model_id: int | None = Field(
        None,
        ge=1,
        le=INT64_MAX,
        description="compare on this model's readout; its parameters serve its method",
    )
    candidates: list[ShortText] | None = Field(
        None,
        max_length=100,
        description="'model/optimizer' names; default: every model method (but segments) "
        "times every optimizer",
    )
    success_metric: ShortText
    guardrails: list[ComparisonGuardrailIn] = Field(default_factory=list, max_length=50)
    confidence: float = Field(
        0.95, gt=0.5, lt=1, description="for every guardrail that states none"
    )
    folds: int = Field(5, ge=2, le=20, description="cross-fitting folds (stratified by arm)")
    seed: int = Field(0, ge=0, le=INT64_MAX)
    params: dict[ShortText, dict[str, Any]] | None = Field(
        None, description="cohort model parameters per method, e.g. {'causal_tree': {...}}"
    )
    override_sample_ratio: Override | None = Field(
        None, description="compare although the readout failed the sample-ratio check"
    )
    notes: Text | None = Field(None, max_length=5000)


@router.post(
    "/v1/experiments/{key}/comparisons",
    status_code=status.HTTP_202_ACCEPTED,
    summary="Compare decision methods on held-out folds of a readout (runs as a job)",
)
def start(
    key: ExperimentKey,
    body: ComparisonIn,
    actor: AnalystDep,
    services: ServicesDep,
    response: Response,
) -> dict[str, Any]:
    out = uc.start(services, key=key, body=body.model_dump(), actor=actor)
    response.headers["Location"] = out["comparison"]
    return out


@router.get(
    "/v1/experiments/{key}/comparisons",
    summary="The experiment's comparisons, oldest first",
)
def list_comparisons(key: ExperimentKey, _: ReaderDep, services: ServicesDep) -> dict[str, Any]:
    return uc.list_all(services, key=key)


@router.get(
    "/v1/experiments/{key}/comparisons/{number}",
    summary="A comparison: progress, and when done the held-out table and the recommendation",
)
def get_comparison(
    key: ExperimentKey, number: VersionPath, _: ReaderDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.get(services, key=key, number=number)
