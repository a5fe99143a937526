"""Spark (local[2], one SparkSession for the whole test session) gives the same fit as the
in-memory engine on the same Parquet readout. Skipped, saying so, where pyspark is not installed;
`.ci/run` installs it, so CI runs these."""

from __future__ import annotations

import pytest

from apportion.stats.models import fit_cohort_model
from apportion.stats.pushdown import fit_on_engine

from .test_engines import CASES, assert_same_fit
from .test_not_personalized import dataset, splits

pytest.importorskip("pyspark", reason="pyspark is not installed (pip install -e '.[spark]')")


SMALL = {**CASES["causal_tree_success"], "max_depth": 2, "features": ["tenure_days", "level"]}


@pytest.mark.parametrize("method", ["causal_tree", "global"])
def test_spark_fit_equals_in_memory_fit(readout, tmp_path, method):
    # Small fits keep CI short (a Spark query costs seconds however small the data); the SQL
    # plan is shared with DuckDB, whose tests cover cross-validation and deeper trees.
    from apportion.engines import open_engine

    ds, table = readout
    params = SMALL if method == "causal_tree" else {}
    conf = {"spark.sql.shuffle.partitions": "2"}
    with open_engine(ds, "spark", spark_master="local[2]", scratch=str(tmp_path),
                     spark_conf=conf) as eng:  # fmt: skip
        fit = fit_on_engine(eng, method, params)
    assert fit.diagnostics["engine"] == "spark"
    if method == "causal_tree":
        assert fit.partition.n_cohorts >= 2  # a split was found, so the comparison has teeth
    assert_same_fit(fit_cohort_model(table, method, params), fit)


def test_spark_never_splits_on_a_feature_not_for_personalization(tmp_path):
    # the readout of tests/engines/test_not_personalized.py, whose unflagged DuckDB fit splits on
    # age_band (so this check has teeth); here in the Spark module so one worker starts the JVM
    used, partition_features = splits("spark", dataset(tmp_path, flagged=True), tmp_path)
    assert "age_band" not in used and "age_band" not in partition_features
