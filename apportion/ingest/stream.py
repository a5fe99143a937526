"""Streaming ingest: read an upload (a file on disk, or any Arrow dataset) in record batches,
validate each batch with the same checks as a whole upload (`parse.py`, `columns.py`), write the
valid rows into a readout dataset (`dataset.py`), and check what spans batches at the end
(duplicate unit ids, discovered levels, no rows). Memory stays at about one batch plus one row
group whatever the row count: unit ids for the duplicate check go to an on-disk DuckDB table that
spills within a memory limit.

Rows in problems are 1-based data rows of the whole upload (the header is not a row), exactly as
the whole-upload parser reports them. Pure: pyarrow, numpy, duckdb; no web, no database.

Longer than most modules (about 550 lines) on purpose: the batch loop and the checks that span
batches share one state (the problems so far, the duplicate-id table, the discovered levels),
and reading them together is how a reader checks that nothing is counted twice.
"""

from __future__ import annotations

import os
import re
import tempfile
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.dataset as pads
import pyarrow.fs as pafs
import pyarrow.json as pajson
import pyarrow.parquet as pq

from apportion.errors import InvalidInput
from apportion.stats.estimates import CellMoments, cell_moments, pool_moments
from apportion.stats.table import FeatureSpec, MetricSpec

from .columns import plain, to_labels
from .dataset import DatasetSpec, DatasetWriter, Manifest
from .formats import (
    _CSV_CONVERSION,
    _read_ndjson,
    _unreadable,
    check_text,
    csv_collecting_bad_rows,
    csv_column_types,
    csv_convert_options,
)
from .parse import _arm_order, _arms, _components, _features, _names
from .problems import Problems
from .screen import check_names, screen_file

BATCH_BYTES = 8 << 20  # CSV / NDJSON bytes per batch
BATCH_ROWS = 1 << 17  # Parquet rows per batch
DUPLICATES_MEMORY = "256MB"  # DuckDB's memory limit for the duplicate-id check (spills beyond)
NDJSON_WHOLE_BYTES = 256 << 20  # NDJSON whose block types disagree is re-read whole up to this
MAX_DISCOVERED_LEVELS = 10_000  # a categorical feature with more levels is not a feature
_JSON_MIXED = re.compile(r"Column\(/([^)]*)\) changed from (\w+) to (\w+) in row (\d+)")
_HEADER_LIMIT = 1 << 20


@dataclass(frozen=True)
class Ingested:
    """A validated, stored upload: its dataset manifest, row count and warnings."""

    manifest: Manifest
    n_rows: int
    warnings: tuple[str, ...]
    moments: CellMoments  # per-arm component moments of all rows (one cohort)


@dataclass(frozen=True)
class Source:
    """Column names and a factory of record-batch iterators. `batches(text, number)` reads the
    named columns as strings / float64 where the format lets us choose (CSV)."""

    names: list[str]
    batches: Callable[[set[str], set[str], list[str]], Iterator[pa.RecordBatch]]
    describe: str


class _Restart(Exception):
    """The source changed how it reads (see the NDJSON source): validate again from the start."""


class _AsText(_Restart):
    """A CSV number column holds text: read it again as text so every bad row can be listed."""

    def __init__(self, column: str | None) -> None:
        super().__init__()
        self.column = column


# ---- sources ------------------------------------------------------------------------------------


def file_source(path: str, fmt: str, problems: Problems) -> Source:
    """A source over an upload spooled to a local file, in format 'csv', 'parquet' or 'ndjson'."""
    if os.path.getsize(path) == 0 or _blank(path):
        problems.add(None, "the upload is empty")
        problems.raise_if_any()
    screen_file(path, fmt, problems)
    problems.raise_if_any()
    source = _file_source(path, fmt, problems)
    check_names(source.names, problems)
    problems.raise_if_any()
    return source


