"""Applying and checking the Alembic history that lives in ./migrations."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import Engine

MIGRATIONS = Path(__file__).resolve().parents[2] / "migrations"


def alembic_config(url: str) -> Config:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS))
    cfg.set_main_option("sqlalchemy.url", url.replace("%", "%%"))
    return cfg


def upgrade(engine: Engine, revision: str = "head", *, blob_uri: str | None = None) -> None:
    """Apply the history up to `revision`. Migrations that move bytes out of the database write
    them to the blob store at `blob_uri` (default: APPORTION_BLOB_URI, else ./var/blobs)."""
    cfg = alembic_config(str(engine.url.render_as_string(hide_password=False)))
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        cfg.attributes["blob_uri"] = blob_uri
        command.upgrade(cfg, revision)


def head_revision() -> str:
    script = ScriptDirectory.from_config(alembic_config("sqlite://"))
    head = script.get_current_head()
    assert head is not None
    return head


def current_revision(engine: Engine) -> str | None:
    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def is_current(engine: Engine) -> bool:
    try:
        return current_revision(engine) == head_revision()
    except Exception:
        return False
