"""The three engines give the same fit: the same partition (every split, threshold and level set)
and the same estimates, for every method the engines fit, on the same Parquet readout.

Estimates are compared at a relative tolerance of 1e-9: the engines add the same numbers in a
different order (SQL aggregates in parallel), so only the last bits of a float64 sum may differ."""

from __future__ import annotations

import numpy as np
import pytest

from apportion.engines import choose_engine, open_engine
from apportion.errors import InvalidInput
from apportion.stats.models import fit_cohort_model
from apportion.stats.pushdown import fit_on_engine

CASES = {
    "causal_tree": {"cv_folds": 0, "max_depth": 4, "min_units_per_arm": 40},
    "causal_tree_cv": {"cv_folds": 2, "max_depth": 3, "seed": 2, "min_units_per_arm": 100},
    "causal_tree_success": {
        "cv_folds": 0,
        "max_depth": 3,
        "success_metric": "abandon_rate",
        "estimation_fraction": 0.4,
        "max_bins": 16,
        "seed": 9,
    },
    "global": {},
}


def _method(case: str) -> str:
    return "global" if case == "global" else "causal_tree"


def assert_same_fit(a, b) -> None:
    pa, pb = a.partition, b.partition
    assert pa.n_cohorts == pb.n_cohorts
    assert pa.cohort_rules() == pb.cohort_rules()
    np.testing.assert_array_equal(pa.feature, pb.feature)
    np.testing.assert_array_equal(pa.threshold, pb.threshold)
    assert pa.left_levels == pb.left_levels and pa.right_levels == pb.right_levels
    np.testing.assert_array_equal(pa.default_left, pb.default_left)
    np.testing.assert_array_equal(pa.cohort, pb.cohort)
    np.testing.assert_array_equal(a.estimation_mask, b.estimation_mask)
    np.testing.assert_array_equal(a.estimates.n, b.estimates.n)
    np.testing.assert_allclose(a.shares, b.shares, rtol=1e-12)
    for name in ("mean", "se", "effect", "effect_se"):
        np.testing.assert_allclose(getattr(a.estimates, name), getattr(b.estimates, name),
                                   rtol=1e-9, atol=1e-12, err_msg=name)  # fmt: skip
    if "cv_penalty" in a.diagnostics:
        assert b.diagnostics["cv_penalty"] == pytest.approx(a.diagnostics["cv_penalty"], rel=1e-9)
        np.testing.assert_allclose(a.diagnostics["cv_scores"], b.diagnostics["cv_scores"],
                                   rtol=1e-9, atol=1e-12)  # fmt: skip


@pytest.fixture(scope="module")
def memory_fits(readout):
    _, table = readout
    return {c: fit_cohort_model(table, _method(c), p) for c, p in CASES.items()}


@pytest.mark.parametrize("case", sorted(CASES))
def test_duckdb_fit_equals_in_memory_fit(readout, memory_fits, case):
    ds, _ = readout
    with open_engine(ds, "duckdb") as eng:
        fit = fit_on_engine(eng, _method(case), CASES[case])
    assert fit.diagnostics["engine"] == "duckdb"
    if case != "global":
        assert fit.partition.n_cohorts >= 2  # a split was found, so the comparison has teeth
    assert_same_fit(memory_fits[case], fit)


def test_duckdb_out_of_core_gives_the_same_fit(readout, memory_fits, tmp_path):
    # A memory limit far below what the working table takes: DuckDB spills to its temp directory.
    ds, _ = readout
    with open_engine(ds, "duckdb", memory_limit="24MB", scratch=str(tmp_path)) as eng:
        fit = fit_on_engine(eng, "causal_tree", CASES["causal_tree"])
    assert_same_fit(memory_fits["causal_tree"], fit)
    assert list(tmp_path.iterdir()) == []  # the engine's scratch files are removed


def test_estimates_match_statsmodels(readout):
    # Reference: statsmodels' DescrStatsW (mean and the standard error of the mean, ddof=1) on
    # each cohort x arm cell of the estimation rows, routed with the fitted partition.
    from statsmodels.stats.weightstats import DescrStatsW

    ds, table = readout
    with open_engine(ds, "duckdb") as eng:
        fit = fit_on_engine(eng, "causal_tree", CASES["causal_tree"])
    cohort, _ = fit.partition.route(table.feature_values, table.features)
    k = fit.estimates.metric_keys.index("active_days")
    for c in range(fit.partition.n_cohorts):
        for j in range(table.n_arms):
            rows = fit.estimation_mask & (cohort == c) & (table.arm == j)
            d = DescrStatsW(table.columns["active_days"][rows])
            assert fit.estimates.mean[c, j, k] == pytest.approx(d.mean, rel=1e-10)
            assert fit.estimates.se[c, j, k] == pytest.approx(d.std_mean, rel=1e-8)


