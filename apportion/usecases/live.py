"""The live plans of this process: loading and compiling active versions, swapping them into the
registry after a commit, and the poller that notices changes made by other processes.

The lookup path reads only the registry; everything here runs beside it (after a commit, or on the
poller's thread)."""

from __future__ import annotations

import logging
from typing import Any

import numpy as np

from apportion.observability import LIVE_VERSION
from apportion.serving.index import CompiledPlan, PlanParts, compile_plan
from apportion.serving.portable import document_bytes
from apportion.serving.registry import PlanRegistry, RevisionPoller
from apportion.stats.partition import Partition
from apportion.store import models as model_repo
from apportion.store import plans as repo
from apportion.store.db import Database
from apportion.usecases.context import Services

log = logging.getLogger("apportion.live")


def portable_document(compiled: CompiledPlan) -> tuple[bytes, str]:
    """The live version as the portable JSON document (docs/compiled-plan.md) and its content
    hash; made once per compiled version."""
    return document_bytes(compiled)


def new_registry() -> PlanRegistry:
    return PlanRegistry()


def compile_version(row: Any, partition: Partition, *, revision: int) -> CompiledPlan:
    alloc = row.allocation
    return compile_plan(
        PlanParts(
            plan=row.plan,
            version=row.version,
            partition=partition,
            allocation=np.array(alloc["matrix"], dtype=np.float64),
            arm_keys=tuple(alloc["arms"]),
            holdout_share=float(row.spec["holdout"]["share"]),
            holdout_arm=str(row.spec["holdout"]["arm"]),
            salt=row.salt,
            revision=revision,
        )
    )


def load_compiled(db: Database, plan: str) -> CompiledPlan | None:
    """The compiled active version of `plan` at the pointer's current revision, or None."""
    with db.read() as s:
        ptr = repo.pointer(session=s, plan=plan)
        if ptr is None or ptr.active_version is None:
            return None
        row = repo.get_version(session=s, plan=plan, version=ptr.active_version)
        result = model_repo.get_model(session=s, model_id=row.model_id).result
        assert result is not None, f"plan {plan} is live on model {row.model_id}, which has no fit"
        return compile_version(row, Partition.from_dict(result["partition"]), revision=ptr.revision)


def refresh_plan(services: Services, plan: str) -> None:
    """After a commit that moved a pointer: load and swap it in this process now."""
    compiled = load_compiled(services.db, plan)
    if compiled is None:
        with services.db.read() as s:
            ptr = repo.pointer(session=s, plan=plan)
        services.plans.swap(plan, None, revision=ptr.revision if ptr else None)
    else:
        services.plans.swap(plan, compiled)
    LIVE_VERSION.labels(plan).set(compiled.version if compiled else 0)


def start_poller(services: Services) -> None:
    db = services.db

    def fetch() -> dict[str, int]:
        with db.read() as s:
            revs = repo.revisions(session=s)
        try:
            services.keys.refresh()  # revoked keys stop working on the lookup path within one poll
        except Exception as exc:  # keys refresh must not stop plan refreshes
            log.warning("key cache refresh failed", extra={"error": str(exc)})
        return {p: r for p, (r, _v) in revs.items()}

    def load(plan: str) -> CompiledPlan | None:
        compiled = load_compiled(db, plan)
        LIVE_VERSION.labels(plan).set(compiled.version if compiled else 0)
        return compiled

    poller = RevisionPoller(
        services.plans,
        fetch_revisions=fetch,
        load=load,
        interval=services.settings.poll_interval_seconds,
        on_error=lambda e: log.error("plan poll failed", extra={"error": str(e)}),
    )
    poller.poll_once()
    poller.start()
    services.poller = poller
