"""Media types of readout and monitor uploads, and reading an upload body into an Arrow table.

Three formats: CSV (header row, comma separated, an empty field is missing), Parquet, and NDJSON
(one JSON object per line). Reading only turns bytes into typed Arrow columns; judging the values is
`columns.py`'s job. Problems that make the body unreadable are collected into `Problems`.
"""

from __future__ import annotations

import csv
import io
import re
from collections import Counter
from collections.abc import Iterable

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.json as pajson
import pyarrow.parquet as pq

from apportion.errors import InvalidInput, UnsupportedMediaType

from .problems import Problems
from .screen import check_names, screen_text

CONTENT_TYPES: dict[str, str] = {
    "text/csv": "csv",
    "application/csv": "csv",
    "text/comma-separated-values": "csv",
    "application/vnd.apache.parquet": "parquet",
    "application/parquet": "parquet",
    "application/x-parquet": "parquet",
    "application/x-ndjson": "ndjson",
    "application/ndjson": "ndjson",
    "application/jsonl": "ndjson",
    "application/x-jsonlines": "ndjson",
    "application/jsonlines": "ndjson",
}

_BOM = b"\xef\xbb\xbf"
_CSV_BLOCK = 8 << 20  # bytes per parallel CSV block
_CSV_RETRIES = 3  # single-column re-reads before reading every number column as text
_CSV_CONVERSION = re.compile(r"In CSV column #(\d+): .*conversion error")
_JSON_BLOCK = 4 << 20  # bytes per parallel NDJSON block; a single line must fit in one block
_JSON_MIXED = re.compile(r"Column\(/([^)]*)\) changed from (\w+) to (\w+) in row (\d+)")


def media_format(content_type: str | None) -> str:
    """'csv', 'parquet' or 'ndjson' for a Content-Type header; parameters (charset...) are ignored.

    Raises UnsupportedMediaType (an InvalidInput; the API answers 415)."""
    media = (content_type or "").split(";", 1)[0].strip().lower()
    fmt = CONTENT_TYPES.get(media)
    if fmt is None:
        raise UnsupportedMediaType(
            f"unsupported content type '{media}'; send text/csv, "
            "application/vnd.apache.parquet or application/x-ndjson",
            errors=[
                {
                    "column": None,
                    "problem": f"unsupported content type '{media}'",
                    "rows": [],
                    "values": [],
                    "count": 0,
                }
            ],
            unsupported_media_type=media,
        )
    return fmt


def read_upload(
    body: bytes,
    fmt: str,
    *,
    wanted: Iterable[str],
    text_columns: Iterable[str],
    number_columns: Iterable[str],
    problems: Problems,
) -> tuple[pa.Table, list[str]]:
    """(table with the wanted columns that exist, all column names in the upload).

    `text_columns` are read as strings and `number_columns` as float64 where the format lets us
    choose (CSV); other formats keep their own types. Raises InvalidInput (via `problems`) when the
    body cannot be read at all."""
    wanted = list(wanted)
    screen_text(body, fmt, problems)
    problems.raise_if_any()
    if fmt == "csv":
        table, names = _read_csv(body, wanted, set(text_columns), set(number_columns), problems)
    elif fmt == "parquet":
        table, names = _read_parquet(body, wanted)
    elif fmt == "ndjson":
        table, names = _read_ndjson(body, problems)
    else:  # pragma: no cover - media_format only yields the three above
        raise ValueError(fmt)
    check_names(names, problems)
    for c in sorted(c for c, k in Counter(names).items() if k > 1):
        problems.add(c, "column appears more than once in the header")
    problems.raise_if_any()
    check_text(table, problems)
    problems.raise_if_any()
    keep = [c for c in wanted if c in table.column_names]
    return table.select(keep), names


def check_text(table: pa.Table, problems: Problems) -> None:
    """Text columns must hold valid UTF-8 (Parquet readers do not check it; a bad value would
    fail later, far from the upload)."""
    for name in table.column_names:
        col = table.column(name)
        if not (pa.types.is_string(col.type) or pa.types.is_large_string(col.type)):
            continue
        try:
            col.validate(full=True)
        except pa.ArrowInvalid:
            problems.add(name, "text that is not valid UTF-8; send UTF-8 text")


def _unreadable(kind: str, exc: Exception) -> InvalidInput:
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return InvalidInput(
        f"could not read the {kind} upload: {text}",
        errors=[
            {
                "column": None,
                "problem": f"unreadable {kind}: {text}",
                "rows": [],
                "values": [],
                "count": 0,
            }
        ],
    )


def _csv_header(body: bytes) -> list[str]:
    end = body.find(b"\n")
    line = body[: end if end >= 0 else len(body)].decode("utf-8", "replace").rstrip("\r")
    return next(csv.reader(io.StringIO(line)), [])


