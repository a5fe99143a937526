"""API keys: only the SHA-256 of a secret is stored; the secret is shown once at creation."""

from __future__ import annotations

import hashlib
import secrets
from dataclasses import dataclass

from sqlalchemy import select
from sqlalchemy.orm import Session

from apportion.errors import Conflict, NotFound
from apportion.store.db import utcnow
from apportion.store.tables import ApiKey

SECRET_PREFIX = "apk_"


def hash_secret(secret: str) -> str:
    return hashlib.sha256(secret.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class KeyRecord:
    id: int
    name: str
    owner: str
    role: str
    secret_sha256: str
    created_at: str
    created_by: str
    revoked_at: str | None

    def public(self) -> dict[str, object]:
        return {
            "id": self.id,
            "name": self.name,
            "owner": self.owner,
            "role": self.role,
            "created_at": self.created_at,
            "created_by": self.created_by,
            "revoked_at": self.revoked_at,
        }


def _record(row: ApiKey) -> KeyRecord:
    return KeyRecord(
        row.id,
        row.name,
        row.owner,
        row.role,
        row.secret_sha256,
        row.created_at,
        row.created_by,
        row.revoked_at,
    )


def create_key(
    *, session: Session, name: str, owner: str, role: str, created_by: str
) -> tuple[KeyRecord, str]:
    secret = SECRET_PREFIX + secrets.token_urlsafe(32)
    row = ApiKey(
        name=name,
        owner=owner,
        role=role,
        secret_sha256=hash_secret(secret),
        created_at=utcnow(),
        created_by=created_by,
    )
    session.add(row)
    session.flush()
    return _record(row), secret


def find_by_hash(*, session: Session, secret_sha256: str) -> KeyRecord | None:
    row = session.execute(
        select(ApiKey).where(ApiKey.secret_sha256 == secret_sha256)
    ).scalar_one_or_none()
    return _record(row) if row else None


def revoke_key(*, session: Session, key_id: int) -> KeyRecord:
    """Revoke a key; never the last active admin key, which would leave nobody able to make or
    revoke keys. The active admin rows are locked (in id order, the one order every caller uses)
    before they are counted, so two admins revoking each other at once cannot both succeed."""
    row = session.get(ApiKey, key_id)
    if row is None:
        raise NotFound(f"no API key with id {key_id}")
    if row.revoked_at is None:
        if row.role == "admin":
            admins = (
                session.execute(
                    select(ApiKey.id)
                    .where(ApiKey.role == "admin", ApiKey.revoked_at.is_(None))
                    .order_by(ApiKey.id)
                    .with_for_update()
                )
                .scalars()
                .all()
            )
            if list(admins) == [key_id]:
                raise Conflict(
                    f"key {key_id} ('{row.name}') is the last active admin key; create another "
                    "admin key before revoking it"
                )
        row.revoked_at = utcnow()
        session.flush()
    return _record(row)


def all_keys(*, session: Session) -> list[KeyRecord]:
    return [_record(r) for r in session.execute(select(ApiKey).order_by(ApiKey.id)).scalars()]
