"""A readout version stored as a Parquet dataset: typed columns, row groups of bounded size, a
manifest that describes the data and names every part file with its hash.

Columns (positional names, so that no feature key, metric column or flag can collide):

    unit_id  string     the unit (member) id as text
    arm      int32      arm code; `spec.arm_keys[code]`, the control arm is 0
    f{i}     string     categorical feature i as its label (null when missing)
             float64    numeric feature i (NaN when missing)
    c{i}     float64    metric component column i (`spec.columns[i]`)
    g{i}     bool       flag i (`spec.flags[i]`), e.g. the watch's holdout flag

Categorical features are stored as labels (Parquet dictionary-encodes them), not as codes: a
streamed upload only knows its discovered levels at the end, and labels stay readable by any
engine. The manifest carries the levels; `read_dataset` turns labels back into codes.

The manifest is canonical JSON; the dataset's content address is the sha256 of those bytes, and
since the manifest holds each part's sha256, the address covers every byte of the data. Pure:
pyarrow and numpy, no database.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from apportion.errors import InvalidInput
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

FORMAT = "apportion.readout-dataset"
VERSION = 1
MANIFEST = "manifest.json"
ROW_GROUP_ROWS = 1 << 18  # 262,144 rows per row group: about 10 MB per column group in memory
FILE_ROW_GROUPS = 8  # a new part file every 8 row groups (about 2 million rows)
_META_KEY = b"apportion"
_HASH_CHUNK = 1 << 20


@dataclass(frozen=True)
class DatasetSpec:
    """What the columns mean: arms (control first), features, metrics, component columns, flags."""

    arm_keys: tuple[str, ...]
    design_shares: tuple[float, ...]
    features: tuple[FeatureSpec, ...]
    metrics: tuple[MetricSpec, ...]
    columns: tuple[str, ...]
    flags: tuple[str, ...] = ()

    def feature_column(self, key: str) -> str:
        """The Parquet column of feature `key` (f0, f1, ...)."""
        return f"f{[f.key for f in self.features].index(key)}"

    def component_column(self, name: str) -> str:
        """The Parquet column of metric component `name` (c0, c1, ...)."""
        return f"c{list(self.columns).index(name)}"

    def flag_column(self, name: str) -> str:
        return f"g{list(self.flags).index(name)}"

    def schema(self) -> pa.Schema:
        fields = [pa.field("unit_id", pa.string()), pa.field("arm", pa.int32())]
        fields += [
            pa.field(f"f{i}", pa.string() if f.kind == "categorical" else pa.float64())
            for i, f in enumerate(self.features)
        ]
        fields += [pa.field(f"c{i}", pa.float64()) for i in range(len(self.columns))]
        fields += [pa.field(f"g{i}", pa.bool_()) for i in range(len(self.flags))]
        return pa.schema(fields)

    def to_dict(self) -> dict[str, Any]:
        return {
            "arm_keys": list(self.arm_keys),
            "design_shares": [float(s) for s in self.design_shares],
            "features": [
                {"key": f.key, "kind": f.kind, "levels": list(f.levels)}
                | ({} if f.personalize else {"personalize": False})
                for f in self.features
            ],
            "metrics": [
                {
                    "key": m.key,
                    "kind": m.kind,
                    "direction": m.direction,
                    "numerator": m.numerator,
                    "denominator": m.denominator,
                }
                for m in self.metrics
            ],
            "columns": list(self.columns),
            "flags": list(self.flags),
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> DatasetSpec:
        return cls(
            arm_keys=tuple(d["arm_keys"]),
            design_shares=tuple(float(s) for s in d["design_shares"]),
            features=tuple(
                FeatureSpec(
                    key=f["key"],
                    kind=f["kind"],
                    levels=tuple(f["levels"]),
                    personalize=bool(f.get("personalize", True)),
                )
                for f in d["features"]
            ),
            metrics=tuple(MetricSpec(**m) for m in d["metrics"]),
            columns=tuple(d["columns"]),
            flags=tuple(d.get("flags") or ()),
        )


@dataclass(frozen=True)
class Manifest:
    spec: DatasetSpec
    n_rows: int
    files: tuple[dict[str, Any], ...]  # {"name", "rows", "bytes", "sha256"}

    def to_bytes(self) -> bytes:
        body = {
            "format": FORMAT,
            "version": VERSION,
            "spec": self.spec.to_dict(),
            "n_rows": self.n_rows,
            "files": list(self.files),
        }
        return json.dumps(body, sort_keys=True, separators=(",", ":")).encode()

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.to_bytes()).hexdigest()

    @classmethod
    def from_bytes(cls, data: bytes) -> Manifest:
        try:
            d = json.loads(data)
        except ValueError as exc:
            raise InvalidInput(f"not a readout dataset manifest: {exc}") from exc
        if d.get("format") != FORMAT or d.get("version") != VERSION:
            raise InvalidInput(
                f"not a readout dataset: format {d.get('format')!r} version {d.get('version')!r}"
            )
        return cls(
            spec=DatasetSpec.from_dict(d["spec"]),
            n_rows=int(d["n_rows"]),
            files=tuple(d["files"]),
        )


def spec_of_table(table: UnitTable, flags: tuple[str, ...] = ()) -> DatasetSpec:
    return DatasetSpec(
        arm_keys=tuple(table.arm_keys),
        design_shares=tuple(float(s) for s in np.asarray(table.design_shares)),
        features=tuple(table.features),
        metrics=tuple(table.metrics),
        columns=tuple(table.columns),
        flags=tuple(flags),
    )


@dataclass
class DatasetWriter:
    """Writes record batches into part files under `directory` (a staging directory), buffering
    to whole row groups so that memory stays at about one row group whatever the row count.

    Call `write` with batches in the dataset's schema, then `close(spec)` with the final spec (the
    discovered levels are known only at the end); it writes the manifest and returns it."""

    fs: pafs.FileSystem
    directory: str
    schema: pa.Schema
    row_group_rows: int = ROW_GROUP_ROWS
    file_row_groups: int = FILE_ROW_GROUPS
    _buffer: list[pa.RecordBatch] = field(default_factory=list)
    _buffered: int = 0
    _writer: pq.ParquetWriter | None = None
    _groups_in_file: int = 0
    _files: list[dict[str, Any]] = field(default_factory=list)
    n_rows: int = 0

    def write(self, batch: pa.RecordBatch | pa.Table) -> None:
        if batch.num_rows == 0:
            return
        if isinstance(batch, pa.Table):
            batch = batch.combine_chunks().to_batches()[0]
        batch = batch.select(self.schema.names).cast(self.schema)
        self._buffer.append(batch)
        self._buffered += batch.num_rows
        while self._buffered >= self.row_group_rows:
            table = pa.Table.from_batches(self._buffer, schema=self.schema)
            self._write_group(table.slice(0, self.row_group_rows))
            rest = table.slice(self.row_group_rows)
            self._buffer = rest.to_batches() if rest.num_rows else []
            self._buffered = rest.num_rows

    def _write_group(self, table: pa.Table) -> None:
        if self._writer is None:
            name = f"part-{len(self._files):05d}.parquet"
            self._files.append({"name": name, "rows": 0})
            self._writer = pq.ParquetWriter(
                f"{self.directory}/{name}",
                self.schema,
                filesystem=self.fs,
                compression="zstd",
                use_dictionary=True,
                write_statistics=True,
            )
        self._writer.write_table(table, row_group_size=self.row_group_rows)
        self._files[-1]["rows"] += table.num_rows
        self.n_rows += table.num_rows
        self._groups_in_file += 1
        if self._groups_in_file >= self.file_row_groups:
            self._close_file()

    def _close_file(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._writer = None
            self._groups_in_file = 0

    def close(self, spec: DatasetSpec) -> Manifest:
        if self._buffered:
            self._write_group(pa.Table.from_batches(self._buffer, schema=self.schema))
            self._buffer, self._buffered = [], 0
        self._close_file()
        files = []
        for f in self._files:
            sha, size = _hash_file(self.fs, f"{self.directory}/{f['name']}")
            files.append({**f, "bytes": size, "sha256": sha})
        manifest = Manifest(spec=spec, n_rows=self.n_rows, files=tuple(files))
        with self.fs.open_output_stream(f"{self.directory}/{MANIFEST}") as out:
            out.write(manifest.to_bytes())
        return manifest

    def abort(self) -> None:
        if self._writer is not None:
            self._writer.close()
            self._writer = None


def _hash_file(fs: pafs.FileSystem, path: str) -> tuple[str, int]:
    h = hashlib.sha256()
    size = 0
    with fs.open_input_stream(path) as f:
        while chunk := f.read(_HASH_CHUNK):
            h.update(chunk)
            size += len(chunk)
    return h.hexdigest(), size


def table_batch(table: UnitTable, flags: dict[str, np.ndarray] | None = None) -> pa.Table:
    """A UnitTable (and its flags) in the dataset's columns: codes back to labels."""
    flags = dict(flags or {})
    spec = spec_of_table(table, tuple(flags))
    arrays: list[pa.Array] = [
        pa.array(np.asarray(table.unit_ids, dtype=object), type=pa.string()),
        pa.array(np.asarray(table.arm, dtype=np.int32)),
    ]
    for f in table.features:
        values = table.feature_values[f.key]
        if f.kind == "categorical":
            codes = np.asarray(values, dtype=np.int64)
            labels = pa.array(list(f.levels), type=pa.string())
            taken = labels.take(pa.array(np.where(codes < 0, 0, codes), mask=codes < 0))
            arrays.append(taken if len(labels) else pa.nulls(len(codes), pa.string()))
        else:
            arrays.append(pa.array(np.asarray(values, dtype=np.float64)))
    arrays += [pa.array(np.asarray(table.columns[c], dtype=np.float64)) for c in table.columns]
    arrays += [pa.array(np.asarray(v, dtype=bool)) for v in flags.values()]
    return pa.Table.from_arrays(arrays, schema=spec.schema())


