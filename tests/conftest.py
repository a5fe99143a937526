"""Shared fixtures. Tests that need a database run on SQLite always, and on PostgreSQL too when
APPORTION_TEST_DATABASE_URL is set (each test gets an empty schema)."""

from __future__ import annotations

import os
from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from support import Keys, make_keys, make_settings, reset_postgres

PG_URL = os.environ.get("APPORTION_TEST_DATABASE_URL")
BACKENDS = ["sqlite"] + (["postgresql"] if PG_URL else [])


@pytest.fixture(params=BACKENDS)
def db_url(request: pytest.FixtureRequest, tmp_path) -> str:  # type: ignore[no-untyped-def]
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path}/apportion.db"
    assert PG_URL
    return reset_postgres(PG_URL)


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
