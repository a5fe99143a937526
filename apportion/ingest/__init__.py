"""Uploads of unit-level rows: parse and validate CSV, Parquet and NDJSON bodies into a UnitTable
(`parse_units`), and the blob encoding a parsed table is stored in (`encode_table`, `decode_table`).

Pure: imports pyarrow, numpy, apportion.errors and apportion.stats.table only.
"""

from .codec import decode_table, encode_table
from .parse import CONTENT_TYPES, ParsedUnits, parse_units

__all__ = ["CONTENT_TYPES", "ParsedUnits", "decode_table", "encode_table", "parse_units"]
