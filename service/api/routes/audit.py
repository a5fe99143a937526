"""The audit trail: read it (reader), verify the chain (admin)."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Query

from service.api.deps import AdminDep, AuthenticatedRoute, ReaderDep, ServicesDep
from service.store import audit

router = APIRouter(prefix="/v1/audit", tags=["audit"], route_class=AuthenticatedRoute)


@router.get("", summary="Audit entries, oldest first")
def list_entries(
    _: ReaderDep,
    services: ServicesDep,
    entity: str | None = None,
    entity_id: str | None = None,
    actor: str | None = None,
    since: str | None = Query(None, description="ISO-8601 UTC time, e.g. 2026-12-01T00:00:00Z"),
    after: int = Query(0, ge=0, description="only entries with a larger id (for paging)"),
    limit: int = Query(100, ge=1, le=1000),
) -> dict[str, Any]:
    with services.db.read() as s:
        rows = audit.listing(
            s,
            entity=entity,
            entity_id=entity_id,
            actor=actor,
            since=since,
            limit=limit,
            after=after,
        )
    return {"entries": rows, "next_after": rows[-1]["id"] if len(rows) == limit else None}


@router.get("/verify", summary="Verify the hash chain")
def verify(_: AdminDep, services: ServicesDep) -> dict[str, Any]:
    with services.db.read() as s:
        return audit.verify(s).to_dict()
