"""Plans: the draft request (with its defaults, stated once here), solver options, plan versions,
the impact report, the diff against the live version, the lifecycle requests and answers.

About 30 small models in one module (over 400 lines) on purpose: the impact report's parts and the
version that carries it are read together by the routes, the client and the review page, and a
split by size would scatter one answer's shape over several files."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
)

from apportion.schemas.common import (
    INT64_MAX,
    Answer,
    OpenAnswer,
    Reason,
    ShortText,
    Text,
    Timestamp,
)
from apportion.schemas.reportparts import (
    BootstrapPart,
    CalibrationPart,
    GuardrailPrice,
    HeldOutMetric,
    SolutionGuardrail,
    SolverDiagnostics,
)

PlanMethod = Literal["deterministic", "chance", "stochastic"]
AllocationKind = Literal["mixed", "pure"]
BaselineKind = Literal["control", "best_arm", "live"]
VersionStatus = Literal["draft", "approved", "rejected", "active", "superseded"]

# ---- solver options ----------------------------------------------------------------------------
# Declared per plan method with bounds: anything else is a 422. The bounds keep one request's work
# within seconds on a small machine and every value inside the range its solver is defined on: the
# cutting-plane loop of `chance` (and of pure `stochastic` plans) takes at most `max_iter` rounds;
# stochastic approximation runs `iterations` steps of `batch` draws (about 66 microseconds a step
# at the default batch, so the largest run is a few seconds). Defaults live with the solvers
# (apportion/optimize); only the options a caller sets are passed on.


class _Options(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, strict=True)

    presolve: bool | None = Field(None, description="let HiGHS presolve the LP (default false)")
    bind_tol: float | None = Field(
        None, gt=0, le=1, description="how close to its threshold a guardrail counts as binding"
    )


class DeterministicOptions(_Options):
    pass


class ChanceOptions(_Options):
    tol: float | None = Field(
        None, gt=0, le=0.1, description="cutting planes: allowed violation (default 0.001)"
    )
    max_iter: int | None = Field(None, ge=1, le=200, description="cutting-plane rounds (60)")


class StochasticOptions(ChanceOptions):
    tol: float | None = Field(
        None, gt=0, le=1, description="allowed normalized violation (default 0.01; 0.001 pure)"
    )
    iterations: int | None = Field(
        None, ge=100, le=100_000, description="stochastic-approximation steps (default 40000)"
    )
    batch: int | None = Field(None, ge=2, le=4096, description="draws per step (default: auto)")
    noise_allowance: float | None = Field(None, ge=0, le=10, description="standard errors (2)")
    start: float | None = Field(None, ge=0, lt=1, description="share of steps before averaging")
    step: float | None = Field(None, gt=0, le=1000, description="step-size multiplier (10)")
    sampler: Literal["marginal", "cells"] | None = None
    repair: bool | None = Field(None, description="scale toward the baseline until CVaR holds")
    tail: float | None = Field(
        None, ge=0.01, le=1, description="CVaR tail share (default 1 - confidence; 1 = the mean)"
    )


OPTIONS_BY_METHOD: dict[str, type[_Options]] = {
    "deterministic": DeterministicOptions,
    "chance": ChanceOptions,
    "stochastic": StochasticOptions,
}

SolverOptions = DeterministicOptions | ChanceOptions | StochasticOptions


def options_for(method: str, options: Any) -> _Options | None:
    """`options` checked against `method`'s model; a ValueError naming every bad option otherwise
    (inside a pydantic validator it becomes a 422 on the field `options`)."""
    if options is None or isinstance(options, _Options):
        return options
    model = OPTIONS_BY_METHOD.get(method, StochasticOptions)
    try:
        return model.model_validate(options)
    except ValidationError as exc:
        parts = []
        for e in exc.errors():
            name = ".".join(str(p) for p in e["loc"]) or "options"
            if e["type"] == "extra_forbidden":
                known = ", ".join(sorted(model.model_fields))
                parts.append(f"'{name}' is not an option of method '{method}' (known: {known})")
            else:
                parts.append(f"'{name}': {e['msg']}")
        raise ValueError("; ".join(parts)) from None


def _options_of_method(value: Any, info: ValidationInfo) -> Any:
    return options_for(info.data.get("method", "chance"), value)


# a model's `options` field, checked against the model's `method` (declared before it)
MethodOptions = Annotated[SolverOptions | None, BeforeValidator(_options_of_method)]


# ---- requests ----------------------------------------------------------------------------------


class GuardrailIn(BaseModel):
    metric: ShortText
    threshold: float = Field(
        allow_inf_nan=False,
        description="allowed change against the baseline, signed in the harmful direction",
    )
    unit: Literal["absolute", "relative"] = Field(
        "absolute", description="absolute: the metric's units; relative: per cent of baseline"
    )
    confidence: float = Field(0.95, gt=0.5, lt=1, description="in (0.5, 1)")


class HoldoutIn(BaseModel):
    share: float = Field(0.05, ge=0, lt=1)
    arm: ShortText | None = Field(None, description="default: the control arm")


class DraftIn(BaseModel):
    """Draft a plan version from a cohort model. Every default of a draft is stated here."""

    model_id: int = Field(ge=1, le=INT64_MAX)
    success_metric: ShortText
    guardrails: list[GuardrailIn] = Field(default_factory=list, max_length=50)
    method: PlanMethod = "chance"
    allocation: AllocationKind = "mixed"
    holdout: HoldoutIn = Field(default_factory=HoldoutIn)
    baseline: BaselineKind = "control"
    traffic_mix: list[Annotated[float, Field(ge=0, allow_inf_nan=False)]] | None = Field(
        None,
        max_length=100_000,
        description="per-cohort shares of the traffic to plan for (default: the model's)",
    )
    draws: int = Field(
        200,
        ge=0,
        le=20000,
        description="bootstrap draws of the impact report (above 1000 it runs as a job)",
    )
    seed: int = Field(0, ge=0, le=INT64_MAX)
    new_salt: bool = Field(
        False, description="re-randomize everyone instead of keeping the plan's salt"
    )
    notes: Text | None = Field(None, max_length=5000)
    comparison: int | None = Field(
        None,
        ge=1,
        le=INT64_MAX,
        description="the number of the experiment's comparison this draft's method follows; "
        "it must be done and have compared this model's method with this optimizer",
    )
    options: MethodOptions = Field(
        None, description="solver options; which ones depends on the method (422 otherwise)"
    )

    def set_options(self) -> dict[str, Any]:
        """The solver options the caller set (none unset), as the solvers take them."""
        return self.options.model_dump(exclude_none=True) if self.options else {}


class DecisionIn(BaseModel):
    reason: Reason


class ActivateIn(BaseModel):
    version: int = Field(ge=1, le=INT64_MAX)
    reason: Reason
    expected_revision: int = Field(
        ge=0, le=INT64_MAX, description="the plan's revision you saw; 409 when it moved"
    )


class RollbackIn(BaseModel):
    reason: Reason
    to_version: int | None = Field(
        None, ge=1, le=INT64_MAX, description="default: the version live before the current one"
    )
    expected_revision: int | None = Field(None, ge=0, le=INT64_MAX)


# ---- answers: the stored spec and allocation --------------------------------------------------


class GuardrailSpec(Answer):
    """A guardrail as resolved and stored (every default filled in)."""

    metric: str
    threshold: float
    unit: Literal["absolute", "relative"]
    confidence: float


class Holdout(Answer):
    share: float
    arm: str


class FollowedComparison(Answer):
    """The comparison a plan draft follows, as the draft's spec keeps it."""

    number: int
    href: str
    candidate: str
    recommended: str | None
    follows_recommendation: bool
    rank: int | None
    status: str | None


