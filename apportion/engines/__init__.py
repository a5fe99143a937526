"""Fit engines: where a cohort model's passes over the rows run.

`memory` keeps the rows in numpy (small readouts); `duckdb` aggregates the readout's Parquet files
embedded and out of core; `spark` runs the same aggregations on a Spark cluster. The statistics
receive an engine as an argument (`apportion.stats.pushdown.RowEngine`) and never import this
package.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from apportion.errors import InvalidInput

from .dataset import ReadoutDataset

ENGINES = ("memory", "duckdb", "spark")


def choose_engine(
    n_rows: int, *, spark_master: str | None, duckdb_min_rows: int, requested: str | None = None
) -> str:
    """The engine for a readout of `n_rows`: the one requested; else numpy in memory up to
    `duckdb_min_rows` rows and above it Spark when a master is configured, DuckDB otherwise."""
    if requested is not None:
        if requested not in ENGINES:
            raise InvalidInput(f"engine must be one of {list(ENGINES)}, got {requested!r}",
                               errors=[{"field": "engine", "problem": "unknown engine"}])  # fmt: skip
        if requested == "spark" and not spark_master:
            raise InvalidInput("engine 'spark' needs APPORTION_SPARK_MASTER to be set",
                               errors=[{"field": "engine", "problem": "no Spark master"}])  # fmt: skip
        return requested
    if n_rows <= duckdb_min_rows:
        return "memory"
    return "spark" if spark_master else "duckdb"


@contextmanager
def open_engine(
    dataset: ReadoutDataset,
    name: str,
    *,
    memory_limit: str = "1GB",
    spark_master: str = "local[2]",
    scratch: str | None = None,
    spark_conf: dict[str, str] | None = None,
) -> Iterator[Any]:
    """A SQL engine over `dataset` (closed, and its scratch files removed, on exit)."""
    if name == "duckdb":
        from .duck import DuckDBEngine

        engine: Any = DuckDBEngine(dataset, memory_limit=memory_limit, temp_dir=scratch)
    elif name == "spark":
        from .spark import SparkEngine

        engine = SparkEngine(dataset, master=spark_master, scratch=scratch, conf=spark_conf)
    else:
        raise InvalidInput(f"engine {name!r} is not a SQL engine")
    try:
        yield engine
    finally:
        engine.close()
