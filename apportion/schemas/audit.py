"""The audit trail: entries (oldest first, paged by id) and the hash chain's verification."""

from __future__ import annotations

from typing import Any

from pydantic import Field

from apportion.schemas.common import Answer, Timestamp


class AuditEntry(Answer):
    id: int
    at: Timestamp
    actor_name: str
    actor_role: str
    action: str = Field(description="e.g. plan.approve, readout.upload")
    entity: str
    entity_id: str
    reason: str | None
    payload: Any
    prev_hash: str = Field(description="the previous entry's hash (the chain)")
    hash: str = Field(description="SHA-256 of prev_hash and this entry's canonical JSON")


class AuditPage(Answer):
    entries: list[AuditEntry]
    next_after: int | None = Field(description="pass as `after` for the next page; null at the end")


class ChainCheck(Answer):
    intact: bool
    entries: int = Field(description="entries checked")
    first_broken: int | None = Field(description="id of the first entry whose hash does not hold")
    problem: str | None