def write_table(
    fs: pafs.FileSystem, directory: str, table: UnitTable, flags: dict | None = None
) -> Manifest:
    """Write a whole in-memory UnitTable as a dataset into `directory` (a staging directory)."""
    flags = dict(flags or {})
    spec = spec_of_table(table, tuple(flags))
    writer = DatasetWriter(fs=fs, directory=directory, schema=spec.schema())
    try:
        writer.write(table_batch(table, flags))
        return writer.close(spec)
    except BaseException:
        writer.abort()
        raise


def read_dataset(
    fs: pafs.FileSystem, paths: list[str], manifest: Manifest
) -> tuple[UnitTable, dict[str, np.ndarray]]:
    """(table, flags) from the part files of a dataset (in order) and its manifest."""
    spec = manifest.spec
    parts = [pq.read_table(p, filesystem=fs, schema=spec.schema()) for p in paths]
    t = pa.concat_tables(parts) if parts else spec.schema().empty_table()
    if t.num_rows != manifest.n_rows:
        raise InvalidInput(
            f"the dataset has {t.num_rows} rows, its manifest says {manifest.n_rows}"
        )
    return unit_table(t, spec)


def unit_table(t: pa.Table, spec: DatasetSpec) -> tuple[UnitTable, dict[str, np.ndarray]]:
    """(table, flags) from rows in the dataset's columns: labels back to codes."""
    values: dict[str, np.ndarray] = {}
    for i, f in enumerate(spec.features):
        col = t.column(f"f{i}")
        if f.kind == "categorical":
            pos = pc.index_in(col, value_set=pa.array(list(f.levels), type=pa.string()))
            values[f.key] = np.array(
                pc.fill_null(pos, -1).to_numpy(zero_copy_only=False), dtype=np.int32
            )
        else:
            values[f.key] = np.array(col.to_numpy(), dtype=np.float64)
    columns = {
        c: np.array(t.column(f"c{i}").to_numpy(), dtype=np.float64)
        for i, c in enumerate(spec.columns)
    }
    flags = {
        g: np.array(t.column(f"g{i}").to_numpy(zero_copy_only=False), dtype=bool)
        for i, g in enumerate(spec.flags)
    }
    table = UnitTable(
        unit_ids=np.asarray(t.column("unit_id").to_numpy(zero_copy_only=False), dtype=object),
        arm=np.array(t.column("arm").to_numpy(), dtype=np.int64),
        arm_keys=spec.arm_keys,
        design_shares=np.asarray(spec.design_shares, dtype=np.float64),
        features=spec.features,
        feature_values=values,
        metrics=spec.metrics,
        columns=columns,
    )
    return table, flags


