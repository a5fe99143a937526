"""What the review pages show, gathered in one place: a plan version with its report and diff, the
plan's pointer (revision, live version, activations), the experiment's metric declarations (kind and
direction, for units and the harmful side), the version's audit history, and the version's
guardrail watch once it has uploads. Read-only; the pages' actions go through the JSON lifecycle API."""

from __future__ import annotations

from typing import Any

from apportion.errors import NotFound
from apportion.schemas.common import dump
from apportion.store import audit
from apportion.usecases import experiments, plans, watch
from apportion.usecases.context import Services

HISTORY_LIMIT = 1000


def _watch(services: Services, plan: str, version: int) -> dict[str, Any] | None:
    """The guardrail watch of this version, or None when it has no uploads."""
    try:
        w = dump(watch.get_watch(services, plan=plan, version=version))
    except NotFound:
        return None
    if not w or w.get("version") != version or not w.get("metrics"):
        return None
    return w


def _history(services: Services, plan: str, version: int) -> list[dict[str, Any]]:
    """Audit entries about this version, and the plan's activations and rollbacks that moved it,
    oldest first: [{id, at, actor_name, actor_role, action, reason, payload}]."""
    with services.db.read() as s:
        own = audit.listing(
            s, entity="plan_version", entity_id=f"{plan}/{version}", limit=HISTORY_LIMIT
        )
        moves = audit.listing(s, entity="plan", entity_id=plan, limit=HISTORY_LIMIT)
    related = [
        e
        for e in moves
        if version
        in (
            (e.get("payload") or {}).get("from_version"),
            (e.get("payload") or {}).get("to_version"),
        )
    ]
    keep = ("id", "at", "actor_name", "actor_role", "action", "reason", "payload")
    return [{k: e.get(k) for k in keep} for e in sorted(own + related, key=lambda e: e["id"])]


def _declared(
    services: Services, key: str | None
) -> tuple[dict[str, dict[str, Any]], list[dict[str, Any]]]:
    """(metric key -> its declaration {key, kind, direction, ...}, the features declared not for
    personalization [{key, reason}]); both empty when the experiment is gone."""
    if not key:
        return {}, []
    try:
        decl = experiments.get(services.db, key=key)
    except NotFound:
        return {}, []
    metrics = {m.key: m.model_dump(exclude_unset=True) for m in decl.metrics}
    excluded = [{"key": f.key, "reason": f.reason} for f in decl.features if not f.personalize]
    return metrics, excluded


def review_page(services: Services, *, plan: str, version: int) -> dict[str, Any]:
    """Everything the version page draws: {version, plan, metrics, not_personalized, history,
    watch}."""
    view = plans.get_version(services, plan=plan, version=version)
    metrics, excluded = _declared(services, view.spec.experiment)
    return {
        "version": dump(view),
        "plan": dump(plans.get_plan(services, plan=plan)),
        "metrics": metrics,
        "not_personalized": excluded,
        "history": _history(services, plan, version),
        "watch": _watch(services, plan, version),
    }


def plans_index(services: Services) -> list[dict[str, Any]]:
    """Every plan with its versions (newest first) for the index page:
    [{plan, live_version, revision, versions: [{version, status, author, created_at, method}]}]."""
    out = []
    for p in plans.list_plans(services).plans:
        full = dump(plans.get_plan(services, plan=p.plan))
        out.append(
            {
                "plan": p.plan,
                "live_version": full["live_version"],
                "revision": full["revision"],
                "versions": list(reversed(full["versions"])),
            }
        )
    return out
