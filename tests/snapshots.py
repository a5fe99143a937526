"""Databases copied from a known state: the migrated template every test starts from, and
module snapshots (a fitted model, a drafted plan) that each test of a module gets a copy of.

A copy is a file copy on SQLite and PostgreSQL's CREATE DATABASE ... TEMPLATE, both far cheaper
than replaying the migrations or refitting. Under pytest-xdist each worker's PostgreSQL databases
carry the worker's tag, so workers never share one."""

from __future__ import annotations

import itertools
import shutil
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from support import (
    BLOB_DIRS,
    PG_URL,
    Keys,
    drop_postgres,
    make_keys,
    make_settings,
    recreate_postgres,
    worker_tag,
)

BACKENDS = ["sqlite"] + (["postgresql"] if PG_URL else [])
_names = itertools.count(1)


def pg_name(label: str) -> str:
    from sqlalchemy.engine import make_url

    assert PG_URL
    return f"{make_url(PG_URL).database}_{worker_tag()}_{label}"


def _sqlite_path(url: str) -> Path:
    return Path(url[len("sqlite:///") :])


@dataclass
class Snapshot:
    """A database (and its blob store) left in a known state, to be copied for each test."""

    backend: str
    url: str
    blobs: str
    keys: Keys | None = None
    data: dict[str, Any] = field(default_factory=dict)

    def clone(self, tmp_path: Path) -> str:
        """A private copy for one test; returns its URL (the copy's blobs beside it)."""
        if self.backend == "sqlite":
            src = _sqlite_path(self.url)
            for f in src.parent.glob(src.name + "*"):  # the file and any -wal / -shm beside it
                shutil.copy(f, tmp_path / f.name.replace(src.name, "apportion.db"))
            if Path(self.blobs).is_dir():
                shutil.copytree(self.blobs, tmp_path / "blobs")
            return f"sqlite:///{tmp_path}/apportion.db"
        url = recreate_postgres(pg_name("test"), template=self.url.rsplit("/", 1)[-1])
        blobs = tmp_path / "blobs"
        if Path(self.blobs).is_dir():
            shutil.copytree(self.blobs, blobs)
        else:
            blobs.mkdir()
        BLOB_DIRS[url] = str(blobs)
        return url


def empty_database(backend: str, directory: Path, label: str) -> str:
    if backend == "sqlite":
        return f"sqlite:///{directory}/apportion.db"
    url = recreate_postgres(pg_name(label))
    BLOB_DIRS[url] = str(directory / "blobs")
    return url


def snapshot(
    migrated: Snapshot,
    tmp_path_factory: pytest.TempPathFactory,
    build: Callable[[TestClient, Keys], dict[str, Any]],
    **settings: Any,
) -> Snapshot:
    """Run `build(client, keys)` once against a fresh migrated database with keys of every role,
    wait until no job is left running, stop the app and keep the database: each test then gets a
    copy through a `db_url` fixture returning `snap.clone(tmp_path)` and the same keys. For a
    module-scoped fixture; the caller drops it with `drop_snapshot` after the module."""
    from apportion.app import create_app

    d = tmp_path_factory.mktemp("snapshot")
    if migrated.backend == "sqlite":
        url = migrated.clone(d)
    else:  # a database of its own name, copied from the migrated template
        template = migrated.url.rsplit("/", 1)[-1]
        url = recreate_postgres(pg_name(f"snap{next(_names)}"), template=template)
        BLOB_DIRS[url] = str(d / "blobs")
    app = create_app(make_settings(url, **settings))
    with TestClient(app, raise_server_exceptions=False) as client:
        keys = make_keys(app.state.services)
        data = build(client, keys)
        _wait_idle(app.state.services)
    return Snapshot(migrated.backend, url, str(Path(make_settings(url).blob_uri)), keys, data)


def drop_snapshot(snap: Snapshot) -> None:
    if snap.backend == "postgresql":
        drop_postgres(snap.url.rsplit("/", 1)[-1])


def _wait_idle(services: Any, timeout: float = 120.0) -> None:
    """Wait until the job table has no queued or running job (a snapshot taken mid-job would
    hand each copy a job to finish)."""
    from sqlalchemy import text

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        with services.db.engine.connect() as conn:
            busy = conn.execute(
                text("SELECT count(*) FROM jobs WHERE status IN ('queued', 'running')")
            ).scalar_one()
        if busy == 0:
            return
        time.sleep(0.05)
    raise AssertionError(f"jobs still running after {timeout} s")


def module_snapshot(
    build: Callable[[TestClient, Keys], dict[str, Any]], **settings: Any
) -> tuple[Any, Any, Any]:
    """Fixtures for a module whose tests all start from the state `build` makes:
    `snap, db_url, keys = module_snapshot(build)` at module level builds it once per backend
    (module scope), gives each test its own copy (`db_url`, which the shared `app` and `client`
    fixtures pick up) and the snapshot's keys; `snap.data` is what `build` returned. `settings`
    go to the app that builds the state (the tests' own app takes the usual settings)."""

    @pytest.fixture(scope="module")
    def snap(migrated: Snapshot, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Snapshot]:
        made = snapshot(migrated, tmp_path_factory, build, **settings)
        yield made
        drop_snapshot(made)

    @pytest.fixture
    def db_url(snap: Snapshot, tmp_path: Path) -> str:
        return snap.clone(tmp_path)

    @pytest.fixture
    def keys(snap: Snapshot, client: TestClient) -> Keys:
        assert snap.keys is not None
        return snap.keys

    return snap, db_url, keys
