"""Experiments (the declaration) and readouts (unit-level rows, summarized per arm and metric)."""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field

from apportion.schemas.common import (
    COLUMN_PATTERN,
    KEY_PATTERN,
    NO_NUL,
    Answer,
    JobLink,
    ShortText,
    Timestamp,
)

# ---- requests ----------------------------------------------------------------------------------


class ArmIn(BaseModel):
    key: str = Field(pattern=COLUMN_PATTERN)
    share: float = Field(gt=0, le=1, description="designed share of units")


class MetricIn(BaseModel):
    key: str = Field(pattern=COLUMN_PATTERN)
    kind: Literal["mean", "proportion", "ratio"]
    direction: Literal["higher", "lower"] = "higher"
    numerator: str | None = Field(
        None, pattern=COLUMN_PATTERN, description="ratio metrics: the numerator column"
    )
    denominator: str | None = Field(
        None, pattern=COLUMN_PATTERN, description="ratio metrics: the denominator column"
    )


class FeatureIn(BaseModel):
    key: str = Field(pattern=COLUMN_PATTERN)
    kind: Literal["numeric", "categorical"]
    levels: list[ShortText] | None = Field(
        None, max_length=10000, description="categorical: the allowed levels (optional)"
    )
    personalize: bool = Field(
        True,
        description="false: the feature never drives personalization (no cohort model splits on "
        "it or uses it, so no plan refers to it); `reason` then says why",
    )
    reason: ShortText | None = Field(
        None,
        description="why the feature is not used for personalization (with personalize: false)",
    )


class ExperimentIn(BaseModel):
    """Declare an experiment: its arms and designed shares, control arm, metrics and features."""

    key: str = Field(pattern=KEY_PATTERN)
    name: ShortText | None = None
    arms: list[ArmIn] = Field(min_length=2, max_length=20)
    control: ShortText
    metrics: list[MetricIn] = Field(min_length=1, max_length=50)
    features: list[FeatureIn] = Field(default_factory=list, max_length=200)


class ReadoutSourceIn(BaseModel):
    """A readout by reference: a Parquet dataset the service may read."""

    model_config = ConfigDict(extra="forbid")
    source: str = Field(
        min_length=1, max_length=2000, pattern=NO_NUL, description="file, directory or glob URI"
    )
    partitioning: Literal["hive"] | None = Field(
        None, description="'hive' when directories name partition columns (key=value)"
    )


# ---- answers -----------------------------------------------------------------------------------


class Declaration(Answer):
    """An experiment's declaration as stored (the validated `ExperimentIn`; its parts are the
    request's own models, so their defaults are stated once)."""

    key: str
    name: str | None = None
    arms: list[ArmIn]
    control: str
    metrics: list[MetricIn]
    features: list[FeatureIn] = Field(default_factory=list)


class SampleRatio(Answer):
    """Pearson chi-square test of the arm counts against the designed shares."""

    statistic: float | None
    df: int
    p_value: float | None
    flagged: bool = Field(description="p below the threshold: the split is not as designed")
    threshold: float
    observed: list[float]
    expected: list[float]


class ReadoutListed(Answer):
    version: int
    n_rows: int
    content_hash: str
    created_at: Timestamp
    sample_ratio: SampleRatio | None = None


class ExperimentView(Declaration):
    """An experiment: its declaration, who declared it, and its readouts."""

    created_at: Timestamp
    created_by: str
    readouts: list[ReadoutListed]


class Estimate(Answer):
    """Mean and standard error of one metric in one arm; against the control arm, the effect
    (difference of means) and its standard error (null in the control arm, or when undefined)."""

    mean: float | None
    se: float | None
    effect: float | None
    effect_se: float | None


class ArmSummary(Answer):
    arm: str
    n: int
    metrics: dict[str, Estimate] = Field(description="per metric key")


class ReadoutSummary(Answer):
    """Per arm and metric n, mean and standard error (delta method for ratios), and the
    sample-ratio check: what is stored with a readout."""

    n_rows: int
    arm_counts: dict[str, int]
    sample_ratio: SampleRatio
    arms: list[ArmSummary]
    control: str
    warnings: list[str] = Field(
        default_factory=list, description="about the upload, e.g. ignored columns"
    )


class ReadoutView(ReadoutSummary):
    experiment: str
    version: int
    content_hash: str
    content_type: str | None
    created_at: Timestamp
    created_by: str


class ReadoutImportQueued(JobLink):
    source: str
