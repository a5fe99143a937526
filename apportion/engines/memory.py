"""The in-memory engine's input: a (small) readout dataset read whole into a `UnitTable` by the
upload parser, so the numpy fit sees exactly what an upload of the same rows would give."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq

from apportion.ingest.parse import parse_units
from apportion.stats.table import UnitTable

from .dataset import ReadoutDataset


def read_table(dataset: ReadoutDataset) -> UnitTable:
    table = pa.concat_tables([pq.read_table(f) for f in dataset.files])
    sink = pa.BufferOutputStream()
    pq.write_table(table, sink)
    parsed = parse_units(
        sink.getvalue().to_pybytes(),
        "application/vnd.apache.parquet",
        arms=dataset.arm_keys,
        control=dataset.arm_keys[0],
        design_shares=list(dataset.design_shares),
        metrics=dataset.metrics,
        features=dataset.features,
    )
    return parsed.table
