"""Probes and metrics: no key needed."""

from __future__ import annotations

import time

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response
from prometheus_client import CONTENT_TYPE_LATEST, generate_latest

from apportion.api.body import LimitedRoute
from apportion.api.deps import ServicesDep
from apportion.observability import REFRESH_AGE, REGISTRY
from apportion.schemas.common import Liveness, Readiness
from apportion.usecases.operations import readiness

router = APIRouter(tags=["operations"], route_class=LimitedRoute)


@router.get("/healthz", summary="Liveness: the process answers", response_model=Liveness)
def healthz() -> dict[str, str]:
    return {"status": "ok"}


@router.get(
    "/readyz",
    summary="Readiness: database reachable, migrations current, plans loaded",
    response_model=Readiness,
    responses={
        503: {
            "description": "not ready: the same body, naming the check that failed",
            "model": Readiness,
        }
    },
)
def readyz(services: ServicesDep) -> JSONResponse:
    checks = readiness(services)
    ok = all(checks.values())
    return JSONResponse(
        {"status": "ready" if ok else "not ready", "checks": checks}, status_code=200 if ok else 503
    )


@router.get(
    "/metrics",
    summary="Prometheus text format",
    response_class=Response,
    responses={200: {"content": {"text/plain": {"schema": {"type": "string"}}}}},
)
def metrics(request: Request) -> Response:
    plans = request.app.state.services.plans
    if plans is not None and plans.last_refresh:
        REFRESH_AGE.set(max(0.0, time.time() - plans.last_refresh))
    return Response(generate_latest(REGISTRY), media_type=CONTENT_TYPE_LATEST)
