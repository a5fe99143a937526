"""Cohort models: the fit request, the queued fit, and the fitted model (rules, shares, estimates)."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, Field, model_validator

from apportion.schemas.common import (
    INT64_MAX,
    Answer,
    JobStatus,
    Override,
    ShortText,
    Timestamp,
)
from apportion.schemas.experiments import Estimate
from apportion.schemas.fitparams import MethodParams, for_method

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


# ---- the partition (apportion/stats/partition.py, `Partition.to_dict`) -------------------------


class PartitionFeature(Answer):
    key: str
    kind: Literal["numeric", "categorical"]
    levels: list[str] = Field(description="a categorical feature's levels at fit time")


class PartitionNode(Answer):
    """A node of the partition tree: a leaf (`feature` -1) names its cohort; a split sends
    `x < threshold` (numeric) or `left_levels` (categorical) left, and missing or unseen values
    to the default side."""

    feature: int = Field(description="index into `features`; -1 for a leaf")
    threshold: float | None = Field(description="a numeric split's threshold, else null")
    left_levels: list[str]
    right_levels: list[str]
    left: int = Field(description="left child's index; -1 for a leaf")
    right: int = Field(description="right child's index; -1 for a leaf")
    default_left: bool = Field(description="where missing and unseen values go")
    cohort: int = Field(description="a leaf's cohort; -1 for a split")


class PartitionView(Answer):
    """The feature-space partition the cohorts are made of (several leaves may share a cohort)."""

    features: list[PartitionFeature]
    nodes: list[PartitionNode] = Field(description="node 0 is the root")
    n_cohorts: int


# ---- fit diagnostics (apportion/stats/models.py, decision.py, pushdown.py) ---------------------


class TreeSplit(Answer):
    node: int
    feature: str
    gain: float | None = Field(description="the split's criterion gain (null when not scored)")
    depth: int


class _FitDiagnostics(Answer):
    n_cohorts: int
    n_leaves: int
    depth: int
    features_used: list[str]
    n_estimation: int = Field(description="units the estimates come from")
    n_structure: int = Field(description="units the partition was chosen on")
    seconds: float = Field(description="the fit's own time")
    job_seconds: float = Field(description="the fit job's time")
    engine: str | None = Field(
        None, description="the fit engine of a readout above the in-memory limit"
    )


class GlobalDiagnostics(_FitDiagnostics):
    method: Literal["global"]


class SegmentsDiagnostics(_FitDiagnostics):
    method: Literal["segments"]
    splits: list[TreeSplit]


class CausalTreeDiagnostics(_FitDiagnostics):
    method: Literal["causal_tree"]
    splits: list[TreeSplit]
    root_pair_variance: list[list[float]] = Field(
        description="the criterion's standardizers at the root (arm pairs x metrics)"
    )
    cv_penalty: float | None = Field(None, description="the chosen pruning penalty (with cv)")
    cv_grid: list[float] | None = Field(None, description="the penalties cross-validated")
    cv_scores: list[float | None] | None = Field(None, description="mean score per penalty")


class IntersectDiagnostics(_FitDiagnostics):
    method: Literal["intersect"]
    splits: list[TreeSplit]
    root_pair_variance: list[list[float]]
    pair_tree_leaves: list[int] = Field(description="leaves of each arm pair x metric tree")


class ArmMeansOutcomes(Answer):
    kind: Literal["arm_means"]
    folds: int


class BoostedOutcomes(Answer):
    kind: Literal["boosted"]
    folds: int
    out_of_fold_r2: list[float] = Field(description="per metric component")
    boosting_iterations: list[int] = Field(description="fewest and most iterations")


class ForestOutcomes(Answer):
    kind: Literal["forest"]
    folds: int
    trees: int
    tree_units: int
    leaves_per_tree: list[int] = Field(description="fewest and most leaves")
    splits_per_feature: dict[str, int]


OutcomeModel = Annotated[
    ArmMeansOutcomes | BoostedOutcomes | ForestOutcomes, Field(discriminator="kind")
]


class PricingRound(Answer):
    prices_used: dict[str, float] = Field(description="per guardrail, the price split on")
    thresholds_priced: dict[str, float]
    leaves: int
    structure_value: float
    prices_after: dict[str, float] = Field(description="the prices the round's partition gives")


class DecisionDiagnostics(_FitDiagnostics):
    method: Literal["two_model", "forest", "policy_tree"]
    splits: list[TreeSplit]
    outcome_model: OutcomeModel
    rounds: list[PricingRound]
    chosen_round: int
    guardrail_prices: dict[str, float]
    price_units: str


FitDiagnostics = Annotated[
    GlobalDiagnostics
    | SegmentsDiagnostics
    | CausalTreeDiagnostics
    | IntersectDiagnostics
    | DecisionDiagnostics,
    Field(discriminator="method"),
]


class FitParams(Answer):
    """The parameters a fit was started with, as stored."""

    method_params: MethodParams = Field(description="the method's parameters, resolved")
    success_metric: str | None


class ModelView(Answer):
    """A cohort model. Once fitted (status done) it has cohorts, arms, diagnostics, the resolved
    parameters and the partition; when the fit failed it has an error. The parameter models
    are picked by `method`."""

    id: int
    experiment: str
    version: int
    method: str
    params: FitParams
    status: JobStatus
    job: str
    created_at: Timestamp
    created_by: str
    progress: float = Field(ge=0, le=1)
    cohorts: list[Cohort] | None = None
    arms: list[str] | None = None
    diagnostics: FitDiagnostics | None = Field(None, description="method-specific diagnostics")
    resolved_params: MethodParams | None = None
    partition: PartitionView | None = Field(
        None, description="the feature-space partition the cohorts are made of"
    )
    error: str | None = None

    @model_validator(mode="before")
    @classmethod
    def _params_of_method(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        method, out = data.get("method"), dict(data)
        if "resolved_params" in out:
            out["resolved_params"] = for_method(method, out["resolved_params"])
        params = out.get("params")
        if isinstance(params, dict) and "method_params" in params:
            out["params"] = {**params, "method_params": for_method(method, params["method_params"])}
        return out
