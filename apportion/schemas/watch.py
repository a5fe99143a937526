"""The guardrail watch: post-launch uploads, the watched version's status, automatic rollback."""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, Field

from apportion.schemas.common import INT64_MAX, Answer, Reason, Timestamp
from apportion.schemas.plans import AutoRollback, RollbackEvidence

GuardrailStatus = Literal["holding", "breached", "inconclusive"]

# ---- requests ----------------------------------------------------------------------------------


class AutoRollbackIn(BaseModel):
    enabled: bool
    min_units_per_group: int = Field(
        1000,
        ge=1,
        le=INT64_MAX,
        description="plan-exposed and holdout members needed before it may act",
    )
    horizon: int | None = Field(
        None,
        ge=100,
        le=INT64_MAX,
        description="expected units per group; where the interval is tightest",
    )
    reason: Reason


# ---- answers -----------------------------------------------------------------------------------


class WatchMetric(Answer):
    """One metric's always-valid interval of plan minus holdout after an upload."""

    metric: str
    role: Literal["success", "guardrail"]
    estimate: float | None
    lower: float | None
    upper: float | None
    n_plan: int
    n_holdout: int
    alpha: float
    holdout_value: float | None
    status: str | None = Field(description="guardrails: holding, breached or inconclusive")
    threshold: float | None = Field(description="guardrails: the absolute threshold")


class RolledBack(Answer):
    """What the automatic rollback did: the version it went back to, or why it could not."""

    to_version: int | None = None
    error: str | None = None
    evidence: RollbackEvidence


class MonitorResult(Answer):
    plan: str
    version: int
    upload: int = Field(description="the upload's number for this version")
    rows: int
    rows_excluded: int
    members: int
    replaced: int
    holdout_flag_disagreement: float | None
    metrics: list[WatchMetric]
    rolled_back: RolledBack | None


class WatchPoint(Answer):
    upload: int
    at: Timestamp
    n_plan: int
    n_holdout: int
    estimate: float | None
    lower: float | None
    upper: float | None


class WatchedMetric(Answer):
    metric: str
    role: Literal["success", "guardrail"]
    status: str | None
    threshold: float | None
    history: list[WatchPoint]


class WatchView(Answer):
    plan: str
    version: int | None
    live_version: int | None
    auto_rollback: AutoRollback
    uploads: int
    members: int
    holdout_flag_disagreement: float | None
    rolled_back: RolledBack | None
    metrics: list[WatchedMetric]


class AutoRollbackView(Answer):
    plan: str
    auto_rollback: AutoRollback
