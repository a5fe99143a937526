"""Reading plans: one version (with the share of members whose arm would change against the live
version), one plan's history, the list of plans."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from apportion.errors import NotFound
from apportion.schemas.plans import PlanList, PlanVersionView, PlanView, VersionDiff
from apportion.stats.table import UnitTable
from apportion.store import experiments as exp_repo
from apportion.store import plans as repo
from apportion.usecases import live
from apportion.usecases.context import Services
from apportion.usecases.plans.source import model_context, rows_of, table_columns


def _diff_against_live(services: Services, row: Any, ptr: Any) -> dict[str, Any] | None:
    """Share of the readout's members whose arm would change, per cohort of this version."""
    if ptr is None or ptr.active_version is None:
        return None
    key = (row.plan, row.version, ptr.active_version)
    cached = services.plan_diffs.get(key)
    if cached is not None:
        return cached
    ctx = model_context(services, row.model_id)
    table: UnitTable = rows_of(ctx).table
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
        **{k: v for k, v in rows_of(ctx).describe().items() if k != "rows_used"},
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
    services.plan_diffs.put(key, out)
    return out


Z95 = 1.959963984540054  # the normal 97.5 % quantile (scipy.stats.norm.ppf(0.975))


def held_out_reading(
    report: dict[str, Any], success: str | None, direction: str = "higher"
) -> dict[str, Any] | None:
    """How a complete held-out evaluation relates to the projection: one sentence on what it
    measures, the two success-lift intervals at 95 % (the projection's is the report's, corrected
    lift +/- 1.96 sd; the held-out one is lift +/- 1.96 se, the same normal level), and a
    warning when the held-out interval lies entirely on the worse side of the projected one.
    The two are on one scale only when the projection's baseline is all-control, as the held-out
    figure's always is; otherwise the sentence says so and there is no warning."""
    ho = report.get("held_out")
    if not isinstance(ho, dict) or ho.get("status") != "complete" or not success:
        return None
    entry = (ho.get("metrics") or {}).get(success) or {}
    lift, se = entry.get("lift"), entry.get("se")
    if not isinstance(lift, int | float) or not isinstance(se, int | float):
        return None
    folds = ho.get("folds")
    share = f"{folds - 1}/{folds}" if isinstance(folds, int) and folds > 1 else "part"
    comparable = (report.get("baseline") or "control") == "control"
    measures = (
        f"The held-out figure scores the procedure, not this version: the model's method and the "
        f"optimizer re-run on {share} of the readout's rows, each re-run's plan scored on the rows "
        "it never saw, against all-control. A re-run on fewer rows may back off (near a "
        "guardrail, say), so it can fall short of the projection without a defect"
        + ("." if comparable else f"; this version's projection is against "
           f"'{report.get('baseline')}', so the two are not on one scale.")
    )  # fmt: skip
    held = [float(lift) - Z95 * float(se), float(lift) + Z95 * float(se)]
    projected = None
    for m in report.get("metrics") or []:
        iv = m.get("interval") if isinstance(m, dict) and m.get("metric") == success else None
        if isinstance(iv, list) and len(iv) == 2 and all(isinstance(x, int | float) for x in iv):
            projected = [float(iv[0]), float(iv[1])]
    short = False
    if comparable and projected is not None:
        short = held[1] < projected[0] if direction == "higher" else held[0] > projected[1]
    side = "below" if direction == "higher" else "above"
    warning = None
    if short and projected is not None:
        warning = (
            f"The held-out {success} lift (95% interval {held[0]:+.4g} to {held[1]:+.4g}) lies "
            f"entirely {side} the projected interval ({projected[0]:+.4g} to "
            f"{projected[1]:+.4g}): expect less than the projection; check the guardrails and "
            "the readout's size before approving."
        )
    return {
        "measures": measures,
        "success_metric": success,
        "held_out_interval": held,
        "projected_interval": projected,
        "comparable": comparable,
        "short_of_projection": short,
        "warning": warning,
    }


def version_view(
    row: Any, *, live_version: int | None, success_direction: str = "higher"
) -> PlanVersionView:
    """The version's row with its stored spec, allocation and report validated as they are read."""
    return PlanVersionView.model_validate({
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
        "report": _report_view(row, success_direction),
    })  # fmt: skip


def _report_view(row: Any, success_direction: str = "higher") -> dict[str, Any]:
    """The stored report; a version rejected while its jobs were pending keeps them pending in
    storage (it is immutable), so say here that they will not run."""
    report = row.report or {}
    if row.status == "rejected":
        for key in ("held_out",):
            part = report.get(key)
            if isinstance(part, dict) and part.get("status") == "pending":
                report = {**report, key: {**part, "status": "not run",
                                          "error": "the version was rejected first"}}  # fmt: skip
    reading = held_out_reading(report, (row.spec or {}).get("success_metric"), success_direction)
    if reading is not None:
        report = {**report, "held_out": {**report["held_out"], "reading": reading}}
    return report


def get_version(
    services: Services, *, plan: str, version: int, with_diff: bool = True
) -> PlanVersionView:
    with services.db.read() as s:
        row = repo.get_version(session=s, plan=plan, version=version)
        ptr = repo.pointer(session=s, plan=plan)
        direction = _success_direction(s, row.spec or {})
        s.expunge_all()
    view = version_view(row, live_version=ptr.active_version if ptr else None,
                        success_direction=direction)  # fmt: skip
    if with_diff:
        diff = (
            None
            if (ptr is None or ptr.active_version in (None, version))
            else _diff_against_live(services, row, ptr)
        )
        view = view.model_copy(
            update={"diff": None if diff is None else VersionDiff.model_validate(diff)}
        )
    return view


def _success_direction(session: Any, spec: dict[str, Any]) -> str:
    """The declared direction of the version's success metric ('higher' when unknown)."""
    try:
        exp = exp_repo.get_experiment(session=session, key=str(spec.get("experiment")))
    except NotFound:
        return "higher"
    for m in exp.declaration.get("metrics") or []:
        if m.get("key") == spec.get("success_metric"):
            return str(m.get("direction") or "higher")
    return "higher"


def get_plan(services: Services, *, plan: str) -> PlanView:
    with services.db.read() as s:
        ptr = repo.pointer(session=s, plan=plan)
        if ptr is None:
            raise NotFound(f"no plan '{plan}'")
        versions = repo.list_versions(session=s, plan=plan)
        acts = repo.activations(session=s, plan=plan)
        return PlanView.model_validate({
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
        })  # fmt: skip


def list_plans(services: Services) -> PlanList:
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
        return PlanList.model_validate({"plans": out})
