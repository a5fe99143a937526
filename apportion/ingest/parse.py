"""Parse and validate a whole upload of unit-level rows (readouts, monitor rows) into a UnitTable.

Every problem in the upload is collected and raised once as InvalidInput (errors: column, first
offending 1-based data rows, problem, values), so nothing is stored from a bad upload and the
uploader can fix everything in one go. Pure: bytes in, arrays out; no web, no database.

Choices: unit ids may be text or integers and always become text; categorical features accept text,
integers and booleans as their text form ("7", "true"); an empty field is missing everywhere;
numbers written as text (CSV, or quoted in NDJSON) are numbers; booleans count as 0/1 in number
columns; a numeric feature may be missing (NaN) but not infinite; metric components must be finite.
Columns that are not declared are ignored and named in `warnings`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from apportion.errors import InvalidInput
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

from .columns import plain, repeats, to_flags, to_float, to_labels
from .formats import CONTENT_TYPES, media_format, read_upload
from .problems import Problems, json_safe

__all__ = ["CONTENT_TYPES", "ParsedUnits", "parse_units"]


@dataclass(frozen=True)
class ParsedUnits:
    """A validated upload: the table (arm 0 = control), extra boolean columns, row count, and
    warnings about the upload that did not stop it (e.g. ignored columns)."""

    table: UnitTable
    flags: dict[str, np.ndarray]
    n_rows: int
    warnings: tuple[str, ...] = ()


def _names(values: Sequence[object], limit: int = 10) -> str:
    shown = ", ".join(repr(json_safe(v)) for v in values[:limit])
    return shown + (", ..." if len(values) > limit else "")


def _arm_order(arms: Sequence[str], control: str, shares: Sequence[float]) -> tuple:
    arms = [str(a) for a in arms]
    if len(set(arms)) != len(arms) or not arms:
        raise InvalidInput(f"arms must be distinct and non-empty, got {arms}")
    if control not in arms:
        raise InvalidInput(f"control arm '{control}' is not one of the arms {arms}")
    if len(shares) != len(arms):
        raise InvalidInput(f"{len(shares)} design shares given for {len(arms)} arms {arms}")
    order = [arms.index(control)] + [i for i, a in enumerate(arms) if a != control]
    keys = tuple(arms[i] for i in order)
    return keys, np.asarray([float(shares[i]) for i in order], dtype=np.float64)


def parse_units(
    body: bytes,
    content_type: str,
    *,
    arms: Sequence[str],
    control: str,
    design_shares: Sequence[float],
    metrics: tuple[MetricSpec, ...],
    features: tuple[FeatureSpec, ...],
    unit_column: str = "unit_id",
    arm_column: str | None = "arm",
    flag_columns: Sequence[str] = (),
    max_examples: int = 10,
) -> ParsedUnits:
    """Validate the whole upload and return it as a UnitTable; raise InvalidInput listing all
    problems otherwise. With `arm_column=None` (monitor rows) every row gets arm code 0."""
    fmt = media_format(content_type)
    arm_keys, shares = _arm_order(arms, control, design_shares)
    problems = Problems(max_examples)
    if not body or not bytes(body).strip():
        problems.add(None, "the upload is empty")
        problems.raise_if_any()

    components = list(dict.fromkeys(c for m in metrics for c in m.columns))
    categorical = [f.key for f in features if f.kind == "categorical"]
    numeric = [f.key for f in features if f.kind != "categorical"]
    id_cols = [unit_column] + ([arm_column] if arm_column else [])
    wanted = list(
        dict.fromkeys(id_cols + [f.key for f in features] + components + list(flag_columns))
    )
    table, names = read_upload(
        bytes(body),
        fmt,
        wanted=wanted,
        text_columns=id_cols + categorical + list(flag_columns),
        number_columns=numeric + components,
        problems=problems,
    )
    for c in wanted:
        if c not in table.column_names:
            problems.add(c, "missing column")
    extra = [c for c in names if c not in set(wanted)]
    warnings = (f"ignored columns not in the declaration: {_names(extra)}",) if extra else ()
    n = table.num_rows
    if n == 0:
        problems.add(None, "no data rows")
        problems.raise_if_any()
    cols = {c: plain(table.column(c)) for c in table.column_names}

    unit_ids = _unit_ids(cols.get(unit_column), unit_column, problems)
    arm = _arms(cols.get(arm_column) if arm_column else None, arm_column, arm_keys, n, problems)
    specs, values = _features(features, cols, problems)
    columns = _components(metrics, components, cols, problems)
    read_flags = {c: to_flags(cols[c], c, problems) for c in flag_columns if c in cols}
    problems.raise_if_any()  # a flag column that could not be read (None) is one of the problems
    flags = {c: f for c, f in read_flags.items() if f is not None}

    unit_table = UnitTable(
        unit_ids=unit_ids,
        arm=arm,
        arm_keys=arm_keys,
        design_shares=shares,
        features=specs,
        feature_values=values,
        metrics=tuple(metrics),
        columns=columns,
    )
    return ParsedUnits(table=unit_table, flags=flags, n_rows=n, warnings=warnings)


def _unit_ids(arr: pa.Array | None, column: str, problems: Problems) -> np.ndarray:
    if arr is None:
        return np.empty(0, dtype=object)
    labels = to_labels(arr, column, problems, what="unit ids", allow_bool=False)
    if labels is None:
        return np.empty(0, dtype=object)
    dictionary, idx = labels
    missing = idx < 0
    if missing.any():
        problems.add(column, "missing unit id", mask=missing, source=arr)
    if len(dictionary) != int((~missing).sum()):  # fewer distinct ids than ids: some repeat
        problems.add(column, "duplicate unit id", mask=repeats(idx), source=arr)
    text = arr if not pa.types.is_integer(arr.type) else pc.cast(arr, pa.string())
    return np.asarray(text.to_numpy(zero_copy_only=False), dtype=object)


def _arms(
    arr: pa.Array | None, column: str | None, arm_keys: tuple, n: int, problems: Problems
) -> np.ndarray:
    if arr is None or column is None:
        return np.zeros(n, dtype=np.int64)
    labels = to_labels(arr, column, problems, what="arms", allow_bool=False)
    if labels is None:
        return np.zeros(n, dtype=np.int64)
    dictionary, idx = labels
    lut = _level_codes(dictionary, arm_keys)
    missing = idx < 0
    if missing.any():
        problems.add(column, "missing arm", mask=missing, source=arr)
    unknown_levels = lut < 0
    bad = np.append(unknown_levels, False)[idx]
    if bad.any():
        shown = [v for v in dictionary.filter(pa.array(unknown_levels)).to_pylist() if v != ""]
        word = "arm" if len(shown) == 1 else "arms"
        problems.add(
            column,
            f"unknown {word} {_names(shown)} (declared: {_names(list(arm_keys))})",
            mask=bad,
            source=arr,
        )
    return np.where(missing, 0, np.append(lut, 0)[idx]).astype(np.int64)


def _level_codes(dictionary: pa.Array, levels: Sequence[str]) -> np.ndarray:
    """(len(dictionary),) int64 position of each dictionary value in `levels`, -1 if absent."""
    pos = pc.index_in(dictionary, value_set=pa.array(list(levels), type=pa.string()))
    return np.array(pc.fill_null(pos, -1).to_numpy(zero_copy_only=False), dtype=np.int64)


def _features(
    features: tuple[FeatureSpec, ...], cols: dict[str, pa.Array], problems: Problems
) -> tuple[tuple[FeatureSpec, ...], dict[str, np.ndarray]]:
    specs: list[FeatureSpec] = []
    values: dict[str, np.ndarray] = {}
    for f in features:
        arr = cols.get(f.key)
        if f.kind != "categorical":
            specs.append(f)
            x = to_float(arr, f.key, problems) if arr is not None else None
            if x is not None:
                inf = np.isinf(x)
                if inf.any():
                    problems.add(f.key, "infinite value", mask=inf, source=arr)
                values[f.key] = x
            continue
        labels = (
            to_labels(arr, f.key, problems, what="a categorical feature")
            if arr is not None
            else None
        )
        if labels is None:
            specs.append(f)
            continue
        dictionary, idx = labels
        if f.levels:
            levels = tuple(f.levels)
        else:  # discovered: sorted so the same data always gives the same codes
            levels = tuple(sorted(v for v in dictionary.to_pylist() if v not in (None, "")))
        lut = _level_codes(dictionary, levels)
        codes = np.append(lut, -1)[idx]
        unknown = (idx >= 0) & (codes < 0)
        if unknown.any():
            shown = sorted({v for v in dictionary.filter(pa.array(lut < 0)).to_pylist() if v})
            problems.add(
                f.key,
                f"unknown level {_names(shown)} (declared levels: {_names(list(levels))})",
                mask=unknown,
                source=arr,
            )
        specs.append(replace(f, levels=levels))
        values[f.key] = codes.astype(np.int32)
    return tuple(specs), values


def _components(
    metrics: tuple[MetricSpec, ...],
    components: list[str],
    cols: dict[str, pa.Array],
    problems: Problems,
) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {}
    for c in components:
        arr = cols.get(c)
        x = to_float(arr, c, problems) if arr is not None else None
        if x is None:
            continue
        finite = np.isfinite(x)
        if not finite.all():
            problems.add(c, "missing or non-finite value", mask=~finite, source=arr)
        if any(m.kind == "proportion" and m.key == c for m in metrics):
            bad = finite & (x != 0.0) & (x != 1.0)
            if bad.any():
                problems.add(c, "proportion must be 0 or 1", mask=bad, source=arr)
        if any(m.kind == "ratio" and m.denominator == c for m in metrics):
            bad = finite & (x < 0.0)
            if bad.any():
                problems.add(c, "ratio denominator must be >= 0", mask=bad, source=arr)
        out[c] = x
    return out
