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
from apportion.usecases.context import Services
from apportion.usecases.models import moments_of
from apportion.usecases.plans.source import live_allocation_on


def guardrails_of(body: dict[str, Any]) -> tuple[Guardrail, ...]:
    return tuple(
        Guardrail(
            metric=g["metric"],
            threshold=float(g["threshold"]),
            unit=g.get("unit", "absolute"),
            confidence=float(g.get("confidence", 0.95)),
        )
        for g in body.get("guardrails", [])
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


def _apply_calibration(report: dict[str, Any], sign: float, view: dict[str, Any], cal: Any) -> None:
    """Make the report's headline figures the calibrated ones: each guardrail's probability, its
    corrected lift and interval, and the success metric's corrected lift and interval. The
    earlier figures stay under *_uncalibrated keys."""
    by_metric = {g["guardrail"]: g for g in view["guardrails"]}
    for row in report.get("metrics", []):
        if row.get("role") == "guardrail" and row["metric"] in by_metric:
            g = by_metric[row["metric"]]
            row["probability_holds_uncalibrated"] = row.get("probability_holds")
            row["probability_holds"] = g["probability_holds"]
            row["probability_holds_corrected"] = g["probability_holds"]
            row["corrected_lift"] = g["corrected_estimate"]
            row["interval"] = [g["corrected_estimate"] - Z95 * g["sd"],
                               g["corrected_estimate"] + Z95 * g["sd"]]  # fmt: skip
        elif row.get("role") == "success" and row.get("lift") is not None:
            corrected = row["lift"] + sign * cal.success_optimism  # optimism is better-is-larger
            sd = max(cal.success_sd, row.get("se") or 0.0)
            row["corrected_lift"] = corrected
            row["interval"] = [corrected - Z95 * sd, corrected + Z95 * sd]
    report["calibration"] = view


def full_report(
    ctx: dict[str, Any], solved: Solved, spec: dict[str, Any], progress: Any = None
) -> dict[str, Any]:
    """The impact report of the solved draft, on the shrunk problem, with the calibrated figures
    as its headline and arm keys where the optimizer knows arm indexes."""
    problem, sol = solved.shrunk, solved.solution
    draws, seed, options = int(spec["draws"]), int(spec["seed"]), spec.get("options") or {}
    on_draw = (lambda done, total: progress(done / max(total, 1))) if progress is not None else None
    report = impact_report(problem, sol, draws=draws, seed=seed, progress=on_draw)
    sign = 1.0 if problem.metric(problem.success).direction == "higher" else -1.0
    _apply_calibration(report, sign, solved.calibration_view, solved.calibration)
    arm_keys = ctx["specs"].arm_keys
    for row in report.get("comparison", []):  # the optimizer knows arm indexes; readers want keys
        if isinstance(row.get("arm"), int):
            row["arm_key"] = arm_keys[row["arm"]]
            if str(row.get("plan", "")).startswith("arm "):
                row["plan"] = f"{arm_keys[row['arm']]} for everyone"
    return {
        **report,
        "status": "complete",
        "guardrail_prices": guardrail_sensitivity(problem, sol, seed=seed, options=options),
        "method": spec["method"],
        "allocation": spec["allocation"],
    }
