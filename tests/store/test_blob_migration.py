"""Migration 0004 moves blobs out of the database: a database at 0003 holding a readout (and a
watch upload's blob) upgrades, the bytes leave the table, and both read back unchanged."""

from __future__ import annotations

import numpy as np
import sqlalchemy as sa

from apportion.ingest.codec import encode_table
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable
from apportion.store.db import Database, make_engine
from apportion.store.migrate import current_revision, head_revision, upgrade
from apportion.usecases.experiments import load_readout_table, readout_data


def _table(n: int = 300, seed: int = 3) -> UnitTable:
    rng = np.random.default_rng(seed)
    plan = rng.integers(-1, 2, size=n).astype(np.int32)  # -1: missing level
    age = rng.normal(100, 30, size=n)
    age[::17] = np.nan
    return UnitTable(
        unit_ids=np.array([f"u{i}" for i in range(n)], dtype=object),
        arm=rng.integers(0, 2, size=n).astype(np.int64),
        arm_keys=("control", "bold"),
        design_shares=np.array([0.5, 0.5]),
        features=(
            FeatureSpec("age_days", "numeric"),
            FeatureSpec("plan", "categorical", ("free", "pro")),
        ),
        feature_values={"age_days": age, "plan": plan},
        metrics=(MetricSpec("spend", "mean"),),
        columns={"spend": rng.gamma(2, 10, size=n)},
    )


def test_readout_and_blob_survive_the_move_out_of_the_database(empty_db_url: str, tmp_path) -> None:
    engine = make_engine(empty_db_url)
    upgrade(engine, "0003")
    table = _table()
    data = encode_table(table)
    other = b"an estimation mask's bytes"
    md = sa.MetaData()
    md.reflect(engine)
    blobs, readouts, experiments = (
        md.tables["blobs"],
        md.tables["readouts"],
        md.tables["experiments"],
    )
    with engine.begin() as c:
        c.execute(
            experiments.insert().values(
                id=1, key="e", name="e", declaration={}, created_at="t", created_by="a"
            )
        )
        for sha, payload in (("a" * 64, data), ("b" * 64, other)):
            c.execute(
                blobs.insert().values(sha256=sha, size=len(payload), data=payload, created_at="t")
            )
        c.execute(
            readouts.insert().values(
                id=7,
                experiment_id=1,
                version=1,
                content_hash="c" * 64,
                content_type="text/csv",
                blob_sha256="a" * 64,
                n_rows=table.n,
                summary={},
                created_at="t",
                created_by="a",
            )
        )
    blob_dir = str(tmp_path / "moved")
    upgrade(engine, blob_uri=blob_dir)
    assert current_revision(engine) == head_revision()
    cols = {c["name"] for c in sa.inspect(engine).get_columns("blobs")}
    assert "data" not in cols and {"kind", "location"} <= cols

    db = Database.connect(empty_db_url, blob_uri=blob_dir)
    try:
        back, _row = load_readout_table(db, readout_id=7)
        assert list(back.unit_ids) == list(table.unit_ids)
        np.testing.assert_array_equal(back.arm, table.arm)
        np.testing.assert_array_equal(back.feature_values["plan"], table.feature_values["plan"])
        np.testing.assert_array_equal(
            back.feature_values["age_days"], table.feature_values["age_days"]
        )
        np.testing.assert_array_equal(back.columns["spend"], table.columns["spend"])
        assert back.features == table.features and back.arm_keys == table.arm_keys
        located = readout_data(db, readout_id=7)
        assert located.n_rows == table.n and all(f.endswith(".parquet") for f in located.files)
        with engine.connect() as c:
            kinds = dict(
                c.execute(sa.select(blobs.c.sha256, sa.column("kind")).select_from(blobs)).all()
            )
        assert kinds["b" * 64] == "object" and "a" * 64 not in kinds  # readout bytes replaced
        assert kinds[located.sha256] == "dataset"
        from apportion.store import blobs as blob_repo

        with db.read() as s:
            assert blob_repo.get_blob(session=s, sha256="b" * 64) == other
    finally:
        db.dispose()
        engine.dispose()