def _file_source(path: str, fmt: str, problems: Problems) -> Source:
    if fmt == "csv":
        return _csv_source(path, problems)
    if fmt == "parquet":
        try:
            pf = pq.ParquetFile(path)
            names = list(pf.schema_arrow.names)
        except (pa.ArrowException, OSError, ValueError) as exc:
            raise _unreadable("Parquet", exc) from exc

        def parquet_batches(_t: set[str], _n: set[str], include: list[str]):  # type: ignore[no-untyped-def]
            try:
                for batch in pq.ParquetFile(path).iter_batches(
                    batch_size=BATCH_ROWS, columns=include, use_threads=True
                ):
                    check_text(pa.Table.from_batches([batch]), problems)
                    problems.raise_if_any()
                    yield batch
            except (pa.ArrowException, OSError, ValueError) as exc:
                raise _unreadable("Parquet", exc) from exc

        return Source(names, parquet_batches, "Parquet")
    if fmt == "ndjson":
        return _ndjson_source(path, problems)
    raise ValueError(fmt)  # pragma: no cover - media_format yields the three above


def _blank(path: str) -> bool:
    with open(path, "rb") as f:
        head = f.read(4096)
    return not head.strip() and os.path.getsize(path) <= 4096


def _csv_source(path: str, problems: Problems) -> Source:
    with open(path, "rb") as f:
        first = f.readline(_HEADER_LIMIT)
    if first.startswith(b"\xef\xbb\xbf"):
        first = first[3:]
    import csv
    import io

    line = first.decode("utf-8", "replace").rstrip("\r\n")
    names = next(csv.reader(io.StringIO(line)), [])
    block = max(BATCH_BYTES, 2 * len(first) + 2)  # Arrow needs the header within the first block

    def csv_batches(text: set[str], number: set[str], include: list[str]):  # type: ignore[no-untyped-def]
        bad: list[pacsv.InvalidRow] = []
        try:
            reader = pacsv.open_csv(
                path,
                read_options=pacsv.ReadOptions(use_threads=True, block_size=block),
                parse_options=csv_collecting_bad_rows(bad),
                convert_options=csv_convert_options(
                    csv_column_types(include, text, number), include
                ),
            )
            for batch in reader:
                if bad:
                    break
                yield batch
        except pa.ArrowInvalid as exc:
            m = _CSV_CONVERSION.match(str(exc))
            if m is not None:
                k = int(m.group(1))
                raise _AsText(include[k] if k < len(include) else None) from exc
            raise _unreadable("CSV", exc) from exc
        except (pa.ArrowNotImplementedError, UnicodeDecodeError) as exc:
            raise _unreadable("CSV", exc) from exc
        if bad:
            _bad_csv_rows(path, include, names, problems, block)

    return Source(names, csv_batches, "CSV")


def _bad_csv_rows(
    path: str, include: list[str], names: list[str], problems: Problems, block: int
) -> None:
    """Rows with the wrong field count: read once more on one thread, where Arrow knows line
    numbers, reading everything as text (only the error path pays for this pass)."""
    bad: list[pacsv.InvalidRow] = []

    def on_invalid(row: pacsv.InvalidRow) -> str:
        bad.append(row)
        return "skip"

    reader = pacsv.open_csv(
        path,
        read_options=pacsv.ReadOptions(use_threads=False, block_size=block),
        parse_options=pacsv.ParseOptions(invalid_row_handler=on_invalid),
        convert_options=pacsv.ConvertOptions(
            column_types={c: pa.string() for c in include}, include_columns=include[:1]
        ),
    )
    for _ in reader:
        pass
    problems.add(
        None,
        f"row has a different number of fields than the header ({len(names)})",
        rows=[r.number - 1 for r in bad if r.number is not None],
        values=[r.text[:200] for r in bad],
        count=len(bad),
    )
    problems.raise_if_any()


