"""A plan version's life after drafting: approval or rejection (four eyes: the drafter's owner
cannot approve), activation, and rollback, each moving the plan pointer under its lock with the
audit entry in the same transaction; the serving index is refreshed after the commit."""

from __future__ import annotations

from typing import Any

from apportion.domain import Actor
from apportion.errors import Forbidden, InvalidTransition, NotFound
from apportion.schemas.plans import ActivateIn, ImpactReport, PlanVersionView, RollbackIn, Switched
from apportion.store import audit
from apportion.store import plans as repo
from apportion.store.db import utcnow
from apportion.usecases import live
from apportion.usecases.context import Services
from apportion.usecases.plans.views import get_version

ACTIVATABLE = ("approved", "superseded")


def decide(
    services: Services, *, plan: str, version: int, approve: bool, reason: str, actor: Actor
) -> PlanVersionView:
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
        report = ImpactReport.model_validate(row.report)
        if approve and report.status != "complete":
            raise InvalidTransition(
                f"plan version {plan}/{version} has no complete impact report yet"
            )
        held_out = report.held_out
        if approve and held_out is not None and held_out.status == "pending":
            raise InvalidTransition(
                f"plan version {plan}/{version}: its held-out evaluation is still running "
                f"({held_out.job}); approve once the reviewer can read it"
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
    payload: dict[str, Any] = {
        "from_version": previous,
        "to_version": to_version,
        "revision": revision,
    }
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


def activate(services: Services, *, plan: str, command: ActivateIn, actor: Actor) -> Switched:
    with services.db.write() as s:
        out = _switch(
            s,
            plan=plan,
            to_version=command.version,
            expected_revision=command.expected_revision,
            kind="activate",
            actor=actor,
            reason=command.reason,
        )
    live.refresh_plan(services, plan)
    return Switched.model_validate(out)


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


def rollback(services: Services, *, plan: str, command: RollbackIn, actor: Actor) -> Switched:
    with services.db.write() as s:
        out = rollback_in(
            s,
            plan=plan,
            reason=command.reason,
            to_version=command.to_version,
            actor=actor,
            expected_revision=command.expected_revision,
        )
    live.refresh_plan(services, plan)
    return Switched.model_validate(out)
