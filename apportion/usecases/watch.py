"""The guardrail watch: post-launch rows of a live plan version, plan-exposed members against the
holdout, with always-valid confidence sequences (apportion/stats/sequential.py), and automatic
rollback on a confirmed breach, committed with its audit entry (actor: the watch itself).

Each upload is validated whole; rows accumulate per plan version across uploads, and a member seen
twice counts once (the later row wins). Every guardrail's interval uses alpha = (1 - confidence) / K
over the K guardrails (Bonferroni), so the statuses hold jointly under continuous monitoring."""

from __future__ import annotations

import hashlib
from typing import Any

import numpy as np

from apportion.domain import Actor
from apportion.errors import ApportionError, InvalidInput, NotFound
from apportion.ingest.codec import decode_table, encode_table
from apportion.ingest.parse import parse_units
from apportion.observability import WATCH_STATUS
from apportion.schemas.watch import AutoRollbackIn, AutoRollbackView, MonitorResult, WatchView
from apportion.stats.monitoring import compare_with_holdout, harmonize_levels, merge_uploads
from apportion.stats.partition import Partition
from apportion.stats.table import UnitTable
from apportion.store import audit, blobs
from apportion.store import experiments as exp_repo
from apportion.store import models as model_repo
from apportion.store import plans as plan_repo
from apportion.store import watch as repo
from apportion.usecases import live
from apportion.usecases.context import Services
from apportion.usecases.experiments import specs_of
from apportion.usecases.plans import rollback_in, table_columns

WATCH_ACTOR = Actor("guardrail-watch", "watch")
DEFAULT_HORIZON = (
    100_000  # expected units per group over the watch; tunes where the boundary is tightest
)


def _context(services: Services, plan: str, version: int | None) -> dict[str, Any]:
    with services.db.read() as s:
        ptr = plan_repo.pointer(session=s, plan=plan)
        if ptr is None:
            raise NotFound(f"no plan '{plan}'")
        v = version if version is not None else ptr.active_version
        if v is None:
            raise NotFound(f"plan '{plan}' has no live version to watch")
        row = plan_repo.get_version(session=s, plan=plan, version=v)
        exp = exp_repo.get_experiment(session=s, key=row.spec["experiment"])
        return {
            "version": row,
            "specs": specs_of(exp.declaration),
            "pointer_version": ptr.active_version,
            "auto_rollback": dict(ptr.auto_rollback or {}),
        }


