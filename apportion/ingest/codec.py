"""Store a UnitTable (and its flag columns) as one blob: an Arrow IPC stream, zstd-compressed.

The specs (arm keys, design shares, features with their levels, metrics, column names) travel in
the schema metadata as canonical JSON, and the Arrow fields get positional names (f0, c0, g0...) so
that feature keys, component columns and flags can never collide. The same table always encodes
to the same bytes, which lets the store address blobs by their hash.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pyarrow as pa

from apportion.errors import InvalidInput
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

from .dataset import spec_of_table

FORMAT = "apportion.unit-table"
VERSION = 1
_META_KEY = b"apportion"
_OPTIONS = pa.ipc.IpcWriteOptions(compression=pa.Codec("zstd", compression_level=3))


def _spec(table: UnitTable, flags: dict[str, np.ndarray]) -> dict[str, Any]:
    """The blob's metadata: its format and version, and the table's spec in the same form as a
    Parquet readout's manifest (dataset.DatasetSpec)."""
    return {"format": FORMAT, "version": VERSION, **spec_of_table(table, tuple(flags)).to_dict()}


def encode_table(table: UnitTable, flags: dict | None = None) -> bytes:
    """The blob for `table` plus optional flag columns ({name: (n,) bool}); deterministic bytes."""
    flags = dict(flags or {})
    n = table.n
    arrays: list[pa.Array] = [
        pa.array(np.asarray(table.unit_ids, dtype=object), type=pa.string()),
        pa.array(np.asarray(table.arm, dtype=np.int64)),
    ]
    fields = ["unit_id", "arm"]
    for i, f in enumerate(table.features):
        dtype = np.int32 if f.kind == "categorical" else np.float64
        arrays.append(pa.array(np.asarray(table.feature_values[f.key], dtype=dtype)))
        fields.append(f"f{i}")
    for i, c in enumerate(table.columns):
        arrays.append(pa.array(np.asarray(table.columns[c], dtype=np.float64)))
        fields.append(f"c{i}")
    for i, v in enumerate(flags.values()):
        arrays.append(pa.array(np.asarray(v, dtype=bool)))
        fields.append(f"g{i}")
    for name, a in zip(fields, arrays, strict=True):
        if len(a) != n:
            raise InvalidInput(f"column '{name}' has {len(a)} rows, the table has {n}")
    meta = json.dumps(_spec(table, flags), sort_keys=True, separators=(",", ":"))
    batch = pa.record_batch(arrays, names=fields, metadata={_META_KEY: meta.encode()})
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, batch.schema, options=_OPTIONS) as writer:
        writer.write_batch(batch)
    return sink.getvalue().to_pybytes()


def _owned(col: pa.ChunkedArray, dtype: type) -> np.ndarray:
    return np.array(col.to_numpy(), dtype=dtype)  # a writable copy, not a view of the blob


def decode_table(data: bytes) -> tuple[UnitTable, dict[str, np.ndarray]]:
    """(table, flags) from a blob written by `encode_table`."""
    try:
        t = pa.ipc.open_stream(pa.BufferReader(data)).read_all()
        meta = json.loads((t.schema.metadata or {})[_META_KEY])
    except (pa.ArrowException, KeyError, ValueError) as exc:
        raise InvalidInput(f"not a stored unit table: {exc}") from exc
    if meta.get("format") != FORMAT or meta.get("version") != VERSION:
        raise InvalidInput(
            f"not a stored unit table: format {meta.get('format')!r} version {meta.get('version')!r}"
        )
    features = tuple(
        FeatureSpec(key=f["key"], kind=f["kind"], levels=tuple(f["levels"]))
        for f in meta["features"]
    )
    metrics = tuple(MetricSpec(**m) for m in meta["metrics"])
    feature_values = {
        f.key: _owned(t.column(f"f{i}"), np.int32 if f.kind == "categorical" else np.float64)
        for i, f in enumerate(features)
    }
    columns = {c: _owned(t.column(f"c{i}"), np.float64) for i, c in enumerate(meta["columns"])}
    flags = {g: _owned(t.column(f"g{i}"), bool) for i, g in enumerate(meta["flags"])}
    table = UnitTable(
        unit_ids=np.asarray(t.column("unit_id").to_numpy(), dtype=object),
        arm=_owned(t.column("arm"), np.int64),
        arm_keys=tuple(meta["arm_keys"]),
        design_shares=np.asarray(meta["design_shares"], dtype=np.float64),
        features=features,
        feature_values=feature_values,
        metrics=metrics,
        columns=columns,
    )
    return table, flags