class PlanSpec(OpenAnswer):
    """What a version was drafted from, as stored (defaults resolved)."""

    model_id: int
    success_metric: str
    method: PlanMethod
    allocation: AllocationKind
    baseline: BaselineKind
    traffic_mix: list[float] | None
    draws: int
    seed: int
    notes: str | None
    options: MethodOptions = Field(
        description="the solver options the caller set; which ones depends on the method"
    )
    guardrails: list[GuardrailSpec]
    holdout: Holdout
    experiment: str
    comparison: FollowedComparison | None = Field(
        None, description="the comparison the draft follows"
    )


class AllocationCohort(Answer):
    id: int
    rule: str
    share: float = Field(description="the cohort's share of the traffic planned for")
    arms: dict[str, float] = Field(description="per arm, the share of the cohort it gets")


class Allocation(Answer):
    arms: list[str]
    matrix: list[list[float]] = Field(description="cohorts x arms, each row summing to 1")
    cohorts: list[AllocationCohort]


# ---- answers: the impact report ---------------------------------------------------------------


class ReportMetric(OpenAnswer):
    """One metric's row of the impact report: the plan's lift against the baseline, its optimism
    (selection bias, by bootstrap re-optimization), the corrected lift and interval; for a
    guardrail also its threshold and the probability that it holds."""

    metric: str
    role: Literal["success", "guardrail"]
    lift: float | None
    se: float | None
    optimism: float | None = None
    optimism_se: float | None = None
    corrected_lift: float | None = None
    interval: list[float | None] | None = None
    reoptimized_sd: float | None = None
    threshold: float | None = None
    unit: Literal["absolute", "relative"] | None = None
    confidence: float | None = None
    probability_holds: float | None = None
    probability_holds_corrected: float | None = None
    probability_holds_uncalibrated: float | None = None


