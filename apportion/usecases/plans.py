"""Plan versions: drafting (optimize + impact report), review, activation, rollback, and the diff
against the live version. Every transition commits with its audit entry; the serving index is
swapped after the commit."""

from __future__ import annotations

import hashlib
import threading
from typing import Any

import numpy as np

from apportion.errors import Forbidden, InvalidInput, InvalidTransition, NotFound
from apportion.optimize.calibrate import Z95, calibrated_solve, calibration_view
from apportion.optimize.crossfit import Candidate, evaluate_candidates
from apportion.optimize.problem import Guardrail, build_problem
from apportion.optimize.report import impact_report
from apportion.optimize.sensitivity import guardrail_sensitivity
from apportion.optimize.solve import Solution
from apportion.serving.columns import lookup_columns
from apportion.serving.index import new_salt
from apportion.stats.partition import Partition
from apportion.stats.table import UnitTable
from apportion.store import audit
from apportion.store import experiments as exp_repo
from apportion.store import jobs as job_repo
from apportion.store import models as model_repo
from apportion.store import plans as repo
from apportion.store.audit import Actor, canonical_json
from apportion.store.db import utcnow
from apportion.store.tables import Job
from apportion.usecases import comparisons, jobs, live
from apportion.usecases.cellstats import Rows, readout_rows
from apportion.usecases.context import Services
from apportion.usecases.experiments import specs_of
from apportion.usecases.models import moments_of

INLINE_MAX_DRAWS = 1000  # larger impact reports run as a job
ACTIVATABLE = ("approved", "superseded")


# ---- loading what a plan is built from --------------------------------------------------------


def _model_context(services: Services, model_id: int) -> dict[str, Any]:
    with services.db.read() as s:
        row = model_repo.get_model(session=s, model_id=model_id)
        if row.status != "done":
            raise InvalidInput(
                f"cohort model {model_id} is {row.status}; a plan needs a fitted model",
                errors=[{"field": "model_id", "problem": f"model is {row.status}"}],
            )
        exp = s.get(exp_repo.Experiment, row.experiment_id)
        assert exp is not None
        result, declaration, readout_id = row.result, exp.declaration, row.readout_id
        model_method, model_params = row.method, dict(row.params or {})
    return {
        "result": result,
        "specs": specs_of(declaration),
        "load_rows": lambda: readout_rows(services, readout_id=readout_id, seed=0),
        "experiment": declaration["key"],
        "partition": Partition.from_dict(result["partition"]),
        "model_id": model_id,
        "model_method": model_method,
        "model_params": model_params,
    }


def _rows(ctx: dict[str, Any]) -> Rows:
    """The readout's rows, read on first use: all of them, or above the in-memory limit a uniform
    sample of that many (the draft's estimates come from the model's stored cell moments, never
    from rows; only the held-out evaluation, the live baseline and the diff against live read
    rows, and they say when they ran on a sample)."""
    if "rows" not in ctx:
        ctx["rows"] = ctx["load_rows"]()
    return ctx["rows"]


def table_columns(table: UnitTable) -> dict[str, list[Any]]:
    """Feature columns as the lookup takes them."""
    return lookup_columns(table.features, table.feature_values)


def _live_allocation_on(services: Services, plan: str, ctx: dict[str, Any]) -> np.ndarray:
    """The live version's arm mix re-expressed in this model's cohorts: per readout row the live
    cohort's shares, averaged within each new cohort."""
    compiled = live.load_compiled(services.db, plan)
    if compiled is None:
        raise InvalidInput(
            f"baseline 'live' needs a live version of plan '{plan}'; it has none",
            errors=[{"field": "baseline", "problem": "no live version"}],
        )
    table: UnitTable = _rows(ctx).table
    live_cohort = np.array(
        [a.cohort for a in compiled.assign_columns(list(table.unit_ids), table_columns(table))]
    )
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=compiled.version)
        live_matrix = np.array(row.allocation["matrix"])
    if tuple(row.allocation["arms"]) != tuple(ctx["specs"].arm_keys):
        raise InvalidInput(
            "baseline 'live' needs the live version to use the same arms",
            errors=[{"field": "baseline"}],
        )
    new_cohort, _ = ctx["partition"].route(table.feature_values, table.features)
    c = ctx["partition"].n_cohorts
    out = np.zeros((c, live_matrix.shape[1]))
    np.add.at(out, new_cohort, live_matrix[live_cohort])
    counts = np.bincount(new_cohort, minlength=c).astype(float)
    out[counts > 0] /= counts[counts > 0, None]
    out[counts == 0, 0] = 1.0
    return out