def _ndjson_source(path: str, problems: Problems) -> Source:
    """NDJSON in blocks. Arrow infers each column's type from the first block; when a later block
    disagrees (a column null at first, or mixed JSON types), an upload of at most
    NDJSON_WHOLE_BYTES is read again whole by the whole-upload reader, which names the row; a
    larger one is refused naming the column."""
    size = os.path.getsize(path)
    state: dict[str, pa.Table | None] = {"whole": None}

    def open_reader() -> pajson.JSONStreamingReader:
        return pajson.open_json(path, read_options=pajson.ReadOptions(block_size=BATCH_BYTES))

    def read_whole() -> pa.Table:
        with open(path, "rb") as f:
            table, _ = _read_ndjson(f.read(), Problems(problems.max_examples))
        state["whole"] = table
        return table

    def fail(exc: Exception) -> InvalidInput:
        m = _JSON_MIXED.search(str(exc))
        if m:
            col, was, now, _row = m.groups()
            problems.add(col, f"values of mixed JSON types ({was} and {now})", count=1)
            problems.raise_if_any()
        return _unreadable("NDJSON", exc)

    try:
        names = list(open_reader().schema.names)
    except (pa.ArrowException, UnicodeDecodeError) as exc:
        if size > NDJSON_WHOLE_BYTES:
            raise fail(exc) from exc
        names = list(read_whole().column_names)

    def ndjson_batches(_t: set[str], _n: set[str], include: list[str]):  # type: ignore[no-untyped-def]
        whole = state["whole"]
        if whole is not None:
            present = [c for c in include if c in whole.column_names]
            yield from whole.select(present).to_batches(max_chunksize=BATCH_ROWS)
            return
        try:
            for batch in open_reader():
                present = [c for c in include if c in batch.schema.names]
                yield batch.select(present)
        except (pa.ArrowException, UnicodeDecodeError) as exc:
            if size > NDJSON_WHOLE_BYTES:
                raise fail(exc) from exc
            read_whole()
            raise _Restart() from exc

    return Source(names, ndjson_batches, "NDJSON")


def dataset_source(dataset: pads.Dataset) -> Source:
    """A source over a pyarrow dataset (files, a directory, hive-partitioned or not)."""
    names = list(dataset.schema.names)

    def batches(_t: set[str], _n: set[str], include: list[str]):  # type: ignore[no-untyped-def]
        try:
            yield from dataset.to_batches(columns=include, batch_size=BATCH_ROWS)
        except (pa.ArrowException, OSError) as exc:
            raise _unreadable("Parquet", exc) from exc

    return Source(names, batches, "Parquet")


# ---- validation ---------------------------------------------------------------------------------


def ingest(
    source: Source,
    *,
    fs: pafs.FileSystem,
    directory: str,
    arms: Sequence[str],
    control: str,
    design_shares: Sequence[float],
    metrics: tuple[MetricSpec, ...],
    features: tuple[FeatureSpec, ...],
    problems: Problems | None = None,
    unit_column: str = "unit_id",
    arm_column: str = "arm",
    progress: Callable[[int], None] | None = None,
    work_dir: str | None = None,
) -> Ingested:
    """Validate every batch of `source` and write the rows as a dataset into `directory` (a staging
    directory the caller discards on failure). Raises InvalidInput listing every problem."""
    problems = problems or Problems()
    arm_keys, shares = _arm_order(arms, control, design_shares)
    components = list(dict.fromkeys(c for m in metrics for c in m.columns))
    categorical = [f.key for f in features if f.kind == "categorical"]
    numeric = [f.key for f in features if f.kind != "categorical"]
    wanted = list(dict.fromkeys([unit_column, arm_column] + [f.key for f in features] + components))
    names = source.names
    for c in sorted(c for c, k in Counter(names).items() if k > 1):
        problems.add(c, "column appears more than once in the header")
    for c in wanted:
        if c not in names:
            problems.add(c, "missing column")
    problems.raise_if_any()
    extra = [c for c in names if c not in set(wanted)]
    warnings = (f"ignored columns not in the declaration: {_names(extra)}",) if extra else ()
    text = {unit_column, arm_column, *categorical}
    number = set(numeric) | set(components)
    for _attempt in range(len(number) + 3):
        try:
            return _ingest_once(
                source,
                text,
                number,
                wanted,
                fs=fs,
                directory=directory,
                arm_keys=arm_keys,
                shares=shares,
                metrics=metrics,
                features=features,
                components=components,
                problems=problems,
                unit_column=unit_column,
                arm_column=arm_column,
                warnings=warnings,
                progress=progress,
                work_dir=work_dir,
            )
        except _Restart as retry:  # start again (with that column, or all of them, as text)
            problems.items.clear()
            _clear(fs, directory)
            if not isinstance(retry, _AsText):
                continue
            if retry.column in number:
                number = number - {retry.column}
                text = text | {retry.column}
            else:
                text, number = text | number, set()
    raise AssertionError("unreachable: every column is text after the last retry")


