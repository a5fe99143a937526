"""The audit trail: read it (reader), verify the chain (admin)."""

from __future__ import annotations

from datetime import UTC, datetime

from fastapi import APIRouter, Query

from apportion.api.body import GuardedRoute
from apportion.api.deps import AdminDep, ReaderDep, ServicesDep
from apportion.api.fields import TextQuery
from apportion.schemas.audit import AuditPage, ChainCheck
from apportion.schemas.common import INT64_MAX
from apportion.usecases import audit as uc

router = APIRouter(prefix="/v1/audit", tags=["audit"], route_class=GuardedRoute)


def _stamp(at: datetime | None) -> str | None:
    """The audit trail's own timestamp text (UTC, microseconds), so that text order is time order."""
    if at is None:
        return None
    at = at.replace(tzinfo=UTC) if at.tzinfo is None else at.astimezone(UTC)
    return at.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


@router.get("", summary="Audit entries, oldest first", response_model=AuditPage)
def list_entries(
    _: ReaderDep,
    services: ServicesDep,
    entity: TextQuery = None,
    entity_id: TextQuery = None,
    actor: TextQuery = None,
    since: datetime | None = Query(
        None, description="ISO-8601 time, e.g. 2026-12-01T00:00:00Z (no zone: UTC)"
    ),
    after: int = Query(
        0, ge=0, le=INT64_MAX, description="only entries with a larger id (for paging)"
    ),
    limit: int = Query(100, ge=1, le=1000),
) -> AuditPage:
    return uc.entries(
        services.db,
        entity=entity,
        entity_id=entity_id,
        actor=actor,
        since=_stamp(since),
        limit=limit,
        after=after,
    )


@router.get("/verify", summary="Verify the hash chain", response_model=ChainCheck)
def verify(_: AdminDep, services: ServicesDep) -> ChainCheck:
    return uc.verify(services.db)