def upload(
    services: Services,
    *,
    plan: str,
    body: bytes,
    content_type: str,
    actor: Actor,
    version: int | None = None,
) -> MonitorResult:
    ctx = _context(services, plan, version)
    row, specs = ctx["version"], ctx["specs"]
    parsed = parse_units(
        body,
        content_type,
        arms=specs.arm_keys,
        control=specs.arm_keys[0],
        design_shares=list(specs.design_shares),
        metrics=specs.metrics,
        features=specs.features,
        unit_column="member_id",
        arm_column=None,
        flag_columns=["holdout"],
    )
    new_table, new_holdout, excluded, disagree = _evidence_rows(
        services, row, parsed.table, parsed.flags["holdout"]
    )

    encoded = encode_table(new_table, {"holdout": new_holdout})
    with services.db.write() as s:
        # The plan's lock (level 2 of the lock order in store/db.py) comes first: under it the
        # earlier uploads are read, the upload number is taken and the live pointer is checked, so
        # concurrent uploads each see all the earlier ones and an activation waits, never deadlocks.
        ptr = plan_repo.pointer(session=s, plan=plan, lock=True)
        if ptr is None:
            raise NotFound(f"no plan '{plan}'")
        ar = dict(ptr.auto_rollback or {})
        previous = [
            decode_table(blobs.get_blob(session=s, sha256=u.blob_sha256))
            for u in repo.uploads(session=s, plan=plan, version=row.version)
        ]
        tables = harmonize_levels([t for t, _ in previous] + [new_table])
        holdouts = [f["holdout"] for _, f in previous] + [new_holdout]
        merged, holdout, replaced = merge_uploads(list(zip(tables, holdouts, strict=True)))
        horizon = int(ar.get("horizon") or DEFAULT_HORIZON)
        metrics = compare_with_holdout(merged, holdout, row.spec, horizon=horizon)
        breached = [m for m in metrics if m["status"] == "breached"]
        result: dict[str, Any] = {
            "rows": int(parsed.n_rows),
            "rows_excluded": excluded,
            "members": int(merged.n),
            "replaced": replaced,
            "holdout_flag_disagreement": disagree,
            "metrics": metrics,
            "rolled_back": None,
        }
        sha = blobs.put_blob(session=s, data=encoded)
        up = repo.add_upload(
            session=s,
            plan=plan,
            version=row.version,
            blob_sha256=sha,
            n_rows=int(new_table.n),
            # a copy: `result` changes below when the watch rolls back, and the row must then
            # see a new value (a JSON column compares by value, so an aliased dict never updates)
            result=dict(result),
            created_by=actor.name,
        )
        audit.append(
            s,
            actor=actor,
            action="watch.upload",
            entity="plan_version",
            entity_id=f"{plan}/{row.version}",
            payload={
                "upload": up.seq,
                "rows": int(new_table.n),
                "replaced": replaced,
                "blob": sha,
                "content_hash": hashlib.sha256(body).hexdigest(),
                "statuses": {m["metric"]: m["status"] for m in metrics if m["role"] == "guardrail"},
            },
        )
        min_units = int(ar.get("min_units_per_group", 1000))
        enough = [m for m in breached if min(m["n_plan"], m["n_holdout"]) >= min_units]
        if ar.get("enabled") and enough and ptr.active_version == row.version:
            worst = enough[0]
            evidence = {
                "guardrail": worst["metric"],
                "interval": [worst["lower"], worst["upper"]],
                "estimate": worst["estimate"],
                "threshold": worst["threshold"],
                "units": {"plan": worst["n_plan"], "holdout": worst["n_holdout"]},
                "alpha": worst["alpha"],
                "upload": up.seq,
                "uploaded_by": actor.identity,  # the owner: one person may hold several keys
                "uploaded_with_key": actor.name,
                "breached": [m["metric"] for m in enough],
            }
            try:
                switched = rollback_in(
                    s,
                    plan=plan,
                    reason=f"guardrail '{worst['metric']}' breached: the whole interval "
                    f"[{worst['lower']:.4g}, {worst['upper']:.4g}] is past the threshold {worst['threshold']:.4g}",
                    to_version=None,
                    actor=WATCH_ACTOR,
                    evidence=evidence,
                )
                result["rolled_back"] = {"to_version": switched["to_version"], "evidence": evidence}
            except ApportionError as exc:  # no earlier version: report it, keep the upload
                result["rolled_back"] = {"error": exc.detail, "evidence": evidence}
            up.result = dict(result)
    if result["rolled_back"] and "to_version" in result["rolled_back"]:
        live.refresh_plan(services, plan)
    for m in metrics:
        if m["role"] == "guardrail":
            WATCH_STATUS.labels(plan, m["metric"]).set(1 if m["status"] == "breached" else 0)
    return MonitorResult.model_validate(
        {"plan": plan, "version": row.version, "upload": up.seq, **result}
    )