# ---- drafting ----------------------------------------------------------------------------------


def _guardrails(body: dict[str, Any]) -> tuple[Guardrail, ...]:
    return tuple(
        Guardrail(
            metric=g["metric"],
            threshold=float(g["threshold"]),
            unit=g.get("unit", "absolute"),
            confidence=float(g.get("confidence", 0.95)),
        )
        for g in body.get("guardrails", [])
    )


def _holdout(body: dict[str, Any], arm_keys: tuple[str, ...]) -> dict[str, Any]:
    h = {"share": 0.05, "arm": arm_keys[0], **(body.get("holdout") or {})}
    if h["arm"] not in arm_keys:
        raise InvalidInput(
            f"holdout arm '{h['arm']}' is not an arm of the experiment {list(arm_keys)}",
            errors=[{"field": "holdout.arm", "problem": "unknown arm"}],
        )
    return {"share": float(h["share"]), "arm": h["arm"]}


def _evaluate(
    ctx: dict[str, Any], spec: dict[str, Any], seed: int, folds: int, progress: Any = None
) -> dict[str, Any]:
    """Honest held-out figures (issue 11 item 2): the whole pipeline (this model's method and
    parameters, the calibrated optimizer) is cross-fitted over folds of the readout, and each
    fold's plan is scored with doubly robust scores on the fold it never saw; see
    apportion/optimize/crossfit.py. They estimate the procedure's lift against all-control.
    It refits the model once per fold, so it runs as a job (`held_out`), never in a request."""
    table: UnitTable = _rows(ctx).table
    params = dict((ctx.get("model_params") or {}).get("method_params") or {})
    cand = Candidate(ctx["model_method"], spec["method"], spec["allocation"])
    out = evaluate_candidates(
        table,
        [cand],
        success=spec["success_metric"],
        guardrails=_guardrails(spec),
        folds=folds,
        seed=seed,
        model_params={cand.model: params},
        progress=progress,
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
        **_rows(ctx).describe(),
    }


def _calibrated(problem: Any, method: str, allocation: str, seed: int, options: dict):
    """The draft's plan: shrunk estimates, tightened until every guardrail's calibrated
    probability meets its confidence (apportion/optimize/calibrate.py); Infeasible otherwise."""
    sol, cal, shrunk, info = calibrated_solve(
        problem, method, allocation, seed=seed, options=options or {}
    )
    return sol, shrunk, calibration_view(shrunk, cal, info), cal


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
    services: Services, *, plan: str, body: dict[str, Any], actor: Actor
) -> dict[str, Any]:
    ctx = _model_context(services, int(body["model_id"]))
    specs = ctx["specs"]
    result = ctx["result"]
    moments = moments_of(result)
    c = ctx["partition"].n_cohorts
    shares = np.array([co["share"] for co in result["cohorts"]], dtype=np.float64)
    if body.get("traffic_mix") is not None:
        mix = np.asarray(body["traffic_mix"], dtype=np.float64)
        if mix.shape != (c,) or (mix < 0).any() or abs(mix.sum() - 1) > 1e-6:
            raise InvalidInput(
                f"traffic_mix must list {c} non-negative cohort shares summing to 1",
                errors=[{"field": "traffic_mix", "problem": f"expected {c} shares summing to 1"}],
            )
        shares = mix
    guardrails = _guardrails(body)
    baseline_kind = body.get("baseline", "control")
    live_alloc = _live_allocation_on(services, plan, ctx) if baseline_kind == "live" else None
    problem = build_problem(
        shares=shares,
        moments=moments,
        metrics=specs.metrics,
        success=body["success_metric"],
        guardrails=guardrails,
        baseline=baseline_kind,
        live=live_alloc,
    )
    method, allocation, seed = (
        body.get("method", "chance"),
        body.get("allocation", "mixed"),
        int(body.get("seed", 0)),
    )
    holdout = _holdout(body, specs.arm_keys)
    followed = None
    if body.get("comparison") is not None:  # checked before the solve: a bad link stores nothing
        followed = comparisons.followed(services, model_id=ctx["model_id"],
                                        number=int(body["comparison"]),
                                        candidate=f"{ctx['model_method']}/{method}")  # fmt: skip
    sol, shrunk, cal_view, cal = _calibrated(
        problem, method, allocation, seed, body.get("options") or {}
    )
    draws = int(body.get("draws", 200))
    spec = {
        k: body.get(k)
        for k in (
            "model_id",
            "success_metric",
            "method",
            "allocation",
            "baseline",
            "traffic_mix",
            "draws",
            "seed",
            "notes",
            "options",
        )
    }
    spec.update(
        {
            "guardrails": [g.__dict__ for g in guardrails],
            "holdout": holdout,
            "method": method,
            "allocation": allocation,
            "baseline": baseline_kind,
            "draws": draws,
            "seed": seed,
            "experiment": ctx["experiment"],
        }
    )
    if followed is not None:
        spec["comparison"] = followed
    if draws <= INLINE_MAX_DRAWS:
        report = _full_report(ctx, shrunk, sol, spec, draws, seed, (cal_view, cal),
                              options=body.get("options") or {})  # fmt: skip
        job_id = None
    else:
        report = {"status": "pending", "calibration": cal_view}
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
        salt = prev.salt if (prev is not None and not body.get("new_salt")) else new_salt()
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
                "allocation": allocation,
                "content_hash": row.content_hash,
                "objective": sol.objective,
                "binding": sol.binding,
            },
            reason=body.get("notes"),
        )
    if job_id is not None:
        jobs.notify(services)
    return get_version(services, plan=plan, version=version)


