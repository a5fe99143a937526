"""Drafting a plan version: validate the request, build and solve its problem (`solve.py`), compute
the impact report inline or queue it as a job, and store the version with its audit entry."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from apportion.domain import Actor
from apportion.errors import InvalidInput
from apportion.optimize.solve import Solution
from apportion.schemas.plans import DraftIn, GuardrailSpec, HoldoutIn, PlanVersionView
from apportion.serving.index import new_salt
from apportion.store import audit
from apportion.store import jobs as job_repo
from apportion.store import plans as repo
from apportion.store.audit import canonical_json
from apportion.usecases import comparisons, jobs
from apportion.usecases.context import Services
from apportion.usecases.plans.solve import build, full_report, solve
from apportion.usecases.plans.source import model_context
from apportion.usecases.plans.views import get_version

INLINE_MAX_DRAWS = 1000  # larger impact reports run as a job


def _holdout(holdout: HoldoutIn, arm_keys: tuple[str, ...]) -> dict[str, Any]:
    """The holdout as stored: the request's share, its arm or else the control arm."""
    arm = holdout.arm if holdout.arm is not None else arm_keys[0]
    if arm not in arm_keys:
        raise InvalidInput(
            f"holdout arm '{arm}' is not an arm of the experiment {list(arm_keys)}",
            errors=[{"field": "holdout.arm", "problem": "unknown arm"}],
        )
    return {"share": float(holdout.share), "arm": arm}


def _allocation_view(x: np.ndarray, ctx: dict[str, Any], shares: np.ndarray) -> dict[str, Any]:
    rules = ctx["partition"].cohort_rules()
    arms = list(ctx["specs"].arm_keys)
    return {
        "arms": arms,
        "matrix": np.round(x, 12).tolist(),
        "cohorts": [
            {
                "id": c,
                "rule": rules[c],
                "share": float(shares[c]),
                "arms": {a: float(round(x[c, j], 12)) for j, a in enumerate(arms)},
            }
            for c in range(x.shape[0])
        ],
    }


def _solution_view(sol: Solution) -> dict[str, Any]:
    return {
        "objective": sol.objective,
        "guardrails": sol.guardrail_values,
        "fractional_cohorts": sol.fractional_cohorts,
        "binding": sol.binding,
        "iterations": sol.iterations,
        "seconds": round(sol.seconds, 4),
        "diagnostics": sol.diagnostics,
    }


def draft_version(
    services: Services, *, plan: str, command: DraftIn, actor: Actor
) -> PlanVersionView:
    """Draft a version from `command` (every default is the request model's own)."""
    ctx = model_context(services, command.model_id)
    specs = ctx["specs"]
    result = ctx["result"]
    c = ctx["partition"].n_cohorts
    shares = np.array([co["share"] for co in result["cohorts"]], dtype=np.float64)
    if command.traffic_mix is not None:
        mix = np.asarray(command.traffic_mix, dtype=np.float64)
        if mix.shape != (c,) or (mix < 0).any() or abs(mix.sum() - 1) > 1e-6:
            raise InvalidInput(
                f"traffic_mix must list {c} non-negative cohort shares summing to 1",
                errors=[{"field": "traffic_mix", "problem": f"expected {c} shares summing to 1"}],
            )
        shares = mix
    method = command.method
    spec: dict[str, Any] = {
        "model_id": command.model_id,
        "success_metric": command.success_metric,
        "method": method,
        "allocation": command.allocation,
        "baseline": command.baseline,
        "traffic_mix": command.traffic_mix,
        "draws": command.draws,
        "seed": command.seed,
        "notes": command.notes,
        "options": command.set_options() if command.options is not None else None,
        "guardrails": [GuardrailSpec(**g.model_dump()).model_dump() for g in command.guardrails],
        "holdout": None,  # checked after the problem, below
        "experiment": ctx["experiment"],
    }
    problem = build(services, plan=plan, ctx=ctx, spec=spec, shares=shares)
    spec["holdout"] = _holdout(command.holdout, specs.arm_keys)
    if command.comparison is not None:  # checked before the solve: a bad link stores nothing
        spec["comparison"] = comparisons.followed(
            services, model_id=ctx["model_id"], number=command.comparison,
            candidate=f"{ctx['model_method']}/{method}",
        )  # fmt: skip
    solved = solve(problem, spec)
    sol = solved.solution
    job_id = None
    if spec["draws"] <= INLINE_MAX_DRAWS:
        report = full_report(ctx, solved, spec)
    else:
        report = {"status": "pending", "calibration": solved.calibration_view}
    folds = services.settings.held_out_folds
    report["held_out"] = (
        {"status": "pending", "folds": folds}
        if folds
        else {"status": "off", "reason": "APPORTION_HELD_OUT_FOLDS is 0 on this server"}
    )
    alloc_view = _allocation_view(sol.allocation, ctx, shares)
    with services.db.write() as s:
        repo.ensure_pointer(session=s, plan=plan)  # level 2 (store/db.py): version numbers
        prev = repo.latest_version(session=s, plan=plan)
        salt = prev.salt if (prev is not None and not command.new_salt) else new_salt()
        version = repo.next_version(session=s, plan=plan)
        content = {"spec": spec, "allocation": alloc_view, "salt": salt}
        row = repo.add_version(
            session=s,
            plan=plan,
            version=version,
            model_id=ctx["model_id"],
            spec=spec,
            allocation=alloc_view,
            report={**report, "solution": _solution_view(sol)},
            salt=salt,
            content_hash=hashlib.sha256(canonical_json(content).encode()).hexdigest(),
            author=actor.name,
            author_owner=actor.identity,
        )
        if report.get("status") == "pending":
            job = job_repo.create_job(
                session=s, kind="report", payload={"plan": plan, "version": version}
            )
            job_id = job.id
            row.report = {**row.report, "job": f"/v1/jobs/{job.id}"}
        if folds:
            ho_job = job_repo.create_job(
                session=s, kind="held_out", payload={"plan": plan, "version": version}
            )
            job_id = job_id or ho_job.id
            row.report = {
                **row.report,
                "held_out": {**report["held_out"], "job": f"/v1/jobs/{ho_job.id}"},
            }
        audit.append(
            s,
            actor=actor,
            action="plan.draft",
            entity="plan_version",
            entity_id=f"{plan}/{version}",
            payload={
                "model_id": ctx["model_id"],
                "method": method,
                "allocation": spec["allocation"],
                "content_hash": row.content_hash,
                "objective": sol.objective,
                "binding": sol.binding,
            },
            reason=command.notes,
        )
    if job_id is not None:
        jobs.notify(services)
    return get_version(services, plan=plan, version=version)
