"""Shared fixtures. Tests that need a database run on SQLite always, and on PostgreSQL too when
APPORTION_TEST_DATABASE_URL is set.

Each test gets its own database, already migrated: the migrations run once per backend and worker
into a template (a SQLite file, a PostgreSQL database), and every test gets a copy of it (a file
copy; PostgreSQL's CREATE DATABASE ... TEMPLATE). A module whose tests all start from the same
fitted model builds that state once with `snapshot(...)` and gives each test a copy of it the same
way, so a test may still change what it was given. Under pytest-xdist every worker has its own
databases (their names carry the worker's tag) and its own temporary directories."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from snapshots import BACKENDS, Snapshot, empty_database, pg_name
from support import Keys, drop_postgres, make_keys, make_settings, reset_postgres


@pytest.fixture(scope="session", params=BACKENDS)
def backend(request: pytest.FixtureRequest) -> str:
    return str(request.param)


@pytest.fixture(scope="session")
def migrated(backend: str, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Snapshot]:
    """An empty database at the head revision, made once per backend (and worker)."""
    from apportion.store.db import Database
    from apportion.store.migrate import upgrade

    d = tmp_path_factory.mktemp(f"migrated-{backend}")
    url = empty_database(backend, d, "migrated")
    db = Database.connect(url, pool_size=1)
    try:
        upgrade(db.engine, blob_uri=str(d / "blobs"))
    finally:
        db.dispose()
    yield Snapshot(backend, url, str(d / "blobs"))
    if backend == "postgresql":
        drop_postgres(pg_name("migrated"))


@pytest.fixture
def db_url(migrated: Snapshot, tmp_path: Path) -> str:
    """A private copy of the migrated template."""
    return migrated.clone(tmp_path)


@pytest.fixture
def empty_db_url(backend: str, tmp_path: Path) -> str:
    """A database with no tables at all (for the migration tests)."""
    if backend == "sqlite":
        return f"sqlite:///{tmp_path}/apportion.db"
    return reset_postgres("empty")


@pytest.fixture
def app(db_url: str):  # type: ignore[no-untyped-def]
    from apportion.app import create_app

    return create_app(make_settings(db_url))


@pytest.fixture
def client(app) -> Iterator[TestClient]:  # type: ignore[no-untyped-def]
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture
def keys(client: TestClient) -> Keys:
    return make_keys(client.app.state.services)  # type: ignore[attr-defined]