def _full_report(
    ctx: dict[str, Any],
    problem: Any,
    sol: Solution,
    spec: dict[str, Any],
    draws: int,
    seed: int,
    calibration: tuple[dict[str, Any], Any],
    progress: Any = None,
    options: dict[str, Any] | None = None,
) -> dict[str, Any]:
    on_draw = (lambda done, total: progress(done / max(total, 1))) if progress is not None else None
    report = impact_report(problem, sol, draws=draws, seed=seed, progress=on_draw)
    sign = 1.0 if problem.metric(problem.success).direction == "higher" else -1.0
    _apply_calibration(report, sign, *calibration)
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


@jobs.handler("report")
def _run_report(services: Services, job: Job, progress: Any) -> None:
    plan, version = job.payload["plan"], int(job.payload["version"])
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=version)
        spec = dict(row.spec)
        x = np.array(row.allocation["matrix"])
    ctx = _model_context(services, int(spec["model_id"]))
    shares = np.array(
        spec["traffic_mix"]
        if spec.get("traffic_mix")
        else [co["share"] for co in ctx["result"]["cohorts"]]
    )
    live_alloc = _live_allocation_on(services, plan, ctx) if spec["baseline"] == "live" else None
    problem = build_problem(
        shares=shares,
        moments=moments_of(ctx["result"]),
        metrics=ctx["specs"].metrics,
        success=spec["success_metric"],
        guardrails=_guardrails(spec),
        baseline=spec["baseline"],
        live=live_alloc,
    )
    sol, shrunk, cal_view, cal = _calibrated(
        problem, spec["method"], spec["allocation"], spec["seed"], spec.get("options") or {}
    )
    if not np.allclose(sol.allocation, x, atol=1e-9):
        raise RuntimeError(
            "re-solving the stored problem gave a different allocation; the report was not attached"
        )
    report = _full_report(
        ctx,
        shrunk,
        sol,
        spec,
        spec["draws"],
        spec["seed"],
        (cal_view, cal),
        progress,
        options=spec.get("options") or {},
    )
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
            actor=Actor("report-job", "analyst"),
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
    ctx = _model_context(services, int(spec["model_id"]))
    try:
        held_out = _evaluate(ctx, spec, int(spec["seed"]), folds, progress)
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
            actor=Actor("report-job", "analyst"),
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


# ---- reading -----------------------------------------------------------------------------------

_diff_cache: dict[tuple[str, int, int, str], dict[str, Any]] = {}
_diff_lock = threading.Lock()


def _diff_against_live(services: Services, row: Any, ptr: Any) -> dict[str, Any] | None:
    """Share of the readout's members whose arm would change, per cohort of this version."""
    if ptr is None or ptr.active_version is None:
        return None
    key = (row.plan, row.version, ptr.active_version, services.db.url)
    with _diff_lock:
        if key in _diff_cache:
            return _diff_cache[key]
    ctx = _model_context(services, row.model_id)
    table: UnitTable = _rows(ctx).table
    members, cols = list(table.unit_ids), table_columns(table)
    mine = live.compile_version(row, ctx["partition"], revision=0).assign_columns(members, cols)
    current = live.load_compiled(services.db, row.plan)
    if current is None:
        return None
    theirs = current.assign_columns(members, cols)
    changed = np.array([a.arm != b.arm for a, b in zip(mine, theirs, strict=True)])
    cohort = np.array([a.cohort for a in mine])
    c = ctx["partition"].n_cohorts
    n_c = np.bincount(cohort, minlength=c)
    ch_c = np.bincount(cohort, weights=changed, minlength=c)
    rules = ctx["partition"].cohort_rules()
    out = {
        "live_version": ptr.active_version,
        "members": int(table.n),
        "share_changed": float(changed.mean()) if table.n else 0.0,
        **{k: v for k, v in _rows(ctx).describe().items() if k != "rows_used"},
        "weighted_by": "the readout's members (their features and ids)",
        "cohorts": [
            {
                "id": i,
                "rule": rules[i],
                "members": int(n_c[i]),
                "share_changed": float(ch_c[i] / n_c[i]) if n_c[i] else 0.0,
            }
            for i in range(c)
        ],
    }
    with _diff_lock:
        _diff_cache[key] = out
    return out


