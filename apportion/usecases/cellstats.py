"""Reading a stored readout without holding it whole: per-cell statistics through the fit
engines, and bounded samples of rows for the steps that need rows.

Every step after the upload that reads a readout goes through here, so none of them needs the
whole readout in memory once it is larger than `fit_engine_min_rows`:

- `cell_statistics(services, readout_id=..., partition=...)`: `estimates.CellMoments` per
  (cohort of the partition, arm) over every row, from the in-memory numpy path for small
  readouts and from DuckDB (or Spark when `APPORTION_SPARK_MASTER` is set) above the threshold;
  the same numbers either way (tests/engines/test_cellstats.py).
- `readout_rows(services, readout_id=..., max_rows=..., seed=...)`: the rows of a readout when
  it has at most `max_rows`, else a uniform sample of `max_rows` rows read one row group at a
  time (`ingest.dataset.sample_dataset`), with how many rows it stands for.
- `engine_for(services, readout_id)` / `open_readout_engine(services, data, name)`: the engine a
  fit uses and an open SQL engine over the readout's Parquet files.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

from apportion.engines import choose_engine, open_engine
from apportion.engines.dataset import ReadoutDataset
from apportion.ingest.dataset import read_dataset, sample_dataset
from apportion.stats.estimates import CellMoments, cell_moments
from apportion.stats.partition import Partition
from apportion.stats.table import UnitTable
from apportion.usecases.context import Services
from apportion.usecases.experiments import ReadoutData, readout_data


def engine_name(services: Services, n_rows: int, requested: str | None = None) -> str:
    """'memory', 'duckdb' or 'spark' for a readout of `n_rows` under the settings."""
    st = services.settings
    return choose_engine(n_rows, spark_master=st.spark_master,
                         duckdb_min_rows=st.fit_engine_min_rows, requested=requested)  # fmt: skip


@contextmanager
def open_readout_engine(services: Services, data: ReadoutData, name: str) -> Iterator[Any]:
    """A SQL engine ('duckdb' or 'spark') over a stored readout's Parquet files."""
    st = services.settings
    ds = ReadoutDataset.stored(data.files, data.manifest)
    with open_engine(ds, name, memory_limit=st.duckdb_memory_limit,
                     spark_master=st.spark_master or "local[2]",
                     scratch=st.engine_scratch_dir) as eng:  # fmt: skip
        yield eng


def cell_statistics(
    services: Services, *, readout_id: int, partition: Partition, engine: str | None = None
) -> CellMoments:
    """Per (cohort, arm) count, means and covariance of the metric components over every row of
    the readout, the rows routed by `partition` (`Partition.route`). `engine` forces one
    ('memory', 'duckdb', 'spark'); by default the fit's choice for the readout's size."""
    data = readout_data(services.db, readout_id=readout_id)
    name = engine_name(services, data.n_rows, engine)
    if name == "memory":
        table, _ = read_dataset(data.filesystem, list(data.paths), data.manifest)
        return table_cell_statistics(table, partition)
    with open_readout_engine(services, data, name) as eng:
        return eng.partition_moments(partition)


def table_cell_statistics(table: UnitTable, partition: Partition) -> CellMoments:
    """`cell_statistics` of rows already in memory."""
    cohort, _ = partition.route(table.feature_values, table.features)
    return cell_moments(cohort, partition.n_cohorts, table.arm, table.n_arms,
                        table.component_matrix(), table.component_names())  # fmt: skip


@dataclass(frozen=True)
class Rows:
    """Rows of a readout: all of them, or a uniform sample standing for `n_readout` rows."""

    table: UnitTable
    n_readout: int

    @property
    def sampled(self) -> bool:
        return self.table.n < self.n_readout

    def describe(self) -> dict[str, Any]:
        return {"rows_used": int(self.table.n), "readout_rows": int(self.n_readout),
                "sampled": self.sampled}  # fmt: skip


def readout_rows(
    services: Services, *, readout_id: int, max_rows: int | None = None, seed: int = 0
) -> Rows:
    """The readout's rows when it has at most `max_rows` (default: `fit_engine_min_rows`, the
    size the in-memory fit takes), else a uniform sample of `max_rows` of them (seeded), read a
    row group at a time. For steps that need rows (cross-fitted held-out evaluation, a member's
    assignment under the live plan): on a large readout they run on the sample and say so."""
    data = readout_data(services.db, readout_id=readout_id)
    cap = services.settings.fit_engine_min_rows if max_rows is None else int(max_rows)
    if data.n_rows <= cap:
        table, _ = read_dataset(data.filesystem, list(data.paths), data.manifest)
    else:
        table, _ = sample_dataset(data.filesystem, list(data.paths), data.manifest, cap, seed)
    return Rows(table, data.n_rows)
