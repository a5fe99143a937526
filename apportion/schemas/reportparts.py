"""The impact report's nested parts: the bootstrap's description, the calibration, the guardrail
prices, the solution's guardrail rows and the solver's diagnostics (apportion/optimize:
report.py, calibrate.py, sensitivity.py, solve.py). `plans.ImpactReport` carries them."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from apportion.schemas.common import Answer

Unit = Literal["absolute", "relative"]


class HeldOutMetric(Answer):
    lift: float | None = Field(description="held-out lift of the candidate's plans")
    se: float | None
    se_within: float | None = Field(description="standard error from the influence values")
    se_folds: float | None = Field(description="standard error from the fold-to-fold spread")
    folds: list[float | None] = Field(description="the lift on each fold")
    threshold_absolute: float | None = Field(None, description="guardrails: the threshold")
    probability_holds: float | None = Field(None, description="guardrails: P(within threshold)")


class BootstrapPart(Answer):
    """How the report's optimism and intervals were computed (parametric bootstrap)."""

    draws: int
    used: int = Field(description="draws whose re-optimization found a plan")
    seed: int
    reoptimization: str = Field(description="the optimizer each draw re-runs")
    sampling: str
    interval: str
    probability: str


class CalibrationGuardrail(Answer):
    """One guardrail's calibrated figures, in the threshold's units."""

    guardrail: str
    threshold: float
    unit: Unit
    confidence: float
    probability_holds: float = Field(description="calibrated probability that it holds")
    estimate: float
    selection_correction: float = Field(description="the bootstrap's selection optimism")
    corrected_estimate: float
    sd: float
    tightened_by: float = Field(description="how far the optimizer's allowance was tightened")


class Shrinkage(Answer):
    method: str
    mean_kept_share: float = Field(description="the mean share of a lift kept after shrinkage")


class CalibrationPart(Answer):
    """The draft's calibration: shrunk estimates, then allowances tightened until each
    guardrail's probability meets its confidence."""

    guardrails: list[CalibrationGuardrail]
    holds: bool = Field(description="every guardrail's probability meets its confidence")
    rounds: int
    draws: int
    seconds: float
    shrinkage: Shrinkage
    method: str


class PricePoint(Answer):
    offset: int = Field(description="steps from the chosen threshold (-2 .. 2)")
    threshold: float
    status: str = Field(
        description="chosen, solved, infeasible, or not allowed (the threshold would change sign)"
    )
    lift: float | None = Field(None, description="the success lift at this threshold, if solved")


class GuardrailPrice(Answer):
    """What one step more or less allowed harm on a guardrail is worth in success lift."""

    metric: str
    unit: Unit
    threshold: float
    step: float
    price: float | None = Field(description="success lift per unit of threshold; null if none")
    price_basis: str
    points: list[PricePoint]


class SolutionGuardrail(Answer):
    guardrail: str
    lift: float
    threshold: float
    unit: Unit
    confidence: float
    binding: bool
    sd: float
    slack: float = Field(description="allowed harm left, in the threshold's units")


class CalibrationRounds(Answer):
    rounds: int
    draws: int
    margin: list[float] = Field(description="per guardrail, the allowance taken off")


class _SolverDiagnostics(Answer):
    scaled_toward_baseline: float = Field(description="1 unless scaled toward the baseline")
    calibration: CalibrationRounds


class LPDiagnostics(_SolverDiagnostics):
    """The deterministic plan: one LP (mixed) or MILP (pure) by HiGHS."""

    solver: Literal["highs-ds", "milp"]
    status: int = Field(description="the solver's status code")


class CutDiagnostics(_SolverDiagnostics):
    """Chance and stochastic plans: the cone program solved with tangent cuts (Kelley)."""

    solver: Literal["kelley-lp", "kelley-milp"]
    cone_multiplier: list[float] = Field(description="per guardrail, the sd multiplier")
    cut_rounds: int
    cuts: int
    max_violation_before_scaling: float
    note: str | None = Field(None, description="a pure stochastic plan: how it was solved")


SolverDiagnostics = Annotated[LPDiagnostics | CutDiagnostics, Field(discriminator="solver")]