def _evidence_rows(
    services: Services, row: Any, table: UnitTable, stated: np.ndarray
) -> tuple[UnitTable, np.ndarray, int, float]:
    """(rows that count as evidence, their holdout flag, rows left out, disagreement share).

    Each member's group is recomputed by the plan's own lookup. A stated holdout flag that
    disagrees means the caller is not using the lookup (or the rows are invented): such a row
    says nothing about either group, so it is left out, and an upload where more than
    APPORTION_WATCH_MAX_FLAG_DISAGREEMENT of the rows disagree is refused whole."""
    compiled = live.compile_version(row, _partition(services, row.model_id), revision=0)
    assigned = compiled.assign_columns(list(table.unit_ids), table_columns(table))
    recomputed = np.fromiter((a.holdout for a in assigned), dtype=bool, count=table.n)
    off = recomputed != np.asarray(stated, dtype=bool)
    share = float(off.mean()) if table.n else 0.0
    limit = services.settings.watch_max_flag_disagreement
    if share > limit:
        rows = (np.flatnonzero(off)[:10] + 1).tolist()
        raise InvalidInput(
            f"column 'holdout' disagrees with the plan's lookup in {int(off.sum())} of {table.n} "
            f"rows ({share:.2%}; at most {limit:.2%} may, APPORTION_WATCH_MAX_FLAG_DISAGREEMENT): "
            f"send the flag the lookup returned; first rows {rows}",
            errors=[
                {
                    "column": "holdout",
                    "problem": "holdout flag disagrees with the plan's lookup",
                    "rows": rows,
                    "count": int(off.sum()),
                    "share": share,
                    "allowed_share": limit,
                }
            ],
        )
    if not off.any():
        return table, recomputed, 0, share
    keep = np.flatnonzero(~off)
    if keep.size == 0:
        raise InvalidInput("no row's holdout flag agrees with the plan's lookup", errors=[
            {"column": "holdout", "problem": "no row agrees with the plan's lookup"}
        ])  # fmt: skip
    return table.take(keep), recomputed[keep], int(off.sum()), share


def _partition(services: Services, model_id: int) -> Any:
    with services.db.read() as s:
        result = model_repo.get_model(session=s, model_id=model_id).result
    assert result is not None, f"model {model_id} has no fit"
    return Partition.from_dict(result["partition"])


def get_watch(services: Services, *, plan: str, version: int | None = None) -> WatchView:
    with services.db.read() as s:
        ptr = plan_repo.pointer(session=s, plan=plan)
        if ptr is None:
            raise NotFound(f"no plan '{plan}'")
        v = (
            version
            if version is not None
            else (repo.latest_version_watched(session=s, plan=plan) or ptr.active_version)
        )
        ups = repo.uploads(session=s, plan=plan, version=v) if v is not None else []
        history = [(u.seq, u.created_at, u.result) for u in ups]
        auto = dict(ptr.auto_rollback or {})
        live_version = ptr.active_version
    metrics: dict[str, dict[str, Any]] = {}
    for seq, at, res in history:
        for m in res["metrics"]:
            entry = metrics.setdefault(
                m["metric"], {"metric": m["metric"], "role": m["role"], "history": []}
            )
            entry.update(status=m["status"], threshold=m["threshold"])
            entry["history"].append(
                {
                    "upload": seq,
                    "at": at,
                    "n_plan": m["n_plan"],
                    "n_holdout": m["n_holdout"],
                    "estimate": m["estimate"],
                    "lower": m["lower"],
                    "upper": m["upper"],
                }
            )
    last = history[-1][2] if history else None
    return WatchView.model_validate(
        {
            "plan": plan,
            "version": v,
            "live_version": live_version,
            "auto_rollback": auto,
            "uploads": len(history),
            "members": last["members"] if last else 0,
            "holdout_flag_disagreement": last["holdout_flag_disagreement"] if last else None,
            "rolled_back": next(
                (r["rolled_back"] for _, _, r in reversed(history) if r.get("rolled_back")), None
            ),
            "metrics": list(metrics.values()),
        }
    )


def set_auto_rollback(
    services: Services, *, plan: str, command: AutoRollbackIn, actor: Actor
) -> AutoRollbackView:
    enabled, min_units_per_group, horizon = (
        command.enabled,
        command.min_units_per_group,
        command.horizon,
    )
    with services.db.write() as s:
        ptr = plan_repo.pointer(session=s, plan=plan, lock=True)
        if ptr is None:
            raise NotFound(f"no plan '{plan}'")
        setting = {
            "enabled": enabled,
            "min_units_per_group": min_units_per_group,
            "horizon": horizon or DEFAULT_HORIZON,
        }
        ptr.auto_rollback = setting
        audit.append(
            s,
            actor=actor,
            action="plan.auto_rollback",
            entity="plan",
            entity_id=plan,
            payload=setting,
            reason=command.reason,
        )
    return AutoRollbackView.model_validate({"plan": plan, "auto_rollback": setting})
