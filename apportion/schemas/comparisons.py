"""Method comparisons: decision methods (model x optimizer) evaluated on held-out folds."""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, Field, field_validator

from apportion.schemas.common import (
    INT64_MAX,
    Answer,
    JobStatus,
    Override,
    ShortText,
    Text,
    Timestamp,
)
from apportion.schemas.fitparams import MethodParams, for_method
from apportion.schemas.plans import GuardrailIn, GuardrailSpec
from apportion.schemas.reportparts import HeldOutMetric

# ---- requests ----------------------------------------------------------------------------------


class ComparisonGuardrailIn(GuardrailIn):
    confidence: float | None = Field(  # type: ignore[assignment]
        None, gt=0.5, lt=1, description="in (0.5, 1); default: the comparison's confidence"
    )


class ComparisonIn(BaseModel):
    """Compare decision methods on held-out folds of a readout."""

    readout_version: int | None = Field(
        None, ge=1, le=INT64_MAX, description="compare on this readout (or give model_id)"
    )
    model_id: int | None = Field(
        None,
        ge=1,
        le=INT64_MAX,
        description="compare on this model's readout; its parameters serve its method",
    )
    candidates: list[ShortText] | None = Field(
        None,
        max_length=100,
        description="'model/optimizer' names; default: every model method (but segments) "
        "times every optimizer",
    )
    success_metric: ShortText
    guardrails: list[ComparisonGuardrailIn] = Field(default_factory=list, max_length=50)
    confidence: float = Field(
        0.95, gt=0.5, lt=1, description="for every guardrail that states none"
    )
    folds: int | None = Field(
        None,
        ge=2,
        le=20,
        description="cross-fitting folds (stratified by arm); default 5, the cross-fitting's "
        "own (apportion/optimize/crossfit.py FOLDS), which the service fills in",
    )
    seed: int = Field(0, ge=0, le=INT64_MAX)
    params: dict[ShortText, dict[str, Any]] | None = Field(
        None, description="cohort model parameters per method, e.g. {'causal_tree': {...}}"
    )
    override_sample_ratio: Override | None = Field(
        None, description="compare although the readout failed the sample-ratio check"
    )
    notes: Text | None = Field(None, max_length=5000)


# ---- answers -----------------------------------------------------------------------------------


class ComparisonQueued(Answer):
    number: int
    comparison: str = Field(description="the comparison's URL")
    job_id: str
    job: str = Field(description="the job's URL")
    status: Literal["queued"]


class ComparisonSpec(Answer):
    """What was compared, as resolved when the comparison started."""

    readout_version: int
    model_id: int | None
    candidates: list[str]
    success_metric: str
    guardrails: list[GuardrailSpec]
    folds: int
    seed: int
    params: dict[str, MethodParams] = Field(
        description="per cohort model method, its resolved parameters (without seed and "
        "success metric: each fold's fit takes the comparison's)"
    )

    @field_validator("params", mode="before")
    @classmethod
    def _params_of_method(cls, value: Any) -> Any:
        if not isinstance(value, dict):
            return value
        return {m: for_method(m, p) for m, p in value.items()}


class CandidateRow(Answer):
    candidate: str = Field(description="'model/optimizer'")
    model: str
    optimizer: str
    metrics: dict[str, HeldOutMetric]
    folds_without_plan: int
    seconds: float
    status: Literal["verified", "unverified", "refused", "failed"] = Field(
        description="failed: the candidate's fit or plan was refused on some fold (see error)"
    )
    failing: list[str] = Field(description="guardrails whose held-out estimate breaks them")
    rank: int | None = Field(description="null for a failed candidate")
    error: str | None = Field(None, description="why a failed candidate left the comparison")


class ComparisonView(Answer):
    """A comparison: its spec and progress; when done, the held-out table and the recommendation;
    when failed, the error."""

    experiment: str
    number: int
    href: str
    readout_version: int
    model_id: int | None
    spec: ComparisonSpec
    status: JobStatus
    progress: float = Field(ge=0, le=1)
    job: str
    created_at: Timestamp
    created_by: str
    table: list[CandidateRow] | None = None
    recommended: str | None = None
    reason: str | None = None
    folds: int | None = None
    units: int | None = None
    seconds: float | None = None
    error: str | None = None


class ComparisonListed(Answer):
    number: int
    href: str
    status: JobStatus
    success_metric: str | None
    candidates: int = Field(description="how many candidates it compares")
    recommended: str | None
    created_at: Timestamp
    created_by: str


class ComparisonList(Answer):
    experiment: str
    comparisons: list[ComparisonListed]
