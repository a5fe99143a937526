"""Content-addressed blobs: the same bytes are stored once."""

from __future__ import annotations

import hashlib

from sqlalchemy.orm import Session

from service.errors import NotFound
from service.store.db import utcnow
from service.store.tables import Blob


def put_blob(*, session: Session, data: bytes) -> str:
    sha = hashlib.sha256(data).hexdigest()
    if session.get(Blob, sha) is None:
        session.add(Blob(sha256=sha, size=len(data), data=data, created_at=utcnow()))
        session.flush()
    return sha


def get_blob(*, session: Session, sha256: str) -> bytes:
    row = session.get(Blob, sha256)
    if row is None:
        raise NotFound(f"blob {sha256} is missing")
    return bytes(row.data)