def sample_dataset(
    fs: pafs.FileSystem, paths: list[str], manifest: Manifest, size: int, seed: int
) -> tuple[UnitTable, dict[str, np.ndarray]]:
    """A uniform sample of `size` rows without replacement (all rows when there are fewer), in
    the dataset's row order, read one row group at a time: memory holds the sample and one row
    group (the file handles stay open until return), whatever the dataset's size. The same seed gives the same rows."""
    spec = manifest.spec
    n = manifest.n_rows
    if size >= n:
        return read_dataset(fs, paths, manifest)
    files = [pq.ParquetFile(fs.open_input_file(p)) for p in paths]
    groups = [(k, g) for k, pf in enumerate(files) for g in range(pf.metadata.num_row_groups)]
    sizes = np.array([files[k].metadata.row_group(g).num_rows for k, g in groups], dtype=np.int64)
    if int(sizes.sum()) != n:
        raise InvalidInput(f"the dataset has {int(sizes.sum())} rows, its manifest says {n}")
    rng = np.random.default_rng([seed, 0x5A])
    # how many sampled rows fall in each row group (a multivariate hypergeometric draw), then
    # which rows within it: together a uniform sample of `size` rows, in O(groups + size) memory
    take = rng.multivariate_hypergeometric(sizes, size, method="marginals")
    parts: list[pa.Table] = []
    for (k, g), rows, m in zip(groups, sizes, take, strict=True):
        if m:
            idx = np.sort(rng.choice(int(rows), size=int(m), replace=False))
            group = files[k].read_row_group(g).select(spec.schema().names)
            parts.append(group.take(pa.array(idx)).cast(spec.schema()))
    return unit_table(pa.concat_tables(parts), spec)
