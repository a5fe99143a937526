"""Cohort models: fit one as a job (202), read it back."""

from __future__ import annotations

from typing import Any, Literal

from fastapi import APIRouter, status
from pydantic import BaseModel, Field

from apportion.api.body import GuardedRoute
from apportion.api.deps import AnalystDep, ReaderDep, ServicesDep
from apportion.api.fields import INT64_MAX, REASON_PATTERN, IdPath, ShortText
from apportion.api.params import ExperimentKey
from apportion.usecases import models as uc

router = APIRouter(tags=["models"], route_class=GuardedRoute)


class Override(BaseModel):
    reason: str = Field(min_length=3, max_length=2000, pattern=REASON_PATTERN)


class FitIn(BaseModel):
    readout_version: int = Field(ge=1, le=INT64_MAX)
    method: Literal[
        "global", "segments", "causal_tree", "intersect", "two_model", "forest", "policy_tree"
    ] = "causal_tree"
    params: dict[str, Any] = Field(
        default_factory=dict, description="method parameters; see the README"
    )
    success_metric: ShortText | None = Field(
        None, description="the metric that orders categorical levels and may weigh more"
    )
    override_sample_ratio: Override | None = Field(
        None, description="fit although the sample-ratio check failed"
    )


@router.post(
    "/v1/experiments/{key}/models",
    status_code=status.HTTP_202_ACCEPTED,
    summary="Fit a cohort model (runs as a job)",
)
def fit(
    key: ExperimentKey, body: FitIn, actor: AnalystDep, services: ServicesDep
) -> dict[str, Any]:
    return uc.start_fit(
        services,
        key=key,
        readout_version=body.readout_version,
        method=body.method,
        params=body.params,
        success_metric=body.success_metric,
        override_reason=body.override_sample_ratio.reason if body.override_sample_ratio else None,
        actor=actor,
    )


@router.get(
    "/v1/models/{model_id}", summary="A cohort model: rules, shares, estimates, diagnostics"
)
def get_model(model_id: IdPath, _: ReaderDep, services: ServicesDep) -> dict[str, Any]:
    return uc.get_model(services.db, model_id=model_id)
