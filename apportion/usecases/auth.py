"""Authentication and roles. Secrets are hashed on arrival and compared in constant time; they are
never stored or logged. The lookup path authenticates from an in-memory cache refreshed by the
poller, so it never touches the database; every other route asks the database."""

from __future__ import annotations

import hmac
import threading

from apportion.domain import ROLE_RANK, ROLES, Actor
from apportion.errors import Forbidden, Unauthenticated
from apportion.store import audit
from apportion.store import keys as keys_store
from apportion.store.db import Database


def check_role(actor: Actor, needed: str) -> None:
    if ROLE_RANK[actor.role] < ROLE_RANK[needed]:
        raise Forbidden(
            f"this route needs the '{needed}' role; the key '{actor.name}' has '{actor.role}'"
        )


def parse_bearer(header: str | None) -> str:
    if not header:
        raise Unauthenticated("send an API key as 'Authorization: Bearer <key>'")
    scheme, _, secret = header.partition(" ")
    if scheme.lower() != "bearer" or not secret.strip():
        raise Unauthenticated("the Authorization header must be 'Bearer <key>'")
    return secret.strip()


class KeyCache:
    """sha256(secret) -> live key, for lookups that must not wait on the database."""

    def __init__(self, db: Database) -> None:
        self._db = db
        self._keys: dict[str, keys_store.KeyRecord] = {}
        self._lock = threading.Lock()

    def refresh(self) -> None:
        with self._db.read() as s:
            fresh = {
                k.secret_sha256: k for k in keys_store.all_keys(session=s) if k.revoked_at is None
            }
        self._keys = fresh

    def authenticate_cached(self, header: str | None) -> Actor:
        digest = keys_store.hash_secret(parse_bearer(header))
        rec = self._keys.get(digest)
        if rec is None or not hmac.compare_digest(rec.secret_sha256, digest):
            raise Unauthenticated("unknown or revoked API key")
        return Actor(rec.name, rec.role, rec.id, rec.owner)

    def authenticate(self, header: str | None) -> Actor:
        digest = keys_store.hash_secret(parse_bearer(header))
        with self._db.read() as s:
            rec = keys_store.find_by_hash(session=s, secret_sha256=digest)
        if (
            rec is None
            or rec.revoked_at is not None
            or not hmac.compare_digest(rec.secret_sha256, digest)
        ):
            raise Unauthenticated("unknown or revoked API key")
        return Actor(rec.name, rec.role, rec.id, rec.owner)


def create_key(
    db: Database, *, name: str, owner: str, role: str, actor: Actor
) -> tuple[keys_store.KeyRecord, str]:
    if role not in ROLE_RANK:
        from apportion.errors import InvalidInput

        raise InvalidInput(
            f"role must be one of {', '.join(ROLES)}; got '{role}'",
            errors=[{"field": "role", "problem": f"unknown role '{role}'"}],
        )
    with db.write() as s:
        rec, secret = keys_store.create_key(
            session=s, name=name, owner=owner, role=role, created_by=actor.name
        )
        audit.append(
            s,
            actor=actor,
            action="key.create",
            entity="api_key",
            entity_id=rec.id,
            payload={"name": name, "owner": owner, "role": role},
        )
    return rec, secret


def revoke_key(
    db: Database, *, key_id: int, actor: Actor, reason: str | None = None
) -> keys_store.KeyRecord:
    with db.write() as s:
        rec = keys_store.revoke_key(session=s, key_id=key_id)
        audit.append(
            s,
            actor=actor,
            action="key.revoke",
            entity="api_key",
            entity_id=key_id,
            payload={"name": rec.name, "owner": rec.owner, "role": rec.role},
            reason=reason,
        )
    return rec


SYSTEM = Actor("system", "admin", owner="system")
