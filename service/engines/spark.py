"""The Spark engine: the same aggregation plan as DuckDB's, run by Spark SQL over the readout's
Parquet files, for readouts too large for one machine. `APPORTION_SPARK_MASTER` names the cluster
(`local[2]` runs it in this process's JVM, as the tests do).

The working table is written once as Parquet under a scratch directory that every executor can
read (a local directory for `local[...]`, shared storage on a cluster) and scanned per level.
A row's role (estimation half, structure fold) is joined on its position in the readout: the
file's offset plus Parquet's row index within the file.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import uuid

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .dataset import ReadoutDataset
from .sql import SqlEngine

_SESSIONS: dict[str, object] = {}


def spark_session(master: str, conf: dict[str, str] | None = None):
    """One SparkSession per process and master (starting a JVM is slow; reuse it)."""
    if master not in _SESSIONS:
        from pyspark.sql import SparkSession

        b = SparkSession.builder.master(master).appName("apportion-fit")
        defaults = {
            "spark.ui.enabled": "false",
            "spark.sql.shuffle.partitions": "8",
            "spark.sql.ansi.enabled": "false",
            "spark.driver.memory": "2g",
            "spark.sql.session.timeZone": "UTC",
        }
        for k, v in {**defaults, **(conf or {})}.items():
            b = b.config(k, v)
        spark = b.getOrCreate()
        spark.sparkContext.setLogLevel("ERROR")
        _SESSIONS[master] = spark
    return _SESSIONS[master]


class SparkEngine(SqlEngine):
    name = "spark"
    union_width = 64

    def __init__(
        self, dataset: ReadoutDataset, *, master: str = "local[2]", scratch: str | None = None,
        conf: dict[str, str] | None = None,
    ) -> None:  # fmt: skip
        from pyspark.sql import functions as F

        self.spark = spark_session(master, conf)
        self._dir = tempfile.mkdtemp(prefix="apportion-spark-", dir=scratch)
        self._views: list[str] = []
        offset, parts = 0, []
        for path, rows in zip(dataset.files, dataset.file_rows, strict=True):
            df = self.spark.read.parquet(path).withColumn(
                "_pos", F.col("_metadata.row_index") + F.lit(offset)
            )
            parts.append(df)
            offset += rows
        src = parts[0]
        for df in parts[1:]:
            src = src.unionByName(df)
        self._view("src", src)
        super().__init__(dataset)

    def _view(self, name: str, df) -> None:
        df.createOrReplaceTempView(name)
        self._views.append(name)

    def ident(self, name: str) -> str:
        return "`" + name.replace("`", "``") + "`"

    def text(self, value: str) -> str:
        return "'" + value.replace("\\", "\\\\").replace("'", "\\'") + "'"

    def query(self, sql: str) -> pa.Table:
        return self.spark.sql(sql).toArrow()

    def arm_codes(self) -> np.ndarray:
        t = self.query(f"SELECT _pos, CAST({self.arm_case()} AS TINYINT) AS a FROM src")
        out = np.empty(self.n, dtype=np.int8)
        out[t.column("_pos").to_numpy()] = t.column("a").to_numpy()
        return out

    def store_work(self, select: str, role: np.ndarray) -> None:
        roles_path = os.path.join(self._dir, f"roles-{uuid.uuid4().hex}.parquet")
        pq.write_table(
            pa.table({"_pos": pa.array(np.arange(role.size, dtype=np.int64)),
                      "r": pa.array(role, type=pa.int8())}),
            roles_path, use_dictionary=False, compression="zstd",
            column_encoding={"_pos": "DELTA_BINARY_PACKED", "r": "PLAIN"},
        )  # fmt: skip
        self._view("roles", self.spark.read.parquet(roles_path))
        work_path = os.path.join(self._dir, f"work-{uuid.uuid4().hex}")
        self.spark.sql(
            f"SELECT roles.r AS r, {select} FROM src JOIN roles ON src._pos = roles._pos"
        ).write.parquet(work_path)
        self._view("work", self.spark.read.parquet(work_path))

    def close(self) -> None:
        for v in self._views:
            self.spark.catalog.dropTempView(v)
        shutil.rmtree(self._dir, ignore_errors=True)