class ReportComparisonRow(OpenAnswer):
    """The plan against simple alternatives: each arm for everyone, the best single arm that
    meets the guardrails, and this plan."""

    plan: str
    available: bool
    arm: int | None = None
    arm_key: str | None = None
    lifts: dict[str, float | None] | None = None
    holds: dict[str, bool] | None = None


class HeldOutReading(Answer):
    """How the held-out figure relates to the projection (worked out when the version is read):
    what the held-out figure measures, both success-lift intervals at 95 %, and whether the
    held-out one lies entirely on the worse side of the projected one."""

    measures: str = Field(description="what the held-out figure measures, in one sentence")
    success_metric: str
    held_out_interval: list[float] = Field(
        description="held-out success lift +/- 1.96 se (normal), against all-control"
    )
    projected_interval: list[float] | None = Field(
        None, description="the report's corrected success lift interval; null while pending"
    )
    comparable: bool = Field(
        description="the projection is against all-control too (baseline 'control'), so the "
        "two intervals are on one scale"
    )
    short_of_projection: bool = Field(
        description="the held-out interval lies entirely below the projected one (above it "
        "for a lower-is-better success metric)"
    )
    warning: str | None = Field(None, description="set when short_of_projection")


class HeldOutPart(OpenAnswer):
    """The draft's cross-fitted held-out evaluation (a job of its own)."""

    status: str = Field(description="pending, complete, unavailable, off or not run")
    folds: int | None = None
    job: str | None = None
    reason: str | None = Field(None, description="why it is off")
    error: str | None = Field(None, description="why it is unavailable or did not run")
    method: str | None = Field(None, description="when complete: what was cross-fitted")
    metrics: dict[str, HeldOutMetric] | None = Field(None, description="when complete")
    verdict: Literal["verified", "unverified", "refused", "failed"] | None = Field(
        None, description="when complete: the held-out status of the draft's method"
    )
    folds_without_plan: int | None = None
    seconds: float | None = None
    rows_used: int | None = Field(None, description="readout rows the evaluation used")
    readout_rows: int | None = None
    sampled: bool | None = Field(None, description="rows_used is a uniform sample")
    reading: HeldOutReading | None = Field(
        None, description="when complete: how it relates to the projection"
    )


class SolutionPart(OpenAnswer):
    objective: float | None
    guardrails: list[SolutionGuardrail] | None
    fractional_cohorts: int | None = Field(description="cohorts whose arms are mixed")
    binding: list[str] | None
    iterations: int | None
    seconds: float
    diagnostics: SolverDiagnostics | None


