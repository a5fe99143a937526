"""Jobs: state, progress and error of any long-running work."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter

from apportion.api.body import GuardedRoute
from apportion.api.deps import ReaderDep, ServicesDep
from apportion.api.params import JobId
from apportion.schemas.jobs import JobView
from apportion.usecases import jobs as uc

router = APIRouter(tags=["jobs"], route_class=GuardedRoute)


@router.get(
    "/v1/jobs/{job_id}",
    summary="A job's state: queued, running, done or failed, with progress 0..1",
    response_model=JobView,
)
def get_job(job_id: JobId, _: ReaderDep, services: ServicesDep) -> Any:
    return uc.get_job(services, job_id)
