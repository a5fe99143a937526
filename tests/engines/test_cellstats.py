"""Cell statistics through the engines, the blob store's dataset layout, and bounded samples.

The engine figures are compared with the in-memory path (`estimates.cell_moments` after
`Partition.route`) at a relative tolerance of 1e-9: the same numbers added in another order."""

from __future__ import annotations

import numpy as np
import pyarrow.fs as pafs
import pytest

from apportion.engines import open_engine
from apportion.engines.dataset import ReadoutDataset
from apportion.ingest.dataset import read_dataset, sample_dataset, write_table
from apportion.stats.models import fit_cohort_model
from apportion.stats.pushdown import fit_on_engine
from apportion.usecases.cellstats import table_cell_statistics

from .test_engines import CASES, assert_same_fit


def assert_same_moments(a, b) -> None:
    assert a.components == b.components
    np.testing.assert_array_equal(a.n, b.n)
    np.testing.assert_allclose(a.mean, b.mean, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(np.nan_to_num(a.cov), np.nan_to_num(b.cov), rtol=1e-9, atol=1e-10)


@pytest.fixture(scope="module")
def fitted(readout):
    _, table = readout
    fit = fit_cohort_model(table, "causal_tree", CASES["causal_tree"])
    assert (
        fit.partition.n_cohorts >= 3
    )  # several cohorts, so the routing has something to get wrong
    return fit


@pytest.fixture(scope="module")
def stored(readout, tmp_path_factory):
    """The readout written in the blob store's layout (arm codes, f0.., c0..), small row groups."""
    _, table = readout
    d = tmp_path_factory.mktemp("stored")
    fs = pafs.LocalFileSystem()
    import apportion.ingest.dataset as dsmod

    w = dsmod.DatasetWriter(fs=fs, directory=str(d), schema=dsmod.spec_of_table(table).schema(),
                            row_group_rows=1_000, file_row_groups=3)  # fmt: skip
    w.write(dsmod.table_batch(table))
    manifest = w.close(dsmod.spec_of_table(table))
    paths = [str(d / f["name"]) for f in manifest.files]
    assert len(paths) >= 3  # several part files, so row order across files matters
    return fs, paths, manifest


def test_partition_moments_equal_the_in_memory_cells(readout, fitted):
    ds, table = readout
    want = table_cell_statistics(table, fitted.partition)
    with open_engine(ds, "duckdb") as eng:
        got = eng.partition_moments(fitted.partition)
    assert_same_moments(want, got)
    assert got.n.sum() == table.n


def test_partition_moments_match_numpy_cov_on_one_cell(readout, fitted):
    # Reference: numpy.cov (ddof=1) and statsmodels' DescrStatsW mean on the rows of one cell.
    from statsmodels.stats.weightstats import DescrStatsW

    ds, table = readout
    cohort, _ = fitted.partition.route(table.feature_values, table.features)
    with open_engine(ds, "duckdb") as eng:
        got = eng.partition_moments(fitted.partition)
    rows = (cohort == 1) & (table.arm == 2)
    x = table.component_matrix()[rows]
    np.testing.assert_allclose(got.cov[1, 2], np.cov(x, rowvar=False), rtol=1e-9)
    assert got.mean[1, 2, 0] == pytest.approx(DescrStatsW(x[:, 0]).mean, rel=1e-12)


def test_missing_and_unseen_levels_follow_the_default_way(readout, fitted, tmp_path):
    # A level the fit never saw, and missing values, go where Partition.route sends them.
    import pyarrow as pa
    import pyarrow.parquet as pq

    ds, table = readout
    t = pq.read_table(ds.files[0])
    for name in ("device", "level"):
        i = t.schema.get_field_index(name)
        col = t.column(i).to_pylist()
        col[::7] = ["a-level-never-seen"] * len(col[::7])
        col[3::11] = [None] * len(col[3::11])
        t = t.set_column(i, name, pa.array(col, type=pa.string()))
    pq.write_table(t, tmp_path / "odd.parquet")
    odd = ReadoutDataset.open(str(tmp_path / "odd.parquet"), arm_keys=ds.arm_keys,
                              design_shares=ds.design_shares, features=ds.features,
                              metrics=ds.metrics)  # fmt: skip
    from apportion.engines.memory import read_table

    with open_engine(odd, "duckdb") as eng:
        got = eng.partition_moments(fitted.partition)
        feats = eng.features
    mem = read_table(odd)
    # route with the levels the engine discovered (the unseen level included)
    assert any("a-level-never-seen" in f.levels for f in feats)
    assert_same_moments(table_cell_statistics(mem, fitted.partition), got)


def test_fit_on_the_stored_layout_equals_the_in_memory_fit(readout, stored):
    _, table = readout
    fs, paths, manifest = stored
    ds = ReadoutDataset.stored(paths, manifest)
    assert ds.arm_coded and ds.column("active_days").startswith("c")
    want = fit_cohort_model(table, "causal_tree", CASES["causal_tree_cv"])
    with open_engine(ds, "duckdb") as eng:
        got = fit_on_engine(eng, "causal_tree", CASES["causal_tree_cv"])
        moments = eng.partition_moments(want.partition)
    assert got.partition.n_cohorts >= 2
    assert_same_fit(want, got)
    assert_same_moments(table_cell_statistics(table, want.partition), moments)


def test_sample_is_uniform_bounded_and_repeatable(stored):
    fs, paths, manifest = stored
    whole, _ = read_dataset(fs, paths, manifest)
    a, _ = sample_dataset(fs, paths, manifest, 3_000, seed=4)
    b, _ = sample_dataset(fs, paths, manifest, 3_000, seed=4)
    c, _ = sample_dataset(fs, paths, manifest, 3_000, seed=5)
    assert a.n == 3_000 and len(set(a.unit_ids)) == 3_000
    np.testing.assert_array_equal(a.unit_ids, b.unit_ids)
    assert not np.array_equal(a.unit_ids, c.unit_ids)
    pos = {u: i for i, u in enumerate(whole.unit_ids)}
    idx = np.array([pos[u] for u in a.unit_ids])
    assert (np.diff(idx) > 0).all()  # in the readout's row order, every row a real one
    np.testing.assert_array_equal(a.arm, whole.arm[idx])
    for f in whole.features:
        np.testing.assert_array_equal(a.feature_values[f.key], whole.feature_values[f.key][idx])
    # Uniform over positions: Kolmogorov-Smirnov against the uniform law (scipy.stats.kstest);
    # with a fixed seed this is a regression check that a biased sampler (e.g. the first row
    # groups only) would fail by a wide margin.
    from scipy.stats import kstest

    assert kstest(idx / whole.n, "uniform").pvalue > 0.01
    full, _ = sample_dataset(fs, paths, manifest, whole.n + 5, seed=4)
    assert full.n == whole.n


def test_write_table_layout_is_what_the_engines_read(readout, tmp_path):
    # write_table (one row group) and the engines agree on which column is which
    _, table = readout
    fs = pafs.LocalFileSystem()
    manifest = write_table(fs, str(tmp_path), table)
    ds = ReadoutDataset.stored([str(tmp_path / f["name"]) for f in manifest.files], manifest)
    from apportion.stats.partition import Partition

    with open_engine(ds, "duckdb") as eng:
        got = eng.partition_moments(Partition.single(table.features))
    assert_same_moments(table_cell_statistics(table, Partition.single(table.features)), got)
