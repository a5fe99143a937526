"""Jobs: state, progress and error of long-running work (fits, reports, comparisons, imports)."""

from __future__ import annotations

from typing import Any

from pydantic import Field

from apportion.schemas.common import Answer, JobStatus, Timestamp


class JobView(Answer):
    id: str
    kind: str = Field(description="what the job does, e.g. fit, report, comparison")
    status: JobStatus
    progress: float = Field(ge=0, le=1)
    error: str | None
    attempts: int
    created_at: Timestamp
    started_at: Timestamp | None
    finished_at: Timestamp | None
    result: Any = Field(description="what the job left for its caller, if anything")
