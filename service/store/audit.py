"""The audit chain: append-only entries, each hashed over the previous hash and its own canonical
JSON. Appending locks the one-row head (SELECT ... FOR UPDATE on PostgreSQL; SQLite write
transactions are already serialized), so concurrent writers never fork the chain."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.store.db import utcnow
from service.store.tables import AuditEntry, AuditHead

GENESIS = "0" * 64


def canonical_json(value: Any) -> str:
    return json.dumps(
        value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    )


def _entry_hash(prev_hash: str, body: dict[str, Any]) -> str:
    return hashlib.sha256((prev_hash + canonical_json(body)).encode("utf-8")).hexdigest()


def _body(e: AuditEntry) -> dict[str, Any]:
    return {
        "id": e.id,
        "at": e.at,
        "actor_name": e.actor_name,
        "actor_role": e.actor_role,
        "action": e.action,
        "entity": e.entity,
        "entity_id": e.entity_id,
        "reason": e.reason,
        "payload": e.payload,
    }


@dataclass(frozen=True)
class Actor:
    """Who acts: the key's name and role, and the owner (the person or system identity the key
    belongs to; one owner may hold several keys). Separation of duties compares `identity`."""

    name: str
    role: str
    key_id: int | None = None
    owner: str | None = None

    @property
    def identity(self) -> str:
        return self.owner or self.name


def append(
    session: Session,
    *,
    actor: Actor,
    action: str,
    entity: str,
    entity_id: str | int,
    payload: dict[str, Any] | None = None,
    reason: str | None = None,
) -> AuditEntry:
    """Add one entry in the caller's transaction (flushes, never commits)."""
    head = session.execute(
        select(AuditHead).where(AuditHead.id == 1).with_for_update()
    ).scalar_one_or_none()
    if head is None:
        head = AuditHead(id=1, seq=0, hash=GENESIS)
        session.add(head)
        session.flush()
    entry = AuditEntry(
        id=head.seq + 1,
        at=utcnow(),
        actor_name=actor.name,
        actor_role=actor.role,
        action=action,
        entity=entity,
        entity_id=str(entity_id),
        reason=reason,
        payload=canonical_json(payload or {}),
        prev_hash=head.hash,
        hash="",
    )
    entry.hash = _entry_hash(head.hash, _body(entry))
    head.seq, head.hash = entry.id, entry.hash
    session.add(entry)
    session.flush()
    return entry


@dataclass(frozen=True)
class VerifyResult:
    intact: bool
    entries: int
    first_broken: int | None
    problem: str | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "intact": self.intact,
            "entries": self.entries,
            "first_broken": self.first_broken,
            "problem": self.problem,
        }


def verify(session: Session, *, batch: int = 5000) -> VerifyResult:
    prev, count, expected_id = GENESIS, 0, 1
    last_id = 0
    while True:
        rows = (
            session.execute(
                select(AuditEntry)
                .where(AuditEntry.id > last_id)
                .order_by(AuditEntry.id)
                .limit(batch)
            )
            .scalars()
            .all()
        )
        if not rows:
            break
        for e in rows:
            if e.id != expected_id:
                return VerifyResult(False, count, expected_id, f"entry {expected_id} is missing")
            if e.prev_hash != prev:
                return VerifyResult(
                    False, count, e.id, "prev_hash does not match the previous entry's hash"
                )
            if _entry_hash(prev, _body(e)) != e.hash:
                return VerifyResult(False, count, e.id, "hash does not match the entry's content")
            prev, count, expected_id = e.hash, count + 1, expected_id + 1
            last_id = e.id
    head = session.get(AuditHead, 1)
    if head is not None and (head.seq != count or head.hash != prev):
        return VerifyResult(
            False,
            count,
            count + 1 if head.seq > count else count,
            "the chain's head does not match its last entry",
        )
    return VerifyResult(True, count, None, None)


def listing(
    session: Session,
    *,
    entity: str | None = None,
    entity_id: str | None = None,
    actor: str | None = None,
    since: str | None = None,
    limit: int = 100,
    after: int = 0,
) -> list[dict[str, Any]]:
    q = select(AuditEntry).where(AuditEntry.id > after)
    if entity:
        q = q.where(AuditEntry.entity == entity)
    if entity_id:
        q = q.where(AuditEntry.entity_id == entity_id)
    if actor:
        q = q.where(AuditEntry.actor_name == actor)
    if since:
        q = q.where(AuditEntry.at >= since)
    rows = session.execute(q.order_by(AuditEntry.id).limit(limit)).scalars().all()
    return [
        {**_body(e), "payload": json.loads(e.payload), "prev_hash": e.prev_hash, "hash": e.hash}
        for e in rows
    ]
