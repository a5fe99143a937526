"""Path parameters shared by the routes, each declared once with the pattern it must match.

Every route that takes a plan or experiment key in its path validates it here, so a segment that
is not a key (a backslash, a dot, a percent-escape, a NUL) gets a 422 before any use case runs and
never reaches a page that builds a URL from it."""

from __future__ import annotations

from typing import Annotated

from fastapi import Path

from apportion.schemas.common import KEY_PATTERN

PlanKey = Annotated[
    str,
    Path(pattern=KEY_PATTERN, max_length=100, description="the plan's key", examples=["checkout"]),
]
ExperimentKey = Annotated[
    str,
    Path(
        pattern=KEY_PATTERN,
        max_length=100,
        description="the experiment's key",
        examples=["checkout"],
    ),
]
JobId = Annotated[
    str,
    Path(
        pattern=r"^[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}$",
        description="the job's id (a UUID)",
    ),
]
