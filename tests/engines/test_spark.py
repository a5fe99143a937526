"""Spark (local[2], one SparkSession for the whole test session) gives the same fit as the
in-memory engine on the same Parquet readout. Skipped, saying so, where pyspark is not installed;
`.ci/run` installs it, so CI runs these."""

from __future__ import annotations

import pytest

from service.stats.models import fit_cohort_model
from service.stats.pushdown import fit_on_engine

from .test_engines import CASES, _method, assert_same_fit

pytest.importorskip("pyspark", reason="pyspark is not installed (pip install -e '.[spark]')")


@pytest.mark.parametrize("case", ["causal_tree_success"])
def test_spark_fit_equals_in_memory_fit(readout, case, tmp_path):
    # One case keeps CI short (a Spark query costs seconds however small the data); the SQL plan
    # is shared with DuckDB, whose tests cover cross-validation and `global` as well.
    from service.engines import open_engine

    ds, table = readout
    with open_engine(ds, "spark", spark_master="local[2]", scratch=str(tmp_path)) as eng:
        fit = fit_on_engine(eng, _method(case), CASES[case])
    assert fit.diagnostics["engine"] == "spark"
    assert_same_fit(fit_cohort_model(table, _method(case), CASES[case]), fit)