def version_view(row: Any, *, live_version: int | None) -> dict[str, Any]:
    return {
        "plan": row.plan,
        "version": row.version,
        "status": row.status,
        "live": live_version == row.version,
        "model_id": row.model_id,
        "author": row.author,
        "author_owner": row.author_owner,
        "created_at": row.created_at,
        "decided_by": row.decided_by,
        "decided_at": row.decided_at,
        "decision_reason": row.decision_reason,
        "content_hash": row.content_hash,
        "salt_fingerprint": hashlib.sha256(row.salt.encode()).hexdigest()[:12],
        "spec": row.spec,
        "allocation": row.allocation,
        "report": _report_view(row),
    }


def _report_view(row: Any) -> dict[str, Any]:
    """The stored report; a version rejected while its jobs were pending keeps them pending in
    storage (it is immutable), so say here that they will not run."""
    report = row.report or {}
    if row.status == "rejected":
        for key in ("held_out",):
            part = report.get(key)
            if isinstance(part, dict) and part.get("status") == "pending":
                report = {**report, key: {**part, "status": "not run",
                                          "error": "the version was rejected first"}}  # fmt: skip
    return report


def get_version(
    services: Services, *, plan: str, version: int, with_diff: bool = True
) -> dict[str, Any]:
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=version)
        ptr = repo.pointer(session=s, plan=plan)
        s.expunge_all()
    view = version_view(row, live_version=ptr.active_version if ptr else None)
    if with_diff:
        view["diff"] = (
            None
            if (ptr is None or ptr.active_version in (None, version))
            else _diff_against_live(services, row, ptr)
        )
    return view


def get_plan(services: Services, *, plan: str) -> dict[str, Any]:
    with services.db.read() as s:
        ptr = repo.pointer(session=s, plan=plan)
        if ptr is None:
            raise NotFound(f"no plan '{plan}'")
        versions = repo.list_versions(session=s, plan=plan)
        acts = repo.activations(session=s, plan=plan)
        return {
            "plan": plan,
            "live_version": ptr.active_version,
            "revision": ptr.revision,
            "auto_rollback": ptr.auto_rollback,
            "versions": [
                {
                    "version": v.version,
                    "status": v.status,
                    "model_id": v.model_id,
                    "author": v.author,
                    "created_at": v.created_at,
                    "method": v.spec.get("method"),
                    "objective": (v.report.get("solution") or {}).get("objective"),
                }
                for v in versions
            ],
            "activations": [
                {
                    "version": a.version,
                    "revision": a.revision,
                    "kind": a.kind,
                    "actor": a.actor,
                    "reason": a.reason,
                    "at": a.at,
                }
                for a in acts
            ],
        }


def list_plans(services: Services) -> list[dict[str, Any]]:
    with services.db.read() as s:
        out = []
        for p in repo.list_plans(session=s):
            versions = repo.list_versions(session=s, plan=p.plan)
            out.append(
                {
                    "plan": p.plan,
                    "live_version": p.active_version,
                    "revision": p.revision,
                    "versions": len(versions),
                    "latest": versions[-1].version if versions else None,
                    "latest_status": versions[-1].status if versions else None,
                }
            )
        return out


# ---- lifecycle ---------------------------------------------------------------------------------


