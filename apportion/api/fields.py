"""Path and query parameters with the bounds every request field declares (apportion/schemas/common:
integers fit the databases' 64-bit columns, text holds no NUL). A value outside them is a 422 from
the schema itself, before any use case runs, on every backend alike."""

from __future__ import annotations

from typing import Annotated

from fastapi import Path, Query

from apportion.schemas.common import INT64_MAX, NO_NUL

VersionPath = Annotated[int, Path(ge=1, le=INT64_MAX, description="a version number")]
IdPath = Annotated[int, Path(ge=1, le=INT64_MAX, description="a numeric id")]
VersionQuery = Annotated[
    int | None, Query(ge=1, le=INT64_MAX, description="default: the live version")
]
TextQuery = Annotated[str | None, Query(max_length=200, pattern=NO_NUL)]
