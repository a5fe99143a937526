"""Turn uploaded Arrow columns into the arrays of a UnitTable, recording every bad value.

Each converter returns its array, or None after adding problems; it never raises, so one pass over
the upload reports every problem. All work is vectorised (pyarrow.compute, numpy); nothing loops
over rows in Python.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .problems import Problems

# what a number written as text may look like (Arrow's own string -> float64 cast accepts these)
_NUMBER = r"(?i)^[+-]?((\d+\.?\d*|\.\d+)(e[+-]?\d+)?|inf|infinity|nan)$"
_TRUE = pa.array(["true", "1"])
_FALSE = pa.array(["false", "0"])


def plain(col: pa.ChunkedArray | pa.Array) -> pa.Array:
    """One contiguous array, dictionary-encoded columns decoded."""
    arr = col.combine_chunks() if isinstance(col, pa.ChunkedArray) else col
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    return arr


def _np(arr: pa.Array, dtype: type) -> np.ndarray:
    return np.array(arr.to_numpy(zero_copy_only=False), dtype=dtype)  # owned and writable


def _is_text(t: pa.DataType) -> bool:
    return pa.types.is_string(t) or pa.types.is_large_string(t)


def _is_number(t: pa.DataType) -> bool:
    return (
        pa.types.is_integer(t)
        or pa.types.is_floating(t)
        or pa.types.is_boolean(t)
        or pa.types.is_decimal(t)
    )


def to_float(arr: pa.Array, column: str, problems: Problems) -> np.ndarray | None:
    """(n,) float64 with NaN where missing. Numbers, booleans (0/1) and numbers written as text
    are accepted; other text is a problem listing its rows."""
    t = arr.type
    if pa.types.is_null(t):
        return np.full(len(arr), np.nan)
    if _is_number(t):
        f = pc.cast(arr, pa.float64())
    elif _is_text(t):
        trimmed = pc.utf8_trim_whitespace(arr)
        empty = pc.equal(pc.utf8_length(trimmed), 0)
        bad = pc.and_(pc.invert(empty), pc.invert(pc.match_substring_regex(trimmed, _NUMBER)))
        bad_np = _np(pc.fill_null(bad, False), bool)
        if bad_np.any():
            problems.add(column, "expected numbers, got text", mask=bad_np, source=arr)
            return None
        f = pc.cast(pc.if_else(empty, pa.scalar(None, trimmed.type), trimmed), pa.float64())
    else:
        problems.add(column, f"expected numbers, got values of type {t}")
        return None
    return _np(pc.fill_null(f, np.nan), np.float64)


def to_labels(
    arr: pa.Array, column: str, problems: Problems, *, what: str, allow_bool: bool = True
) -> tuple[pa.Array, np.ndarray] | None:
    """(distinct labels as an Arrow string array, (n,) int64 index into it with -1 for missing).

    Text is taken as is; integers (and booleans, unless `allow_bool` is False) become their text
    ("7", "true"); an empty string counts as missing. Indices follow first appearance."""
    t = arr.type
    if pa.types.is_null(t):
        return pa.array([], type=pa.string()), np.full(len(arr), -1, dtype=np.int64)
    if pa.types.is_integer(t) or (allow_bool and pa.types.is_boolean(t)):
        arr = pc.cast(arr, pa.string())
    elif not _is_text(t):
        kinds = "text or integers" if not allow_bool else "text, integers or booleans"
        problems.add(column, f"unsupported type {t} for {what} (expected {kinds})")
        return None
    enc = pc.dictionary_encode(arr)
    idx = _np(pc.fill_null(enc.indices, -1), np.int64)
    nul = _np(pc.fill_null(pc.match_substring(enc.dictionary, "\x00"), False), bool)
    if nul.any():  # no store keeps NUL in text (PostgreSQL refuses it)
        problems.add(
            column, "text holds a NUL character", mask=np.append(nul, False)[idx], source=arr
        )
        return None
    empty = pc.index(enc.dictionary, "").as_py()
    if empty >= 0:
        idx[idx == empty] = -1
    return enc.dictionary, idx


def to_flags(arr: pa.Array, column: str, problems: Problems) -> np.ndarray | None:
    """(n,) bool from booleans, numbers 0/1, or text true/false/1/0 (any case)."""
    t = arr.type
    if pa.types.is_boolean(t):
        is_true, is_false = arr, pc.invert(arr)
    elif _is_number(t):
        f = pc.cast(arr, pa.float64())
        is_true, is_false = pc.equal(f, 1.0), pc.equal(f, 0.0)
    elif _is_text(t):
        low = pc.utf8_lower(pc.utf8_trim_whitespace(arr))
        is_true, is_false = pc.is_in(low, value_set=_TRUE), pc.is_in(low, value_set=_FALSE)
    elif pa.types.is_null(t):
        is_true = is_false = pa.nulls(len(arr), pa.bool_())
    else:
        problems.add(column, f"expected true/false, got values of type {t}")
        return None
    missing = _np(pc.is_null(arr), bool)
    yes = _np(pc.fill_null(is_true, False), bool)
    no = _np(pc.fill_null(is_false, False), bool)
    ok = True
    if missing.any():
        problems.add(column, "missing value", mask=missing, source=arr)
        ok = False
    bad = ~missing & ~yes & ~no
    if bad.any():
        problems.add(column, "expected true/false/1/0", mask=bad, source=arr)
        ok = False
    return yes if ok else None


def repeats(idx: np.ndarray) -> np.ndarray:
    """(n,) bool: the row repeats a label seen in an earlier row (idx from `to_labels`).

    Dictionary indices are handed out in order of first appearance, so a row is new exactly when
    its index exceeds every earlier one: one running maximum instead of a sort."""
    prev = np.empty_like(idx)
    if idx.size:
        prev[0] = -1
        np.maximum.accumulate(idx[:-1], out=prev[1:])
    return (idx >= 0) & (idx <= prev)
