"""The pushdown engines (DuckDB and Spark, over Parquet files) never split on a feature declared
`personalize: false`: the same readout as tests/stats/test_not_personalized.py (its effect varies
only by `age_band`), written as Parquet. The unflagged fit on DuckDB splits on `age_band`, so the flagged fit's
assertion has teeth. Spark runs the same SQL plan (engines/sql.py); its flagged fit is in
tests/engines/test_spark.py, so that one module (one pytest-xdist worker) starts the only JVM."""

from __future__ import annotations

import pyarrow.parquet as pq
from support import effect_by_band_only

from apportion.engines import open_engine
from apportion.engines.dataset import ReadoutDataset
from apportion.stats.pushdown import fit_on_engine

from .conftest import parquet_columns

PARAMS = {"cv_folds": 0, "max_depth": 2, "min_units_per_arm": 100, "seed": 3}


def dataset(tmp_path, flagged: bool) -> ReadoutDataset:  # type: ignore[no-untyped-def]
    table = effect_by_band_only(flagged=flagged)
    d = tmp_path / ("flagged" if flagged else "plain")
    d.mkdir()
    pq.write_table(parquet_columns(table), d / "part-0.parquet", row_group_size=2_000)
    return ReadoutDataset.open(str(d), arm_keys=table.arm_keys,
                               design_shares=table.design_shares, features=table.features,
                               metrics=table.metrics)  # fmt: skip


def splits(engine_name: str, ds: ReadoutDataset, tmp_path) -> tuple[set[str], list[str]]:  # type: ignore[no-untyped-def]
    kw = {}
    if engine_name == "spark":
        kw = {"spark_master": "local[2]", "spark_conf": {"spark.sql.shuffle.partitions": "2"}}
    with open_engine(ds, engine_name, scratch=str(tmp_path), **kw) as eng:  # type: ignore[arg-type]
        fit = fit_on_engine(eng, "causal_tree", PARAMS)
    used = {s["feature"] for s in fit.diagnostics["splits"]}
    return used, [f.key for f in fit.partition.features]


def test_duckdb_never_splits_on_a_feature_not_for_personalization(tmp_path):  # type: ignore[no-untyped-def]
    used, _ = splits("duckdb", dataset(tmp_path, flagged=False), tmp_path)
    assert "age_band" in used, "the readout must drive a split on age_band"
    used, partition_features = splits("duckdb", dataset(tmp_path, flagged=True), tmp_path)
    assert "age_band" not in used and "age_band" not in partition_features
