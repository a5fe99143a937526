"""Reading and verifying the audit chain, for the routes and the command line alike (the chain
itself, hash-linked entries written with each change, lives in `store/audit.py`)."""

from __future__ import annotations

from apportion.schemas.audit import AuditPage, ChainCheck
from apportion.store import audit
from apportion.store.db import Database


def entries(
    db: Database,
    *,
    entity: str | None = None,
    entity_id: str | None = None,
    actor: str | None = None,
    since: str | None = None,
    limit: int = 100,
    after: int = 0,
) -> AuditPage:
    """One page of entries, oldest first, and the `after` of the next page (None on the last)."""
    with db.read() as s:
        rows = audit.listing(
            s, entity=entity, entity_id=entity_id, actor=actor, since=since, limit=limit,
            after=after,
        )  # fmt: skip
    return AuditPage.model_validate(
        {"entries": rows, "next_after": rows[-1]["id"] if len(rows) == limit else None}
    )


def verify(db: Database) -> ChainCheck:
    """Walk the whole chain: intact, the number of entries, and the first broken one with why."""
    with db.read() as s:
        return ChainCheck.model_validate(audit.verify(s).to_dict())