class ImpactReport(OpenAnswer):
    """A plan version's impact report. `status` is complete, or pending while its job (`job`)
    computes the bootstrap; the calibration, held-out and solution parts are there in both."""

    status: Literal["complete", "pending"]
    method: str | None = None
    allocation: str | None = None
    allocation_kind: str | None = None
    baseline: str | None = None
    metrics: list[ReportMetric] | None = None
    comparison: list[ReportComparisonRow] | None = None
    bootstrap: BootstrapPart | None = None
    calibration: CalibrationPart | None = None
    guardrail_prices: list[GuardrailPrice] | None = None
    held_out: HeldOutPart | None = None
    solution: SolutionPart | None = None
    job: str | None = Field(None, description="the report job's URL while pending")

    def metric(self, key: str) -> ReportMetric | None:
        return next((m for m in self.metrics or [] if m.metric == key), None)


# ---- answers: versions and plans ---------------------------------------------------------------


class DiffCohort(Answer):
    id: int
    rule: str
    members: int
    share_changed: float


class VersionDiff(OpenAnswer):
    """Share of the readout's members whose arm would change against the live version."""

    live_version: int
    members: int = Field(description="members compared (a uniform sample of a large readout)")
    share_changed: float
    readout_rows: int = Field(description="the readout's rows")
    sampled: bool = Field(description="members are a uniform sample of the readout's rows")
    weighted_by: str
    cohorts: list[DiffCohort]


class PlanVersionView(Answer):
    plan: str
    version: int
    status: VersionStatus
    live: bool
    model_id: int
    author: str
    author_owner: str | None
    created_at: Timestamp
    decided_by: str | None
    decided_at: Timestamp | None
    decision_reason: str | None
    content_hash: str
    salt_fingerprint: str = Field(description="the first 12 hex digits of the salt's SHA-256")
    spec: PlanSpec
    allocation: Allocation
    report: ImpactReport
    diff: VersionDiff | None = Field(
        None, description="against the live version (null when none, or this one, is live)"
    )


class PlanVersionListed(Answer):
    version: int
    status: VersionStatus
    model_id: int
    author: str
    created_at: Timestamp
    method: str | None
    objective: float | None


class Activation(Answer):
    version: int
    revision: int
    kind: Literal["activate", "rollback"]
    actor: str
    reason: str | None
    at: Timestamp


class AutoRollback(Answer):
    """The plan's automatic-rollback setting; a plan starts with only `enabled: false`."""

    enabled: bool = False
    min_units_per_group: int | None = None
    horizon: int | None = None


class PlanView(Answer):
    plan: str
    live_version: int | None
    revision: int
    auto_rollback: AutoRollback | None
    versions: list[PlanVersionListed]
    activations: list[Activation]


class PlanListed(Answer):
    plan: str
    live_version: int | None
    revision: int
    versions: int = Field(description="how many versions")
    latest: int | None
    latest_status: VersionStatus | None


class PlanList(Answer):
    plans: list[PlanListed]


class GroupUnits(Answer):
    plan: int = Field(description="plan-exposed members")
    holdout: int = Field(description="holdout members")


class RollbackEvidence(Answer):
    """Why the guardrail watch rolled a plan back: the worst breached guardrail's always-valid
    interval of plan minus holdout, and the upload that showed it (apportion/usecases/watch.py)."""

    guardrail: str
    interval: list[float | None] = Field(description="lower and upper bound")
    estimate: float | None
    threshold: float | None = Field(description="the absolute threshold")
    units: GroupUnits
    alpha: float
    upload: int = Field(description="the upload's number for the version")
    uploaded_by: str = Field(description="the uploading key's owner")
    uploaded_with_key: str = Field(description="the uploading key's name")
    breached: list[str] = Field(description="every guardrail breached with enough units")


class Switched(Answer):
    """An activation or rollback: the versions it moved between and the plan's new revision."""

    from_version: int | None
    to_version: int
    revision: int
    evidence: RollbackEvidence | None = Field(None, description="an automatic rollback's evidence")