def _clear(fs: pafs.FileSystem, directory: str) -> None:
    fs.delete_dir_contents(directory, missing_dir_ok=True)


def _ingest_once(
    source: Source,
    text: set[str],
    number: set[str],
    wanted: list[str],
    *,
    fs: pafs.FileSystem,
    directory: str,
    arm_keys: tuple[str, ...],
    shares: np.ndarray,
    metrics: tuple[MetricSpec, ...],
    features: tuple[FeatureSpec, ...],
    components: list[str],
    problems: Problems,
    unit_column: str,
    arm_column: str,
    warnings: tuple[str, ...],
    progress: Callable[[int], None] | None,
    work_dir: str | None,
) -> Ingested:
    draft = DatasetSpec(
        arm_keys=arm_keys,
        design_shares=tuple(float(s) for s in shares),
        features=features,
        metrics=tuple(metrics),
        columns=tuple(components),
    )
    schema = draft.schema()
    writer = DatasetWriter(fs=fs, directory=directory, schema=schema)
    discovered: dict[str, set[str]] = {f.key: set() for f in features if not f.levels}
    offset = 0
    moments: CellMoments | None = None
    with _DuplicateIds(work_dir) as dups:
        try:
            for batch in source.batches(text, number, wanted):
                n = batch.num_rows
                if n == 0:
                    continue
                bp = Problems(problems.max_examples)
                cols = {c: plain(batch.column(c)) for c in batch.schema.names if c in wanted}
                ids = _unit_ids(cols[unit_column], unit_column, bp, dups, offset)
                arm = _arms(cols[arm_column], arm_column, arm_keys, n, bp)
                specs, fvalues = _features(features, cols, bp)
                for f in specs:
                    if f.key in discovered:
                        discovered[f.key].update(f.levels)
                values = _components(metrics, components, cols, bp)
                problems.merge(bp, offset=offset)
                if not problems:
                    writer.write(_out_batch(schema, ids, arm, specs, fvalues, components, values))
                    y = np.column_stack([values[c] for c in components])
                    part = cell_moments(
                        np.zeros(n, dtype=np.int64), 1, arm, len(arm_keys), y, tuple(components)
                    )
                    moments = part if moments is None else pool_moments(moments, part)
                offset += n
                if progress is not None:
                    progress(offset)
            if offset == 0:
                problems.add(None, "no data rows")
            for key, levels in discovered.items():
                if len(levels) > MAX_DISCOVERED_LEVELS:
                    problems.add(
                        key,
                        f"{len(levels)} distinct levels; a categorical feature may have at most "
                        f"{MAX_DISCOVERED_LEVELS}",
                    )
            dups.report(unit_column, problems)
            order = {c: i for i, c in enumerate(wanted)}
            problems.items.sort(
                key=lambda p: -1 if p["column"] is None else order.get(p["column"], 0)
            )
            problems.raise_if_any()
        except BaseException:
            writer.abort()
            raise
    final = DatasetSpec(
        arm_keys=arm_keys,
        design_shares=draft.design_shares,
        features=tuple(
            replace(f, levels=tuple(sorted(discovered[f.key])))
            if f.key in discovered and f.kind == "categorical"
            else f
            for f in features
        ),
        metrics=draft.metrics,
        columns=draft.columns,
    )
    manifest = writer.close(final)
    assert moments is not None  # at least one row, no problems
    return Ingested(manifest=manifest, n_rows=manifest.n_rows, warnings=warnings, moments=moments)


