"""A small readout written as Parquet (two files, so row order across files matters), the
in-memory table parsed from the same bytes by the upload parser, and the engines over it."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from apportion.demo.scenario import simulate
from apportion.engines.dataset import ReadoutDataset
from apportion.ingest.parse import parse_units
from apportion.stats.table import FeatureSpec, UnitTable


def parquet_columns(table: UnitTable) -> pa.Table:
    cols: dict[str, pa.Array] = {
        "unit_id": pa.array(table.unit_ids.astype(str)),
        "arm": pa.array(np.asarray(table.arm_keys, dtype=object)[table.arm]),
    }
    for f in table.features:
        v = table.feature_values[f.key]
        if f.kind == "numeric":
            cols[f.key] = pa.array(v, mask=np.isnan(v))
        else:
            lv = np.asarray(f.levels, dtype=object)[np.maximum(v, 0)]
            cols[f.key] = pa.array(lv, mask=v < 0)
    for c in table.component_names():
        cols[c] = pa.array(table.columns[c])
    return pa.table(cols)


def undeclared(features: tuple[FeatureSpec, ...]) -> tuple[FeatureSpec, ...]:
    """Categorical levels left for the data to say (the engines discover them)."""
    return tuple(FeatureSpec(f.key, f.kind) for f in features)


@pytest.fixture(scope="session")
def readout(tmp_path_factory):
    """(dataset, in-memory table): 12,000 units of the demo scenario with some missing values."""
    sim = simulate(12_000, seed=11)
    rng = np.random.default_rng(3)
    t = parquet_columns(sim)
    for name in ("tenure_days", "device"):  # missing values take the missing bin in every engine
        i = t.schema.get_field_index(name)
        col = t.column(i).to_pylist()
        for r in rng.choice(len(col), 300, replace=False):
            col[r] = None
        t = t.set_column(i, name, pa.array(col, type=t.schema.field(i).type))
    d = tmp_path_factory.mktemp("readout")
    pq.write_table(t.slice(0, 5_000), d / "part-0.parquet", row_group_size=1_000)
    pq.write_table(t.slice(5_000), d / "part-1.parquet", row_group_size=1_000)
    feats = undeclared(sim.features)
    ds = ReadoutDataset.open(str(d), arm_keys=sim.arm_keys, design_shares=sim.design_shares,
                             features=feats, metrics=sim.metrics)  # fmt: skip
    body = b"".join([])
    sink = pa.BufferOutputStream()
    pq.write_table(t, sink)
    body = sink.getvalue().to_pybytes()
    parsed = parse_units(body, "application/vnd.apache.parquet", arms=sim.arm_keys,
                         control=sim.arm_keys[0], design_shares=list(sim.design_shares),
                         metrics=sim.metrics, features=feats)  # fmt: skip
    return ds, parsed.table
