"""The Spark engine: the same aggregation plan as DuckDB's, run by Spark SQL over the readout's
Parquet files, for readouts too large for one machine. `APPORTION_SPARK_MASTER` names the cluster
(`local[2]` runs it in this process's JVM, as the tests do).

The working table is written once as Parquet under a scratch directory that every executor can
read (a local directory for `local[...]`, shared storage on a cluster) and scanned per level.
A row's role (estimation half, structure fold) is looked up by its position in the readout (the
file's offset plus Parquet's row index within the file) in a broadcast array, by Python workers
over Arrow batches: executors need numpy and pyarrow (deploy/ says so).
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
import uuid
from typing import Any

import numpy as np
import pyarrow as pa

from .dataset import ReadoutDataset
from .sql import SqlEngine

_SESSIONS: dict[str, object] = {}


def spark_session(master: str, conf: dict[str, str] | None = None) -> Any:
    """One SparkSession per process and master (starting a JVM is slow; reuse it)."""
    if master not in _SESSIONS:
        from pyspark.sql import SparkSession

        # the Python workers (which add each row's role) run this interpreter and its packages
        # unless PYSPARK_PYTHON names another (a cluster's executors: deploy/)
        os.environ.setdefault("PYSPARK_PYTHON", sys.executable)

        b = SparkSession.builder.master(master).appName("apportion-fit")
        defaults = {
            "spark.ui.enabled": "false",
            "spark.sql.shuffle.partitions": "8",
            "spark.sql.ansi.enabled": "false",
            "spark.driver.memory": "2g",
            "spark.sql.session.timeZone": "UTC",
            "spark.ui.showConsoleProgress": "false",  # no progress bars in the service's logs
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
        self._broadcasts: list = []
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

    def _view(self, name: str, df: Any) -> None:
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
        """The working table, written once as Parquet. Each row's role is looked up by its
        position in a broadcast copy of `role` (one byte a row) by a Python worker over Arrow
        batches: no join, so no shuffle of the readout (a join on the position cost a full sort
        of both sides)."""
        from pyspark.sql.types import ByteType, StructField, StructType

        roles = self.spark.sparkContext.broadcast(np.asarray(role, dtype=np.int8))
        self._broadcasts.append(roles)
        rows = self.spark.sql(f"SELECT _pos, {select} FROM src")
        schema = StructType([*rows.schema.fields, StructField("r", ByteType(), False)])

        def add_role(batches: Any) -> Any:
            table = roles.value
            for b in batches:
                pos = b.column(0).to_numpy(zero_copy_only=False)
                yield pa.RecordBatch.from_arrays(
                    [*b.columns, pa.array(table[pos], type=pa.int8())], schema=b.schema.append(
                        pa.field("r", pa.int8(), nullable=False)))  # fmt: skip

        work_path = os.path.join(self._dir, f"work-{uuid.uuid4().hex}")
        rows.mapInArrow(add_role, schema).drop("_pos").write.parquet(work_path)
        self._view("work", self.spark.read.parquet(work_path))

    def close(self) -> None:
        for v in self._views:
            self.spark.catalog.dropTempView(v)
        for b in self._broadcasts:
            b.unpersist()
        shutil.rmtree(self._dir, ignore_errors=True)
