"""Experiments and readouts."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request, status
from fastapi.responses import JSONResponse
from pydantic import ValidationError
from starlette.concurrency import run_in_threadpool

from apportion.api.body import UPLOAD_TYPES, GuardedRoute, read_limited, spool_upload
from apportion.api.deps import AnalystDep, ReaderDep, ServicesDep
from apportion.api.fields import VersionPath
from apportion.api.params import ExperimentKey
from apportion.errors import InvalidInput
from apportion.schemas.common import dump
from apportion.schemas.experiments import (
    ExperimentIn,
    ExperimentView,
    ReadoutImportQueued,
    ReadoutSourceIn,
    ReadoutView,
)
from apportion.usecases import experiments as uc
from apportion.usecases import sources

router = APIRouter(prefix="/v1/experiments", tags=["experiments"], route_class=GuardedRoute)
MAX_SOURCE_BODY = 16 * 1024


READOUT_OPENAPI = {
    "requestBody": {
        "required": True,
        "content": {
            **UPLOAD_TYPES,
            "application/json": {"schema": ReadoutSourceIn.model_json_schema()},
        },
    }
}


@router.post(
    "",
    status_code=status.HTTP_201_CREATED,
    summary="Declare an experiment",
    response_model=ExperimentView,
    response_model_exclude_unset=True,
)
def declare(body: ExperimentIn, actor: AnalystDep, services: ServicesDep) -> Any:
    return uc.declare(services.db, command=body, actor=actor)


@router.get(
    "/{key}",
    summary="An experiment's declaration and its readouts",
    response_model=ExperimentView,
    response_model_exclude_unset=True,
)
def get_experiment(key: ExperimentKey, _: ReaderDep, services: ServicesDep) -> Any:
    return uc.get(services.db, key=key)


@router.post(
    "/{key}/readouts",
    summary="Upload unit-level rows (CSV, Parquet or NDJSON), or name a Parquet dataset by URI",
    description="A body in CSV, Parquet or NDJSON (optionally with Content-Encoding gzip or zstd) "
    "is validated and stored at once (201, or 200 for bytes uploaded before). A JSON body "
    '`{"source": URI}` names a Parquet file, directory or glob under an allowed prefix '
    "(APPORTION_READOUT_SOURCE_PREFIXES); it is validated and snapshotted in a job (202).",
    openapi_extra=READOUT_OPENAPI,
    status_code=status.HTTP_201_CREATED,
    response_model=ReadoutView,
    responses={
        200: {
            "description": "the same bytes were uploaded before: the existing version",
            "model": ReadoutView,
        },
        202: {
            "description": "a source by reference: the import job was queued",
            "model": ReadoutImportQueued,
        },
        403: {"description": "the source is not under an allowed prefix"},
        415: {"description": "an unsupported media type or content encoding"},
        413: {"description": "too large"},
        422: {"description": "invalid rows"},
    },
)
async def upload_readout(
    key: ExperimentKey, request: Request, actor: AnalystDep, services: ServicesDep
) -> JSONResponse:
    ctype = request.headers.get("content-type", "")
    settings = services.settings
    if ctype.split(";")[0].strip().lower() == "application/json":
        return await _import_by_reference(key, request, actor, services)
    spooled = await spool_upload(request, settings.max_upload_bytes, settings.upload_dir)
    try:
        view, created = await run_in_threadpool(
            uc.upload_readout_file,
            services.db,
            key=key,
            path=spooled.path,
            content_hash=spooled.sha256,
            content_type=ctype,
            actor=actor,
            work_dir=settings.upload_dir,
        )
    finally:
        spooled.remove()
    return JSONResponse(dump(view), status_code=201 if created else 200)


@router.get(
    "/{key}/readouts/{version}",
    summary="A readout's summary: per arm and metric n, mean, standard error",
    response_model=ReadoutView,
    response_model_exclude_unset=True,
)
def get_readout(
    key: ExperimentKey, version: VersionPath, _: ReaderDep, services: ServicesDep
) -> Any:
    return uc.get_readout(services.db, key=key, version=version)


async def _import_by_reference(
    key: str, request: Request, actor: Any, services: Any
) -> JSONResponse:
    raw = await read_limited(request, MAX_SOURCE_BODY)
    try:
        body = ReadoutSourceIn.model_validate_json(raw)
    except ValidationError as exc:
        raise InvalidInput(
            'the JSON body must be {"source": URI, "partitioning": "hive" | null}',
            errors=[
                {"field": ".".join(map(str, e["loc"])), "problem": e["msg"]} for e in exc.errors()
            ],
        ) from exc
    view = await run_in_threadpool(
        sources.import_readout, services, key=key, command=body, actor=actor
    )
    return JSONResponse(dump(view), status_code=202)
