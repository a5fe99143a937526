"""Cohort models: the fit request, the queued fit, and the fitted model (rules, shares, estimates)."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field

from apportion.schemas.common import (
    INT64_MAX,
    Answer,
    JobStatus,
    OpenAnswer,
    Override,
    ShortText,
    Timestamp,
)
from apportion.schemas.experiments import Estimate

ModelMethod = Literal[
    "global", "segments", "causal_tree", "intersect", "two_model", "forest", "policy_tree"
]

# ---- requests ----------------------------------------------------------------------------------


class FitIn(BaseModel):
    """Fit a cohort model on one of the experiment's readouts."""

    readout_version: int = Field(ge=1, le=INT64_MAX)
    method: ModelMethod = "causal_tree"
    params: dict[str, Any] = Field(
        default_factory=dict, description="method parameters; see the README"
    )
    success_metric: ShortText | None = Field(
        None, description="the metric that orders categorical levels and may weigh more"
    )
    override_sample_ratio: Override | None = Field(
        None, description="fit although the sample-ratio check failed"
    )


# ---- answers -----------------------------------------------------------------------------------


class FitQueued(Answer):
    model_id: int
    version: int
    job_id: str
    job: str = Field(description="the job's URL")
    model: str = Field(description="the model's URL")
    status: Literal["queued"]


class Cohort(Answer):
    id: int
    rule: str = Field(description="readable rule of the cohort's members")
    share: float | None = Field(description="the cohort's share of the readout's units")
    n_estimation: dict[str, int] = Field(description="estimation-sample units per arm")
    estimates: dict[str, dict[str, Estimate]] = Field(description="per metric, per arm")


class ModelView(Answer):
    """A cohort model. Once fitted (status done) it has cohorts, arms, diagnostics, the resolved
    parameters and the partition; when the fit failed it has an error."""

    id: int
    experiment: str
    version: int
    method: str
    params: dict[str, Any]
    status: JobStatus
    job: str
    created_at: Timestamp
    created_by: str
    progress: float = Field(ge=0, le=1)
    cohorts: list[Cohort] | None = None
    arms: list[str] | None = None
    diagnostics: OpenAnswer | None = Field(None, description="method-specific fit diagnostics")
    resolved_params: dict[str, Any] | None = None
    partition: dict[str, Any] | None = Field(
        None, description="the feature-space partition the cohorts are made of"
    )
    error: str | None = None
