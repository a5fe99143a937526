"""Migration 0005 (method comparisons) goes up and down on every backend and leaves 0004's schema
as it found it."""

from __future__ import annotations

from alembic import command
from sqlalchemy import inspect

from apportion.store.db import make_engine
from apportion.store.migrate import alembic_config, current_revision, upgrade


def _downgrade(engine, revision: str) -> None:  # type: ignore[no-untyped-def]
    cfg = alembic_config(str(engine.url.render_as_string(hide_password=False)))
    with engine.begin() as conn:
        cfg.attributes["connection"] = conn
        command.downgrade(cfg, revision)


def test_comparisons_table_up_down_up(empty_db_url: str) -> None:
    engine = make_engine(empty_db_url)
    upgrade(engine, "0004")
    before = sorted(inspect(engine).get_table_names())
    assert "comparisons" not in before
    upgrade(engine, "0005")
    insp = inspect(engine)
    assert "comparisons" in insp.get_table_names()
    cols = {c["name"] for c in insp.get_columns("comparisons")}
    assert {"experiment_id", "number", "readout_id", "model_id", "spec", "status", "job_id",
            "result"} <= cols  # fmt: skip
    uniques = {u["name"] for u in insp.get_unique_constraints("comparisons")}
    assert "uq_comparisons_experiment_number" in uniques
    _downgrade(engine, "0004")
    assert current_revision(engine) == "0004"
    assert sorted(inspect(engine).get_table_names()) == before
    upgrade(engine, "0005")
    assert "comparisons" in inspect(engine).get_table_names()
    engine.dispose()