def _unit_ids(
    arr: pa.Array, column: str, problems: Problems, dups: _DuplicateIds, offset: int
) -> pa.Array:
    labels = to_labels(arr, column, problems, what="unit ids", allow_bool=False)
    if labels is None:
        return pa.nulls(len(arr), pa.string())
    dictionary, idx = labels
    missing = idx < 0
    if missing.any():
        problems.add(column, "missing unit id", mask=missing, source=arr)
    text = (
        dictionary.take(pa.array(np.where(missing, 0, idx), mask=missing))
        if len(dictionary)
        else pa.nulls(len(arr), pa.string())
    )
    dups.add(text, offset)
    return text


def _out_batch(
    schema: pa.Schema,
    ids: pa.Array,
    arm: np.ndarray,
    specs: tuple[FeatureSpec, ...],
    fvalues: dict[str, np.ndarray],
    components: list[str],
    values: dict[str, np.ndarray],
) -> pa.RecordBatch:
    """The dataset's columns for one validated batch; categorical codes back to their labels."""
    arrays: list[Any] = [ids, pa.array(arm.astype(np.int32))]
    for f in specs:
        x = fvalues[f.key]
        if f.kind == "categorical":
            missing = x < 0
            labels = pa.array(list(f.levels), type=pa.string())
            arrays.append(
                labels.take(pa.array(np.where(missing, 0, x), mask=missing))
                if len(labels)
                else pa.nulls(len(x), pa.string())
            )
        else:
            arrays.append(pa.array(x))
    arrays += [pa.array(values[c]) for c in components]
    return pa.RecordBatch.from_arrays(arrays, schema=schema)


class _DuplicateIds:
    """Unit ids of every batch with their row numbers in an on-disk DuckDB table; at the end one
    grouped query finds the rows that repeat an earlier row's id (DuckDB spills to disk beyond
    its memory limit, so this holds for any row count)."""

    def __init__(self, work_dir: str | None) -> None:
        self._tmp = tempfile.TemporaryDirectory(prefix="apportion-ids-", dir=work_dir)
        self._con: Any = None

    def __enter__(self) -> _DuplicateIds:
        import duckdb

        self._con = duckdb.connect(
            os.path.join(self._tmp.name, "ids.duckdb"),
            config={
                "memory_limit": DUPLICATES_MEMORY,
                "threads": 2,
                "temp_directory": os.path.join(self._tmp.name, "spill"),
                "preserve_insertion_order": False,
            },
        )
        self._con.execute("CREATE TABLE ids (unit_id VARCHAR, row BIGINT)")
        return self

    def add(self, ids: pa.Array, offset: int) -> None:
        rows = pa.array(np.arange(offset + 1, offset + 1 + len(ids), dtype=np.int64))
        self._con.register("chunk", pa.table({"unit_id": ids, "row": rows}))
        self._con.execute(
            "INSERT INTO ids SELECT unit_id, row FROM chunk WHERE unit_id IS NOT NULL"
        )
        self._con.unregister("chunk")

    def report(self, column: str, problems: Problems) -> None:
        query = """
            WITH first AS (
                SELECT unit_id, min(row) AS first FROM ids GROUP BY unit_id HAVING count(*) > 1
            )
            SELECT ids.row, ids.unit_id FROM ids JOIN first USING (unit_id)
            WHERE ids.row > first.first ORDER BY ids.row
        """
        count = self._con.execute(f"SELECT count(*) FROM ({query})").fetchone()[0]
        if not count:
            return
        shown = self._con.execute(f"{query} LIMIT {problems.max_examples}").fetchall()
        problems.add(
            column,
            "duplicate unit id",
            rows=[int(r) for r, _ in shown],
            values=[v for _, v in shown],
            count=int(count),
        )

    def __exit__(self, *exc: object) -> None:
        if self._con is not None:
            self._con.close()
        self._tmp.cleanup()
