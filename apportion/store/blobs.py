"""Content-addressed blobs: metadata rows here, bytes in the blob store. The same bytes are stored
once; every final location is derived from the hash (see store/blobstore.py).

The blob store travels with the session (`session.info["blobs"]`, set by `Database`), so callers
keep passing only their session."""

from __future__ import annotations

from sqlalchemy.orm import Session

from apportion.errors import NotFound
from apportion.store.blobstore import BlobStore
from apportion.store.db import insert_or_ignore, utcnow
from apportion.store.tables import Blob


def store_of(session: Session) -> BlobStore:
    store = session.info.get("blobs")
    if store is None:  # pragma: no cover - Database always sets it
        raise RuntimeError("this session has no blob store")
    return store


def _add_row(session: Session, *, sha256: str, size: int, kind: str, location: str) -> None:
    """Insert the metadata row unless it exists; a racing twin's insert is not an error."""
    values = {
        "sha256": sha256,
        "size": size,
        "kind": kind,
        "location": location,
        "created_at": utcnow(),
    }
    insert_or_ignore(session, Blob, values)


def put_blob(*, session: Session, data: bytes) -> str:
    store = store_of(session)
    sha, location = store.put_object(data)
    if session.get(Blob, sha) is None:
        _add_row(session, sha256=sha, size=len(data), kind="object", location=location)
    return sha


def get_blob(*, session: Session, sha256: str) -> bytes:
    row = session.get(Blob, sha256)
    if row is None:
        raise NotFound(f"blob {sha256} is missing")
    return store_of(session).get_object(row.location)


def add_dataset(*, session: Session, sha256: str, size: int, location: str) -> str:
    """Record a published dataset (see BlobStore.publish_dataset); returns its hash."""
    if session.get(Blob, sha256) is None:
        _add_row(session, sha256=sha256, size=size, kind="dataset", location=location)
    return sha256


def dataset_location(*, session: Session, sha256: str) -> str:
    """The dataset's location relative to the blob store root."""
    row = session.get(Blob, sha256)
    if row is None or row.kind != "dataset":
        raise NotFound(f"dataset {sha256} is missing")
    return row.location