@pytest.mark.parametrize("method", ["segments", "intersect"])
def test_methods_without_a_pushed_down_fit_are_refused_by_name(readout, method):
    ds, _ = readout
    params = {"features": ["level"]} if method == "segments" else {}
    with open_engine(ds, "duckdb") as eng, pytest.raises(InvalidInput, match=method):
        fit_on_engine(eng, method, params)


def test_non_finite_metric_values_are_refused(tmp_path, readout):
    import pyarrow as pa
    import pyarrow.parquet as pq

    from apportion.engines.dataset import ReadoutDataset

    ds, _ = readout
    t = pq.read_table(ds.files[0])
    col = t.column("active_days").to_numpy().copy()
    col[[3, 7]] = np.inf
    t = t.set_column(t.schema.get_field_index("active_days"), "active_days", pa.array(col))
    pq.write_table(t, tmp_path / "bad.parquet")
    bad = ReadoutDataset.open(str(tmp_path / "bad.parquet"), arm_keys=ds.arm_keys,
                              design_shares=ds.design_shares, features=ds.features,
                              metrics=ds.metrics)  # fmt: skip
    with (
        open_engine(bad, "duckdb") as eng,
        pytest.raises(InvalidInput, match="'active_days' has 2"),
    ):
        fit_on_engine(eng, "causal_tree", {})


def test_engine_choice():
    assert choose_engine(10, spark_master=None, duckdb_min_rows=100) == "memory"
    assert choose_engine(101, spark_master=None, duckdb_min_rows=100) == "duckdb"
    assert choose_engine(10, spark_master="local[2]", duckdb_min_rows=100) == "memory"
    assert choose_engine(101, spark_master="local[2]", duckdb_min_rows=100) == "spark"
    assert (
        choose_engine(10**9, spark_master=None, duckdb_min_rows=100, requested="memory") == "memory"
    )
    with pytest.raises(InvalidInput, match="APPORTION_SPARK_MASTER"):
        choose_engine(10, spark_master=None, duckdb_min_rows=100, requested="spark")
    with pytest.raises(InvalidInput, match="engine must be one of"):
        choose_engine(10, spark_master=None, duckdb_min_rows=100, requested="gpu")


def test_quantile_positions_are_numpys():
    # Reference: numpy.quantile(method="inverted_cdf") (Hyndman and Fan's definition 1) on
    # distinct values 0..n-1, where the value is the position; sizes include ones where n * p is
    # whole and ones where float64 rounding decides.
    from apportion.engines.sql import inverted_cdf_positions

    for n in (1, 2, 3, 7, 10, 64, 100, 999, 1000, 12_345):
        for max_bins in (2, 3, 10, 16, 64, 255):
            probs = np.arange(1, max_bins) / max_bins
            want = np.quantile(np.arange(n), probs, method="inverted_cdf")
            np.testing.assert_array_equal(inverted_cdf_positions(n, probs), want)


@pytest.mark.parametrize("cap", [100_000, 10], ids=["value-counts", "buckets-then-values"])
def test_engine_quantiles_equal_numpys_with_ties_and_missing(tmp_path, monkeypatch, cap):
    # Reference: numpy.quantile(method="inverted_cdf") over the non-missing values. With a cap of
    # 10 distinct values the feature takes the bucketed path (equal-width buckets, then the values
    # of the buckets that hold a wanted position).
    import apportion.engines.sql as sqlmod

    monkeypatch.setattr(sqlmod, "DISTINCT_CAP", cap)
    monkeypatch.setattr(sqlmod, "BUCKETS", 64)
    import pyarrow as pa
    import pyarrow.parquet as pq

    from apportion.engines.dataset import ReadoutDataset
    from apportion.stats.table import FeatureSpec, MetricSpec

    rng = np.random.default_rng(8)
    x = np.round(rng.gamma(2.0, 3.0, 5_000), 1)  # many ties, a long right tail
    x[rng.choice(5_000, 400, replace=False)] = np.nan
    mask = np.zeros(5_000, dtype=bool)
    mask[:50] = True  # nulls as well as NaN
    t = pa.table({"unit_id": [f"u{i}" for i in range(5_000)], "arm": ["a"] * 2_500 + ["b"] * 2_500,
                  "x": pa.array(x, mask=mask), "y": rng.normal(size=5_000)})  # fmt: skip
    pq.write_table(t, tmp_path / "q.parquet", row_group_size=700)
    ds = ReadoutDataset.open(str(tmp_path / "q.parquet"), arm_keys=("a", "b"), design_shares=[0.5, 0.5],
                             features=(FeatureSpec("x", "numeric"),), metrics=(MetricSpec("y", "mean"),))  # fmt: skip
    kept = x[~mask & ~np.isnan(x)]
    for max_bins in (4, 16, 64):
        probs = np.arange(1, max_bins) / max_bins
        with open_engine(ds, "duckdb", memory_limit="64MB") as eng:
            q, lo = eng.quantiles(["x"], probs)["x"]
        np.testing.assert_array_equal(q, np.quantile(kept, probs, method="inverted_cdf"))
        assert lo == kept.min()
