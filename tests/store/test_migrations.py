"""The migration history and the models agree, on every backend (conventions: `alembic check`)."""

from __future__ import annotations

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from fastapi.testclient import TestClient

from apportion.store.db import make_engine
from apportion.store.migrate import current_revision, head_revision, upgrade
from apportion.store.tables import Base


def test_upgrade_head_then_autogenerate_finds_no_difference(empty_db_url: str) -> None:
    engine = make_engine(empty_db_url)
    upgrade(engine)
    assert current_revision(engine) == head_revision()
    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True, "render_as_batch": True})
        diff = compare_metadata(ctx, Base.metadata)
    engine.dispose()
    assert diff == []


def test_readyz_is_503_while_schema_is_behind(empty_db_url: str) -> None:
    from support import make_settings

    from apportion.app import create_app

    app = create_app(make_settings(empty_db_url, migrate_on_start=False))
    with TestClient(app) as c:
        r = c.get("/readyz")
        assert r.status_code == 503
        assert r.json()["checks"]["migrations"] is False
        upgrade(app.state.services.db.engine)
        assert c.get("/readyz").json()["checks"]["migrations"] is True