def csv_column_types(
    include: list[str], text: set[str], number: set[str]
) -> dict[str, pa.DataType]:
    """Declared text columns as strings, metrics and numeric features as float64 (a column that
    is both stays text); the rest Arrow infers."""
    types: dict[str, pa.DataType] = {c: pa.string() for c in include if c in text}
    types.update({c: pa.float64() for c in include if c in number and c not in text})
    return types


def csv_convert_options(types: dict[str, pa.DataType], include: list[str]) -> pacsv.ConvertOptions:
    """An empty field is a missing value, quoted or not (the upload contract, README)."""
    return pacsv.ConvertOptions(
        column_types=types,
        include_columns=include,
        null_values=[""],
        strings_can_be_null=True,
        quoted_strings_can_be_null=True,
    )


def csv_collecting_bad_rows(bad: list[pacsv.InvalidRow]) -> pacsv.ParseOptions:
    """Rows with the wrong number of fields are skipped and collected in `bad` so the reader
    can list them all (with line numbers) instead of stopping at the first."""

    def on_invalid(row: pacsv.InvalidRow) -> str:
        bad.append(row)
        return "skip"

    return pacsv.ParseOptions(invalid_row_handler=on_invalid)


def _read_csv(
    body: bytes, wanted: list[str], text: set[str], number: set[str], problems: Problems
) -> tuple[pa.Table, list[str]]:
    buf = pa.py_buffer(body)
    if body.startswith(_BOM):
        buf = buf.slice(len(_BOM))
        body = body[len(_BOM) :]
    names = _csv_header(body)
    present = set(names)
    include = [c for c in wanted if c in present]
    types = csv_column_types(include, text, number)
    bad_rows: list[pacsv.InvalidRow] = []

    def read(column_types: dict[str, pa.DataType], threads: bool) -> pa.Table:
        return pacsv.read_csv(
            pa.BufferReader(buf),
            read_options=pacsv.ReadOptions(use_threads=threads, block_size=_CSV_BLOCK),
            parse_options=csv_collecting_bad_rows(bad_rows),
            convert_options=csv_convert_options(column_types, include),
        )

    try:
        # a number column holding text fails the whole read; read that column again as text so
        # that every offending row can be listed (columns.py checks text against a number
        # pattern). One column at a time for the usual single culprit, then all at once.
        attempt = 0
        while True:
            try:
                table = read(types, True)
                break
            except pa.ArrowInvalid as exc:
                m = _CSV_CONVERSION.match(str(exc))
                if m is None or all(t == pa.string() for t in types.values()):
                    raise
                attempt += 1
                bad_rows.clear()
                k = int(m.group(1))
                culprit = names[k] if k < len(names) else None
                if attempt <= _CSV_RETRIES and culprit in types and types[culprit] != pa.string():
                    types[culprit] = pa.string()
                else:
                    types = {c: pa.string() for c in types}
        if bad_rows:
            bad_rows.clear()  # read again on one thread: only then does Arrow know line numbers
            read({c: pa.string() for c in types}, False)
            rows = [r.number - 1 for r in bad_rows if r.number is not None]
            problems.add(
                None,
                f"row has a different number of fields than the header ({len(names)})",
                rows=rows,
                values=[r.text[:200] for r in bad_rows],
                count=len(bad_rows),
            )
            problems.raise_if_any()
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, UnicodeDecodeError) as exc:
        raise _unreadable("CSV", exc) from exc
    return table, names


def _read_parquet(body: bytes, wanted: list[str]) -> tuple[pa.Table, list[str]]:
    try:
        pf = pq.ParquetFile(pa.BufferReader(body))
        names = list(pf.schema_arrow.names)
        include = [c for c in dict.fromkeys(wanted) if c in set(names)]
        table = pf.read(columns=include, use_threads=True)
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise _unreadable("Parquet", exc) from exc
    return table, names


def _read_ndjson(body: bytes, problems: Problems) -> tuple[pa.Table, list[str]]:
    def read(block: int) -> pa.Table:
        return pajson.read_json(
            pa.BufferReader(body),
            read_options=pajson.ReadOptions(use_threads=True, block_size=block),
        )

    try:
        table = read(max(_JSON_BLOCK, 1 << 16))
    except pa.ArrowInvalid as exc:
        if _JSON_MIXED.search(str(exc)):
            # a column mixes JSON types; the row Arrow names counts from the start of its block,
            # so read again as one block to name the row in the whole upload
            try:
                read(len(body) + 1)
            except pa.ArrowInvalid as exc2:
                exc = exc2
            m = _JSON_MIXED.search(str(exc))
            if m:
                col, was, now, row = m.groups()
                problems.add(
                    col,
                    f"values of mixed JSON types ({was} and {now})",
                    rows=[int(row) + 1],
                    count=1,
                )
                problems.raise_if_any()
        raise _unreadable("NDJSON", exc) from exc
    except (pa.ArrowException, UnicodeDecodeError) as exc:
        raise _unreadable("NDJSON", exc) from exc
    return table, list(table.column_names)
