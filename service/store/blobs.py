"""Content-addressed blobs: the same bytes are stored once."""

from __future__ import annotations

import hashlib

from sqlalchemy import select
from sqlalchemy.orm import Session

from service.errors import NotFound
from service.store.db import insert_or_ignore, utcnow
from service.store.tables import Blob


def put_blob(*, session: Session, data: bytes) -> str:
    """Store the bytes once. Two transactions storing the same bytes at once (the same mask from two
    fits, the same table under two experiments) both succeed: the second waits and skips."""
    sha = hashlib.sha256(data).hexdigest()
    if session.execute(select(Blob.sha256).where(Blob.sha256 == sha)).first() is None:
        insert_or_ignore(
            session, Blob, {"sha256": sha, "size": len(data), "data": data, "created_at": utcnow()}
        )
    return sha


def get_blob(*, session: Session, sha256: str) -> bytes:
    row = session.get(Blob, sha256)
    if row is None:
        raise NotFound(f"blob {sha256} is missing")
    return bytes(row.data)
