"""The one path from a plan spec to a solved, calibrated plan and its impact report, shared by
drafting (`drafting.py`) and the report job (`report_jobs.py`), so a report computed later is
the report of the very problem the draft solved."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from apportion.optimize.calibrate import Z95, calibrated_solve, calibration_view
from apportion.optimize.problem import AllocationProblem, Guardrail, build_problem
from apportion.optimize.report import impact_report
from apportion.optimize.sensitivity import guardrail_sensitivity
from apportion.optimize.solve import Solution
from apportion.schemas.plans import GuardrailSpec, ImpactReport, ReportMetric
from apportion.schemas.reportparts import CalibrationPart
from apportion.usecases.context import Services
from apportion.usecases.models import moments_of
from apportion.usecases.plans.source import live_allocation_on


def guardrails_of(spec: dict[str, Any]) -> tuple[Guardrail, ...]:
    """A stored spec's guardrails (every default already resolved), validated as read."""
    return tuple(
        Guardrail(**GuardrailSpec.model_validate(g).model_dump())
        for g in spec.get("guardrails") or []
    )


@dataclass(frozen=True, slots=True)
class Solved:
    """A solved draft: the problem as built, the calibrated solution, the shrunk problem its
    report is computed on, and the calibration (its view for readers and the raw figures)."""

    problem: AllocationProblem
    solution: Solution
    shrunk: AllocationProblem
    calibration_view: dict[str, Any]
    calibration: Any


def build(
    services: Services, *, plan: str, ctx: dict[str, Any], spec: dict[str, Any], shares: np.ndarray
) -> AllocationProblem:
    """The optimization problem of `spec` (success metric, guardrails, baseline) over the model's
    cohort moments weighted by `shares`."""
    live_alloc = live_allocation_on(services, plan, ctx) if spec["baseline"] == "live" else None
    return build_problem(
        shares=shares,
        moments=moments_of(ctx["result"]),
        metrics=ctx["specs"].metrics,
        success=spec["success_metric"],
        guardrails=guardrails_of(spec),
        baseline=spec["baseline"],
        live=live_alloc,
    )


def solve(problem: AllocationProblem, spec: dict[str, Any]) -> Solved:
    """The draft's plan: shrunk estimates, tightened until every guardrail's calibrated
    probability meets its confidence (apportion/optimize/calibrate.py); Infeasible otherwise."""
    sol, cal, shrunk, info = calibrated_solve(
        problem, spec["method"], spec["allocation"], seed=int(spec["seed"]),
        options=spec.get("options") or {},
    )  # fmt: skip
    return Solved(problem, sol, shrunk, calibration_view(shrunk, cal, info), cal)


def build_and_solve(
    services: Services, *, plan: str, ctx: dict[str, Any], spec: dict[str, Any], shares: np.ndarray
) -> Solved:
    return solve(build(services, plan=plan, ctx=ctx, spec=spec, shares=shares), spec)


def _calibrated_row(
    row: ReportMetric, sign: float, by_metric: dict[str, Any], cal: Any
) -> ReportMetric:
    if row.role == "guardrail" and row.metric in by_metric:
        g = by_metric[row.metric]
        centre, sd = g["corrected_estimate"], g["sd"]
        return row.model_copy(update={
            "probability_holds_uncalibrated": row.probability_holds,
            "probability_holds": g["probability_holds"],
            "probability_holds_corrected": g["probability_holds"],
            "corrected_lift": centre,
            "interval": [centre - Z95 * sd, centre + Z95 * sd],
        })  # fmt: skip
    if row.role == "success" and row.lift is not None:
        corrected = row.lift + sign * cal.success_optimism  # optimism is better-is-larger
        sd = max(cal.success_sd, row.se or 0.0)
        return row.model_copy(update={
            "corrected_lift": corrected, "interval": [corrected - Z95 * sd, corrected + Z95 * sd],
        })  # fmt: skip
    return row


def _apply_calibration(
    report: ImpactReport, sign: float, view: dict[str, Any], cal: Any
) -> ImpactReport:
    """The report with the calibrated figures as its headline: each guardrail's probability, its
    corrected lift and interval, and the success metric's corrected lift and interval. The
    earlier guardrail probability stays under `probability_holds_uncalibrated`."""
    by_metric = {g["guardrail"]: g for g in view["guardrails"]}
    rows = [_calibrated_row(r, sign, by_metric, cal) for r in report.metrics or []]
    calibration = CalibrationPart.model_validate(view)
    return report.model_copy(update={"metrics": rows, "calibration": calibration})


def _with_arm_keys(report: ImpactReport, arm_keys: tuple[str, ...]) -> ImpactReport:
    """The optimizer knows arms by index; readers want their keys."""
    rows = []
    for row in report.comparison or []:
        if row.arm is not None:
            update: dict[str, Any] = {"arm_key": arm_keys[row.arm]}
            if row.plan.startswith("arm "):
                update["plan"] = f"{arm_keys[row.arm]} for everyone"
            row = row.model_copy(update=update)
        rows.append(row)
    return report.model_copy(update={"comparison": rows})


def full_report(
    ctx: dict[str, Any], solved: Solved, spec: dict[str, Any], progress: Any = None
) -> dict[str, Any]:
    """The impact report of the solved draft, on the shrunk problem, with the calibrated figures
    as its headline and arm keys where the optimizer knows arm indexes."""
    problem, sol = solved.shrunk, solved.solution
    draws, seed, options = int(spec["draws"]), int(spec["seed"]), spec.get("options") or {}
    on_draw = (lambda done, total: progress(done / max(total, 1))) if progress is not None else None
    figures = impact_report(problem, sol, draws=draws, seed=seed, progress=on_draw)
    report = ImpactReport.model_validate({
        **figures,
        "status": "complete",
        "guardrail_prices": guardrail_sensitivity(problem, sol, seed=seed, options=options),
        "method": spec["method"],
        "allocation": spec["allocation"],
    })  # fmt: skip
    sign = 1.0 if problem.metric(problem.success).direction == "higher" else -1.0
    report = _apply_calibration(report, sign, solved.calibration_view, solved.calibration)
    report = _with_arm_keys(report, ctx["specs"].arm_keys)
    return report.model_dump(mode="json", exclude_unset=True)
