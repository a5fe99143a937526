"""Cohort models: fit one as a job (202), read it back."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, status

from apportion.api.body import GuardedRoute
from apportion.api.deps import AnalystDep, ReaderDep, ServicesDep
from apportion.api.fields import IdPath
from apportion.api.params import ExperimentKey
from apportion.schemas.models import FitIn, FitQueued, ModelView
from apportion.usecases import models as uc

router = APIRouter(tags=["models"], route_class=GuardedRoute)


@router.post(
    "/v1/experiments/{key}/models",
    status_code=status.HTTP_202_ACCEPTED,
    summary="Fit a cohort model (runs as a job)",
    response_model=FitQueued,
)
def fit(key: ExperimentKey, body: FitIn, actor: AnalystDep, services: ServicesDep) -> Any:
    return uc.start_fit(services, key=key, command=body, actor=actor)


@router.get(
    "/v1/models/{model_id}",
    summary="A cohort model: rules, shares, estimates, diagnostics",
    response_model=ModelView,
    response_model_exclude_unset=True,
)
def get_model(model_id: IdPath, _: ReaderDep, services: ServicesDep) -> Any:
    return uc.get_model(services.db, model_id=model_id)
