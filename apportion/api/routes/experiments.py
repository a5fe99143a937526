"""Experiments and readouts."""

from __future__ import annotations

from typing import Any, Literal

from fastapi import APIRouter, Request, status
from fastapi.responses import JSONResponse
from pydantic import BaseModel, Field, ValidationError
from starlette.concurrency import run_in_threadpool

from apportion.api.body import UPLOAD_TYPES, GuardedRoute, read_limited, spool_upload
from apportion.api.deps import AnalystDep, ReaderDep, ServicesDep
from apportion.api.fields import NO_NUL, ShortText, VersionPath
from apportion.api.params import KEY_PATTERN, ExperimentKey
from apportion.errors import InvalidInput
from apportion.usecases import experiments as uc
from apportion.usecases import sources

router = APIRouter(prefix="/v1/experiments", tags=["experiments"], route_class=GuardedRoute)
MAX_SOURCE_BODY = 16 * 1024


class ReadoutSourceIn(BaseModel):
    """A readout by reference: a Parquet dataset the service may read (see the route)."""

    model_config = {"extra": "forbid"}
    source: str = Field(
        min_length=1, max_length=2000, pattern=NO_NUL, description="file, directory or glob URI"
    )
    partitioning: Literal["hive"] | None = Field(
        None, description="'hive' when directories name partition columns (key=value)"
    )


READOUT_OPENAPI = {
    "requestBody": {
        "required": True,
        "content": {
            **UPLOAD_TYPES,
            "application/json": {"schema": ReadoutSourceIn.model_json_schema()},
        },
    }
}
KEY = r"^[a-z0-9][a-z0-9_-]{0,99}$"
COLUMN = r"^[A-Za-z_][A-Za-z0-9_]{0,99}$"


class ArmIn(BaseModel):
    key: str = Field(pattern=COLUMN)
    share: float = Field(gt=0, le=1, description="designed share of units")


class MetricIn(BaseModel):
    key: str = Field(pattern=COLUMN)
    kind: Literal["mean", "proportion", "ratio"]
    direction: Literal["higher", "lower"] = "higher"
    numerator: str | None = Field(
        None, pattern=COLUMN, description="ratio metrics: the numerator column"
    )
    denominator: str | None = Field(
        None, pattern=COLUMN, description="ratio metrics: the denominator column"
    )


class FeatureIn(BaseModel):
    key: str = Field(pattern=COLUMN)
    kind: Literal["numeric", "categorical"]
    levels: list[ShortText] | None = Field(
        None, max_length=10000, description="categorical: the allowed levels (optional)"
    )


class ExperimentIn(BaseModel):
    key: str = Field(pattern=KEY_PATTERN)
    name: ShortText | None = None
    arms: list[ArmIn] = Field(min_length=2, max_length=20)
    control: ShortText
    metrics: list[MetricIn] = Field(min_length=1, max_length=50)
    features: list[FeatureIn] = Field(default_factory=list, max_length=200)


@router.post("", status_code=status.HTTP_201_CREATED, summary="Declare an experiment")
def declare(body: ExperimentIn, actor: AnalystDep, services: ServicesDep) -> dict[str, Any]:
    return uc.declare(services.db, declaration=body.model_dump(exclude_none=True), actor=actor)


@router.get("/{key}", summary="An experiment's declaration and its readouts")
def get_experiment(key: ExperimentKey, _: ReaderDep, services: ServicesDep) -> dict[str, Any]:
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
    responses={
        200: {"description": "the same bytes were uploaded before: the existing version"},
        202: {"description": "a source by reference: the import job was queued"},
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
    return JSONResponse(view, status_code=201 if created else 200)


@router.get(
    "/{key}/readouts/{version}",
    summary="A readout's summary: per arm and metric n, mean, standard error",
)
def get_readout(
    key: ExperimentKey, version: VersionPath, _: ReaderDep, services: ServicesDep
) -> dict[str, Any]:
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
        sources.import_readout,
        services,
        key=key,
        source=body.source,
        partitioning=body.partitioning,
        actor=actor,
    )
    return JSONResponse(view, status_code=202)
