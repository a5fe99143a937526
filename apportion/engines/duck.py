"""The DuckDB engine: embedded, over the readout's Parquet files, out of core within a memory
limit (the working table lives in a database file in a temporary directory, so DuckDB spills to
disk instead of growing past `memory_limit`)."""

from __future__ import annotations

import os
import re
import shutil
import tempfile

import duckdb
import numpy as np
import pyarrow as pa

from apportion.errors import InvalidInput

from .dataset import ReadoutDataset
from .sql import SqlEngine


class DuckDBEngine(SqlEngine):
    name = "duckdb"

    def __init__(
        self,
        dataset: ReadoutDataset,
        *,
        memory_limit: str = "1GB",
        threads: int | None = None,
        temp_dir: str | None = None,
    ) -> None:
        if not re.fullmatch(r"[0-9]+(\.[0-9]+)?\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)", memory_limit):
            raise InvalidInput(f"DuckDB memory limit must look like '1GB', got {memory_limit!r}")
        self._dir = tempfile.mkdtemp(prefix="apportion-duckdb-", dir=temp_dir)
        self.con = duckdb.connect(os.path.join(self._dir, "work.duckdb"))
        self.con.execute(f"SET memory_limit = '{memory_limit}'")
        self.con.execute(f"SET temp_directory = '{os.path.join(self._dir, 'spill')}'")
        self.con.execute("SET preserve_insertion_order = true")
        if threads:
            self.con.execute(f"SET threads = {int(threads)}")
        files = ", ".join(self.text(f) for f in dataset.files)
        self.con.execute(f"CREATE VIEW src AS SELECT * FROM read_parquet([{files}])")
        super().__init__(dataset)

    def ident(self, name: str) -> str:
        return '"' + name.replace('"', '""') + '"'

    def text(self, value: str) -> str:
        return "'" + value.replace("'", "''") + "'"

    def query(self, sql: str) -> pa.Table:
        return self.con.sql(sql).to_arrow_table()

    def arm_codes(self) -> np.ndarray:
        t = self.query(f"SELECT CAST({self.arm_case()} AS TINYINT) AS a FROM src")
        return np.asarray(t.column("a").to_numpy(), dtype=np.int8)

    def store_work(self, select: str, role: np.ndarray) -> None:
        roles = pa.table({"r": pa.array(role, type=pa.int8())})  # noqa: F841 (scanned by name)
        self.con.execute("DROP TABLE IF EXISTS work")
        self.con.execute(f"CREATE TABLE work AS SELECT roles.r, {select} "
                         "FROM src POSITIONAL JOIN roles")  # fmt: skip

    def close(self) -> None:
        self.con.close()
        shutil.rmtree(self._dir, ignore_errors=True)
