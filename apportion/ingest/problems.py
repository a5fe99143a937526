"""Collects every problem found in an upload, then raises one InvalidInput that lists them all.

Each problem is `{"column", "problem", "rows", "values", "count"}`: `rows` are the first offending
1-based data row numbers (the header is not a row), `values` the raw values in those rows made
JSON-safe (NaN and infinities as the strings "NaN", "inf", "-inf"), `count` how many rows offend.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pyarrow as pa

from apportion.errors import InvalidInput


def json_safe(value: Any) -> Any:
    """A value a strict JSON encoder accepts (problem+json bodies are encoded with allow_nan=False)."""
    if isinstance(value, float) and not math.isfinite(value):
        return "NaN" if math.isnan(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if value is None or isinstance(value, str | int | float | bool):
        return value
    return str(value)


def _quote(values: list[Any]) -> str:
    return ", ".join(repr(v) for v in values)


class Problems:
    """An ordered list of upload problems; `raise_if_any` turns them into one InvalidInput."""

    def __init__(self, max_examples: int = 10):
        self.max_examples = max(1, int(max_examples))
        self.items: list[dict[str, Any]] = []

    def __bool__(self) -> bool:
        return bool(self.items)

    def add(
        self,
        column: str | None,
        problem: str,
        *,
        mask: np.ndarray | None = None,
        source: pa.Array | pa.ChunkedArray | None = None,
        rows: list[int] | None = None,
        values: list[Any] | None = None,
        count: int | None = None,
    ) -> None:
        """Record a problem. With `mask` (bool, one per row) the rows and values are taken from it
        (values from `source`, the column as uploaded); otherwise `rows`/`values` are used as given
        (rows already 1-based)."""
        if mask is not None:
            idx = np.flatnonzero(mask)
            count = int(idx.size)
            first = idx[: self.max_examples]
            rows = (first + 1).tolist()
            if source is not None:
                values = source.take(pa.array(first, type=pa.int64())).to_pylist()
        rows = list(rows or [])[: self.max_examples]
        values = [json_safe(v) for v in (values or [])][: self.max_examples]
        self.items.append(
            {
                "column": column,
                "problem": problem,
                "rows": rows,
                "values": values,
                "count": len(rows) if count is None else int(count),
            }
        )

    def merge(self, other: Problems, *, offset: int = 0) -> None:
        """Fold the problems of one batch into these: rows shift by `offset` (the rows before the
        batch); a problem already listed (same column and text) gains the batch's rows, values
        and count, up to `max_examples` shown."""
        for item in other.items:
            rows = [r + offset for r in item["rows"]]
            same = next(
                (
                    p
                    for p in self.items
                    if p["column"] == item["column"] and p["problem"] == item["problem"]
                ),
                None,
            )
            if same is None:
                self.items.append({**item, "rows": rows[: self.max_examples]})
                continue
            room = self.max_examples - len(same["rows"])
            if room > 0:
                same["rows"] = same["rows"] + rows[:room]
                same["values"] = same["values"] + item["values"][:room]
            same["count"] += item["count"]

    def message(self) -> str:
        parts = []
        for p in self.items[:5]:
            where = f"column '{p['column']}'" if p["column"] is not None else "upload"
            text = f"{where}: {p['problem']}"
            if p["rows"]:
                more = " ..." if p["count"] > len(p["rows"]) else ""
                text += f" in rows {', '.join(map(str, p['rows']))}{more}"
            if p["values"]:
                text += f" (values {_quote(p['values'])})"
            parts.append(text)
        if len(self.items) > 5:
            parts.append(f"and {len(self.items) - 5} more")
        n = len(self.items)
        return f"upload rejected, {n} problem{'s' if n != 1 else ''}: " + "; ".join(parts)

    def raise_if_any(self) -> None:
        if self.items:
            raise InvalidInput(self.message(), errors=list(self.items))
