"""The two jobs a draft may queue: the impact report of a large draw count (`report`), computed on
the same build-and-solve path as the draft and checked to reproduce its allocation, and the
cross-fitted held-out evaluation (`held_out`). Importing this module registers both handlers."""

from __future__ import annotations

from typing import Any

import numpy as np

from apportion.domain import Actor
from apportion.errors import InvalidInput
from apportion.optimize.crossfit import Candidate, comparison_workers, evaluate_candidates
from apportion.stats.table import UnitTable
from apportion.store import audit
from apportion.store import jobs as job_repo
from apportion.store import plans as repo
from apportion.store.tables import Job
from apportion.usecases import jobs
from apportion.usecases.context import Services
from apportion.usecases.plans.solve import build_and_solve, full_report, guardrails_of
from apportion.usecases.plans.source import model_context, rows_of

REPORT_ACTOR = Actor("report-job", "analyst")


def _evaluate(
    ctx: dict[str, Any],
    spec: dict[str, Any],
    seed: int,
    folds: int,
    progress: Any = None,
    workers: int = 1,
) -> dict[str, Any]:
    """Honest held-out figures: the whole pipeline (this model's method and
    parameters, the calibrated optimizer) is cross-fitted over folds of the readout, and each
    fold's plan is scored with doubly robust scores on the fold it never saw; see
    apportion/optimize/crossfit.py. They estimate the procedure's lift against all-control.
    It refits the model once per fold, so it runs as a job (`held_out`), never in a request;
    `workers`: the configured fold processes (APPORTION_COMPARISON_WORKERS, 0: min(2, cores))."""
    table: UnitTable = rows_of(ctx).table
    params = dict((ctx.get("model_params") or {}).get("method_params") or {})
    cand = Candidate(ctx["model_method"], spec["method"], spec["allocation"])
    out = evaluate_candidates(
        table,
        [cand],
        success=spec["success_metric"],
        guardrails=guardrails_of(spec),
        folds=folds,
        seed=seed,
        model_params={cand.model: params},
        progress=progress,
        workers=comparison_workers(workers, table.n),
    )
    row = out["candidates"][0]
    return {
        "status": "complete",
        "method": "cross-fitted: the model and the calibrated optimizer re-run without each fold, "
        "the fold's plan scored by doubly robust scores on that fold (against all-control)",
        "folds": out["folds"],
        "metrics": row["metrics"],
        "verdict": row["status"],
        "folds_without_plan": row["folds_without_plan"],
        "seconds": out["seconds"],
        **rows_of(ctx).describe(),
    }


@jobs.handler("report")
def _run_report(services: Services, job: Job, progress: Any) -> None:
    plan, version = job.payload["plan"], int(job.payload["version"])
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=version)
        spec = dict(row.spec)
        x = np.array(row.allocation["matrix"])
    ctx = model_context(services, int(spec["model_id"]))
    shares = np.array(
        spec["traffic_mix"]
        if spec.get("traffic_mix")
        else [co["share"] for co in ctx["result"]["cohorts"]]
    )
    solved = build_and_solve(services, plan=plan, ctx=ctx, spec=spec, shares=shares)
    if not np.allclose(solved.solution.allocation, x, atol=1e-9):
        raise RuntimeError(
            "re-solving the stored problem gave a different allocation; the report was not attached"
        )
    report = full_report(ctx, solved, spec, progress)
    with services.db.write() as s:  # lock order (store/db.py): plan, job row, version row
        repo.pointer(session=s, plan=plan, lock=True)
        job_repo.finish(session=s, job=job)
        row = repo.get_version(session=s, plan=plan, version=version, lock=True)
        if row.status != "draft":  # rejected while the job ran: immutable, nothing to attach
            return
        row.report = {
            **report,
            "held_out": row.report.get("held_out"),  # its own job writes it
            "solution": row.report.get("solution"),
            "job": f"/v1/jobs/{job.id}",
        }
        audit.append(
            s,
            actor=REPORT_ACTOR,
            action="plan.report",
            entity="plan_version",
            entity_id=f"{plan}/{version}",
            payload={"draws": spec["draws"], "job": job.id},
        )


@jobs.handler("held_out")
def _run_held_out(services: Services, job: Job, progress: Any) -> None:
    """The draft's cross-fitted held-out evaluation (`_evaluate`), written into its report."""
    plan, version = job.payload["plan"], int(job.payload["version"])
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=version)
        spec, status = dict(row.spec), row.status
        folds = int((row.report.get("held_out") or {}).get("folds") or 0)
    if status != "draft":  # rejected before the job ran: nothing to evaluate for a reviewer
        with services.db.write() as s:
            job_repo.finish(session=s, job=job)
        return
    ctx = model_context(services, int(spec["model_id"]))
    try:
        held_out = _evaluate(ctx, spec, int(spec["seed"]), folds, progress,
                             services.settings.comparison_workers)  # fmt: skip
    except InvalidInput as exc:  # e.g. too few rows for the folds: say why, keep the draft
        held_out = {"status": "unavailable", "error": exc.detail}
    _write_held_out(services, job, plan, version, {**held_out, "job": f"/v1/jobs/{job.id}"})


def _write_held_out(
    services: Services, job: Job, plan: str, version: int, held_out: dict[str, Any]
) -> None:
    with services.db.write() as s:  # lock order (store/db.py): plan, job row, version row
        repo.pointer(session=s, plan=plan, lock=True)
        job_repo.finish(session=s, job=job)
        if not _set_held_out(s, plan, version, held_out):
            return
        audit.append(
            s,
            actor=REPORT_ACTOR,
            action="plan.held_out",
            entity="plan_version",
            entity_id=f"{plan}/{version}",
            payload={"status": held_out["status"], "folds": held_out.get("folds"), "job": job.id},
        )


def _set_held_out(session: Any, plan: str, version: int, held_out: dict[str, Any]) -> bool:
    """Attach the figures to a draft; a version rejected meanwhile is immutable, and keeps
    its report as the reviewer saw it (approval waits for the evaluation, `decide`)."""
    row = repo.get_version(session=session, plan=plan, version=version, lock=True)
    if row.status != "draft":
        return False
    row.report = {**row.report, "held_out": held_out}
    return True


def _on_held_out_failed(session: Any, job: Job, message: str) -> None:
    """A failed or reclaimed evaluation says so in the report instead of staying pending (the job
    row is locked already, so this takes the version row alone: levels 3 then 4)."""
    plan, version = job.payload["plan"], int(job.payload["version"])
    _set_held_out(session, plan, version,
                  {"status": "failed", "error": message, "job": f"/v1/jobs/{job.id}"})  # fmt: skip


jobs.FAILURE_HOOKS["held_out"] = _on_held_out_failed
