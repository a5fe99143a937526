"""Running the service: opening the database the settings name, bringing its schema to the
latest migration, and the readiness checks. The command line and the probes call these, so
neither reaches into the store."""

from __future__ import annotations

from typing import Any

from apportion.config import Settings
from apportion.store.db import Database, ping
from apportion.store.migrate import current_revision, head_revision, is_current, upgrade
from apportion.usecases.context import Services


def open_database(settings: Settings, *, pool_size: int | None = None) -> Database:
    """The metadata store and blob store the settings name (a connection pool of `pool_size`, or
    the store's default)."""
    if pool_size is None:
        return Database.connect(settings.database_url, blob_uri=settings.blob_uri)
    return Database.connect(settings.database_url, pool_size=pool_size, blob_uri=settings.blob_uri)


def upgrade_database(db: Database) -> None:
    """Apply every migration not yet applied (migrations that move bytes write to the blobs)."""
    upgrade(db.engine, blob_uri=db.blobs.uri if db.blobs is not None else None)


def migration_state(db: Database) -> tuple[str | None, str]:
    """(the database's current revision, the latest revision this code knows)."""
    return current_revision(db.engine), head_revision()


def schema_is_current(db: Database) -> bool:
    return is_current(db.engine)


def readiness(services: Services) -> dict[str, bool]:
    """database reachable, migrations current, live plans loaded at least once."""
    checks: dict[str, Any] = {}
    checks["database"] = ping(services.db)
    checks["migrations"] = checks["database"] and is_current(services.db.engine)
    checks["plans_loaded"] = bool(
        services.plans is not None and services.plans.last_refresh is not None
    )
    return checks
