"""The audit chain: append-only entries, each hashed over the previous hash and its own canonical
JSON. Extending the chain locks the one-row head (SELECT ... FOR UPDATE on PostgreSQL; SQLite write
transactions are already serialized), so concurrent writers never fork the chain.

The head is the last lock of every write transaction (level 5 of the lock order in store/db.py):
`append` only queues the entry on the session, and the queued entries are chained and inserted by
a `before_commit` hook, after every other statement of the transaction. A transaction that holds
the head therefore waits for nothing else, whatever order its code appended in; and an entry
exists exactly when its transaction committed."""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from typing import Any

from sqlalchemy import event, select
from sqlalchemy.orm import Session

from apportion.domain import Actor
from apportion.store.db import insert_or_ignore, utcnow
from apportion.store.tables import AuditEntry, AuditHead

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


_PENDING = "audit_pending"


def append(
    session: Session,
    *,
    actor: Actor,
    action: str,
    entity: str,
    entity_id: str | int,
    payload: dict[str, Any] | None = None,
    reason: str | None = None,
) -> None:
    """Queue one entry in the caller's transaction; it is chained and written at commit, in the
    order appended (see the module docstring). The payload is serialized now, so a later change
    to the caller's dict does not alter the entry."""
    session.info.setdefault(_PENDING, []).append(
        {
            "actor_name": actor.name,
            "actor_role": actor.role,
            "action": action,
            "entity": entity,
            "entity_id": str(entity_id),
            "reason": reason,
            "payload": canonical_json(payload or {}),
        }
    )


@event.listens_for(Session, "before_commit")
def _write_pending(session: Session) -> None:
    if session.in_nested_transaction():  # a savepoint: the outermost commit writes them
        return
    pending = session.info.pop(_PENDING, None)
    if not pending:
        return
    session.flush()  # every other change of the transaction first: the head is the last lock
    head = _lock_head(session)
    if head is None:  # the first entry ever; two first writers may race to create the head
        insert_or_ignore(session, AuditHead, {"id": 1, "seq": 0, "hash": GENESIS})
        head = _lock_head(session)
    assert head is not None
    for fields in pending:
        entry = AuditEntry(id=head.seq + 1, at=utcnow(), prev_hash=head.hash, hash="", **fields)
        entry.hash = _entry_hash(head.hash, _body(entry))
        head.seq, head.hash = entry.id, entry.hash
        session.add(entry)
    session.flush()


def _lock_head(session: Session) -> AuditHead | None:
    q = select(AuditHead).where(AuditHead.id == 1).with_for_update()
    return session.execute(q.execution_options(populate_existing=True)).scalar_one_or_none()


@event.listens_for(Session, "after_rollback")
def _drop_pending(session: Session) -> None:
    session.info.pop(_PENDING, None)


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
