"""Bounds every request field declares, once: integers fit the databases' 64-bit columns and text
holds no NUL (PostgreSQL cannot store it). A value outside them is a 422 from the schema itself,
before any use case runs, on every backend alike; the exported OpenAPI document shows them."""

from __future__ import annotations

from typing import Annotated

from fastapi import Path, Query
from pydantic import Field, StringConstraints

INT64_MAX = 2**63 - 1  # BIGINT (PostgreSQL) and INTEGER (SQLite) are signed 64-bit
NO_NUL = r"^[^\x00]*$"
# a reason must say something: at least one character that is neither blank nor NUL
REASON_PATTERN = r"^[^\x00]*[^\s\x00][^\x00]*$"

Text = Annotated[str, StringConstraints(pattern=NO_NUL)]
ShortText = Annotated[str, StringConstraints(max_length=200, pattern=NO_NUL)]
Reason = Annotated[
    str,
    Field(
        min_length=1,
        max_length=5000,
        pattern=REASON_PATTERN,
        description="why; recorded in the audit trail",
    ),
]

VersionPath = Annotated[int, Path(ge=1, le=INT64_MAX, description="a version number")]
IdPath = Annotated[int, Path(ge=1, le=INT64_MAX, description="a numeric id")]
VersionQuery = Annotated[
    int | None, Query(ge=1, le=INT64_MAX, description="default: the live version")
]
TextQuery = Annotated[str | None, Query(max_length=200, pattern=NO_NUL)]
