"""Shared fixtures. Tests that need a database run on SQLite always, and on PostgreSQL too when
APPORTION_TEST_DATABASE_URL is set (each test gets an empty schema)."""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import create_engine, text
from support import Keys, make_keys, make_settings

PG_URL = os.environ.get("APPORTION_TEST_DATABASE_URL")
BACKENDS = ["sqlite"] + (["postgresql"] if PG_URL else [])


def _reset_postgres(url: str) -> str:
    if url.startswith("postgresql://"):
        url = "postgresql+psycopg://" + url[len("postgresql://") :]
    eng = create_engine(url, isolation_level="AUTOCOMMIT")
    with eng.connect() as c:
        c.execute(text("DROP SCHEMA IF EXISTS public CASCADE"))
        c.execute(text("CREATE SCHEMA public"))
    eng.dispose()
    return url


@pytest.fixture(params=BACKENDS)
def db_url(request: pytest.FixtureRequest, tmp_path) -> str:  # type: ignore[no-untyped-def]
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path}/apportion.db"
    assert PG_URL
    return _reset_postgres(PG_URL)


@pytest.fixture
def app(db_url: str):  # type: ignore[no-untyped-def]
    from service.app import create_app

    return create_app(make_settings(db_url))


@pytest.fixture
def client(app) -> Iterator[TestClient]:  # type: ignore[no-untyped-def]
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


@pytest.fixture
def keys(client: TestClient) -> Keys:
    return make_keys(client.app.state.services)  # type: ignore[attr-defined]