def decide(
    services: Services, *, plan: str, version: int, approve: bool, reason: str, actor: Actor
) -> dict[str, Any]:
    with services.db.write() as s:
        # The plan's lock (level 2, store/db.py) makes the status check and the change one step:
        # of two approvers deciding at once, the second sees the first's decision.
        if repo.pointer(session=s, plan=plan, lock=True) is None:
            raise NotFound(f"no plan '{plan}'")
        row = repo.get_version(session=s, plan=plan, version=version)
        if row.status != "draft":
            raise InvalidTransition(
                f"plan version {plan}/{version} is {row.status}; only a draft can be approved or rejected"
            )
        if approve and row.author_owner == actor.identity:
            raise Forbidden(
                f"'{actor.identity}' drafted {plan}/{version} (key '{row.author}'); another "
                "approver must approve it"
            )
        if approve and row.report.get("status") != "complete":
            raise InvalidTransition(
                f"plan version {plan}/{version} has no complete impact report yet"
            )
        held_out = row.report.get("held_out") or {}
        if approve and held_out.get("status") == "pending":
            raise InvalidTransition(
                f"plan version {plan}/{version}: its held-out evaluation is still running "
                f"({held_out.get('job')}); approve once the reviewer can read it"
            )
        row.status = "approved" if approve else "rejected"
        row.decided_by, row.decided_at, row.decision_reason = actor.name, utcnow(), reason
        audit.append(
            s,
            actor=actor,
            action="plan.approve" if approve else "plan.reject",
            entity="plan_version",
            entity_id=f"{plan}/{version}",
            payload={"content_hash": row.content_hash},
            reason=reason,
        )
    return get_version(services, plan=plan, version=version, with_diff=False)


def _switch(
    s: Any,
    *,
    plan: str,
    to_version: int,
    expected_revision: int | None,
    kind: str,
    actor: Actor,
    reason: str,
    evidence: dict[str, Any] | None = None,
) -> dict[str, Any]:
    ptr = repo.pointer(session=s, plan=plan, lock=True)  # level 2 (store/db.py), then versions
    if ptr is None:
        raise NotFound(f"no plan '{plan}'")
    target = repo.get_version(session=s, plan=plan, version=to_version)
    if target.status not in ACTIVATABLE:
        raise InvalidTransition(
            f"plan version {plan}/{to_version} is {target.status}; only an approved version can go live"
        )
    previous = ptr.active_version
    if previous == to_version:
        raise InvalidTransition(f"plan version {plan}/{to_version} is already live")
    revision = repo.move_pointer(
        session=s, ptr=ptr, to_version=to_version, expected_revision=expected_revision
    )
    if previous is not None:
        repo.get_version(session=s, plan=plan, version=previous).status = "superseded"
    target.status = "active"
    repo.add_activation(
        session=s,
        plan=plan,
        version=to_version,
        revision=revision,
        kind=kind,
        actor=actor.name,
        reason=reason,
    )
    payload = {"from_version": previous, "to_version": to_version, "revision": revision}
    if evidence:
        payload["evidence"] = evidence
    audit.append(
        s,
        actor=actor,
        action=f"plan.{kind}",
        entity="plan",
        entity_id=plan,
        payload=payload,
        reason=reason,
    )
    return payload


def activate(
    services: Services,
    *,
    plan: str,
    version: int,
    reason: str,
    expected_revision: int,
    actor: Actor,
) -> dict[str, Any]:
    with services.db.write() as s:
        out = _switch(
            s,
            plan=plan,
            to_version=version,
            expected_revision=expected_revision,
            kind="activate",
            actor=actor,
            reason=reason,
        )
    live.refresh_plan(services, plan)
    return out


def rollback_target(s: Any, plan: str, current: int | None) -> int:
    """The version that was live before the current one."""
    acts = repo.activations(session=s, plan=plan)
    for a in reversed(acts[:-1] if acts and acts[-1].version == current else acts):
        if a.version != current:
            return a.version
    raise InvalidTransition(f"plan '{plan}' has no earlier live version to roll back to")


def rollback_in(
    s: Any,
    *,
    plan: str,
    reason: str,
    to_version: int | None,
    actor: Actor,
    expected_revision: int | None = None,
    evidence: dict[str, Any] | None = None,
) -> dict[str, Any]:
    ptr = repo.pointer(session=s, plan=plan, lock=True)
    if ptr is None:
        raise NotFound(f"no plan '{plan}'")
    target = to_version if to_version is not None else rollback_target(s, plan, ptr.active_version)
    return _switch(
        s,
        plan=plan,
        to_version=target,
        expected_revision=expected_revision,
        kind="rollback",
        actor=actor,
        reason=reason,
        evidence=evidence,
    )


def rollback(
    services: Services,
    *,
    plan: str,
    reason: str,
    to_version: int | None,
    actor: Actor,
    expected_revision: int | None = None,
) -> dict[str, Any]:
    with services.db.write() as s:
        out = rollback_in(
            s,
            plan=plan,
            reason=reason,
            to_version=to_version,
            actor=actor,
            expected_revision=expected_revision,
        )
    live.refresh_plan(services, plan)
    return out
