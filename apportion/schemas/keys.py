"""API keys (admin): create one (its secret shown once), revoke one."""

from __future__ import annotations

from pydantic import BaseModel, Field

from apportion.domain import Role
from apportion.schemas.common import Answer, Timestamp

IDENTITY = r"^[A-Za-z0-9_.@-]+$"


class KeyCreate(BaseModel):
    name: str = Field(
        min_length=1,
        max_length=100,
        pattern=IDENTITY,
        description="the key's label, e.g. 'ci-deploy'",
    )
    owner: str = Field(
        min_length=1,
        max_length=100,
        pattern=IDENTITY,
        description="the person or system identity the key belongs to (e.g. 'ana@example.org'); "
        "separation of duties compares owners, so one owner's keys never approve that owner's drafts",
    )
    role: Role


class KeyOut(Answer):
    id: int
    name: str
    owner: str
    role: str
    created_at: Timestamp
    created_by: str
    revoked_at: Timestamp | None = None


class KeyCreated(KeyOut):
    secret: str = Field(description="shown once; only its SHA-256 is stored")
