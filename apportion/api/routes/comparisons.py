"""Method comparisons on an experiment's readout: start one as a job (202), read it, list them."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Response, status

from apportion.api.body import GuardedRoute
from apportion.api.deps import AnalystDep, ReaderDep, ServicesDep
from apportion.api.fields import VersionPath
from apportion.api.params import ExperimentKey
from apportion.schemas.comparisons import (
    ComparisonIn,
    ComparisonList,
    ComparisonQueued,
    ComparisonView,
)
from apportion.usecases import comparisons as uc

router = APIRouter(tags=["comparisons"], route_class=GuardedRoute)


@router.post(
    "/v1/experiments/{key}/comparisons",
    status_code=status.HTTP_202_ACCEPTED,
    summary="Compare decision methods on held-out folds of a readout (runs as a job)",
    response_model=ComparisonQueued,
)
def start(
    key: ExperimentKey,
    body: ComparisonIn,
    actor: AnalystDep,
    services: ServicesDep,
    response: Response,
) -> Any:
    out = uc.start(services, key=key, command=body, actor=actor)
    response.headers["Location"] = out.comparison
    return out


@router.get(
    "/v1/experiments/{key}/comparisons",
    summary="The experiment's comparisons, oldest first",
    response_model=ComparisonList,
)
def list_comparisons(key: ExperimentKey, _: ReaderDep, services: ServicesDep) -> Any:
    return uc.list_all(services, key=key)


@router.get(
    "/v1/experiments/{key}/comparisons/{number}",
    summary="A comparison: progress, and when done the held-out table and the recommendation",
    response_model=ComparisonView,
    response_model_exclude_unset=True,
)
def get_comparison(
    key: ExperimentKey, number: VersionPath, _: ReaderDep, services: ServicesDep
) -> Any:
    return uc.get(services, key=key, number=number)
