"""parse_units: every bad upload is refused with the column and first offending rows named; the
same rows as CSV, Parquet and NDJSON give the same table; values agree with the standard library's
own csv and json readers (the outside reference for parsing)."""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest

from apportion.errors import InvalidInput
from apportion.ingest import CONTENT_TYPES, parse_units
from apportion.stats.table import FeatureSpec, MetricSpec

CSV, PARQUET, NDJSON = "text/csv", "application/vnd.apache.parquet", "application/x-ndjson"
ARMS = ["short", "control", "long"]  # control is not declared first: it must still get code 0
SHARES = [0.25, 0.5, 0.25]
METRICS = (
    MetricSpec("completed", "proportion"),
    MetricSpec("minutes", "mean"),
    MetricSpec(
        "mistakes_per_lesson", "ratio", "lower", numerator="mistakes", denominator="lessons"
    ),
)
FEATURES = (FeatureSpec("tenure_days", "numeric"), FeatureSpec("level", "categorical"))

GOOD = {
    "unit_id": ["m1", "m2", "m3", "m4", "m5"],
    "arm": ["control", "short", "long", "control", "short"],
    "tenure_days": [3.0, None, 40.5, 12.0, 0.0],
    "level": ["beginner", "advanced", None, "beginner", "intermediate"],
    "completed": [1, 0, 1, 1, 0],
    "minutes": [12.5, 3.0, 20.25, 0.0, 7.0],
    "mistakes": [4, 0, 7, 2, 0],
    "lessons": [2, 0, 3, 1, 1],
}


def csv_body(cols: dict) -> bytes:
    sink = io.BytesIO()
    pacsv.write_csv(pa.table(cols), sink)
    return sink.getvalue()


def parquet_body(cols: dict | pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(cols if isinstance(cols, pa.Table) else pa.table(cols), sink)
    return sink.getvalue()


def ndjson_body(cols: dict) -> bytes:
    rows = pa.table(cols).to_pylist()
    return "".join(json.dumps(r) + "\n" for r in rows).encode()


BODIES = {CSV: csv_body, PARQUET: parquet_body, NDJSON: ndjson_body}


def parse(body: bytes, ctype: str = CSV, **kw):
    args = dict(arms=ARMS, control="control", design_shares=SHARES, metrics=METRICS)
    args["features"] = FEATURES
    args.update(kw)
    return parse_units(body, ctype, **args)


def errors_of(body: bytes, ctype: str = CSV, **kw) -> list[dict]:
    with pytest.raises(InvalidInput) as info:
        parse(body, ctype, **kw)
    return info.value.errors


def with_(**changes) -> dict:
    cols = {k: list(v) for k, v in GOOD.items()}
    for k, v in changes.items():
        if v is None:
            cols.pop(k)
        else:
            cols[k] = v
    return cols


# ---- accepted uploads --------------------------------------------------------------------------


def test_good_csv_gives_the_unit_table():
    parsed = parse(csv_body(GOOD))
    t = parsed.table
    assert parsed.n_rows == 5 and t.n == 5
    assert t.arm_keys == ("control", "short", "long")
    np.testing.assert_array_equal(t.design_shares, [0.5, 0.25, 0.25])
    np.testing.assert_array_equal(t.arm, [0, 1, 2, 0, 1])
    assert t.unit_ids.tolist() == ["m1", "m2", "m3", "m4", "m5"]
    np.testing.assert_array_equal(t.feature_values["tenure_days"], [3.0, np.nan, 40.5, 12.0, 0.0])
    assert t.feature("level").levels == ("advanced", "beginner", "intermediate")  # sorted
    np.testing.assert_array_equal(t.feature_values["level"], [1, 0, -1, 1, 2])
    assert t.feature_values["level"].dtype == np.int32 and t.arm.dtype == np.int64
    assert list(t.columns) == ["completed", "minutes", "mistakes", "lessons"]
    np.testing.assert_array_equal(t.columns["lessons"], [2.0, 0.0, 3.0, 1.0, 1.0])
    assert parsed.flags == {} and parsed.warnings == ()


@pytest.mark.parametrize("ctype", [PARQUET, NDJSON], ids=["parquet", "ndjson"])
def test_same_rows_in_every_format_give_identical_tables(ctype):
    ref = parse(csv_body(GOOD)).table
    got = parse(BODIES[ctype](GOOD), ctype).table
    assert got.arm_keys == ref.arm_keys and got.features == ref.features
    assert got.metrics == ref.metrics
    assert got.unit_ids.tolist() == ref.unit_ids.tolist()
    np.testing.assert_array_equal(got.arm, ref.arm)
    np.testing.assert_array_equal(got.design_shares, ref.design_shares)
    for k, v in ref.feature_values.items():
        assert got.feature_values[k].dtype == v.dtype
        np.testing.assert_array_equal(got.feature_values[k], v)
    assert list(got.columns) == list(ref.columns)
    for k, v in ref.columns.items():
        np.testing.assert_array_equal(got.columns[k], v)


def test_values_agree_with_the_standard_library_readers():
    # outside reference: Python's csv module + float() for CSV, json.loads for NDJSON
    rng = np.random.default_rng(7)
    n = 200
    cols = {
        "unit_id": [f"u{i}" for i in range(n)],
        "arm": [ARMS[i] for i in rng.integers(0, 3, n)],
        "tenure_days": np.round(rng.gamma(2, 30, n), 4).tolist(),
        "level": [["a", "b", "c"][i] for i in rng.integers(0, 3, n)],
        "completed": rng.integers(0, 2, n).tolist(),
        "minutes": rng.normal(10, 4, n).tolist(),
        "mistakes": rng.poisson(3, n).tolist(),
        "lessons": rng.poisson(2, n).tolist(),
    }
    body = csv_body(cols)
    t = parse(body).table
    rows = list(csv.DictReader(io.StringIO(body.decode())))
    for c in ("minutes", "mistakes", "lessons", "completed"):
        np.testing.assert_array_equal(t.columns[c], [float(r[c]) for r in rows])
    np.testing.assert_array_equal(
        t.feature_values["tenure_days"], [float(r["tenure_days"]) for r in rows]
    )
    assert [t.arm_keys[a] for a in t.arm] == [r["arm"] for r in rows]
    levels = t.feature("level").levels
    assert [levels[c] for c in t.feature_values["level"]] == [r["level"] for r in rows]
    jt = parse(ndjson_body(cols), NDJSON).table
    records = [json.loads(line) for line in ndjson_body(cols).decode().splitlines()]
    np.testing.assert_array_equal(jt.columns["minutes"], [r["minutes"] for r in records])


def test_integer_unit_ids_become_text():
    cols = with_(unit_id=[10, 11, 12, 13, 14])
    for ctype, make in BODIES.items():
        assert parse(make(cols), ctype).table.unit_ids.tolist() == ["10", "11", "12", "13", "14"]


def test_numbers_written_as_text_and_booleans_count_as_numbers():
    cols = with_(
        minutes=["12.5", " 3", "2e1", "-0.5", "+7."], completed=[True, False, True, True, False]
    )
    t = parse(ndjson_body(cols), NDJSON).table
    np.testing.assert_array_equal(t.columns["minutes"], [12.5, 3.0, 20.0, -0.5, 7.0])
    np.testing.assert_array_equal(t.columns["completed"], [1.0, 0.0, 1.0, 1.0, 0.0])


def test_integer_categorical_values_become_their_text():
    t = parse(parquet_body(with_(level=[3, 1, None, 3, 20])), PARQUET).table
    assert t.feature("level").levels == ("1", "20", "3")  # text order, not numeric order
    np.testing.assert_array_equal(t.feature_values["level"], [2, 0, -1, 2, 1])


def test_declared_levels_are_kept_and_coded_in_their_order():
    features = (
        FEATURES[0],
        FeatureSpec("level", "categorical", ("intermediate", "beginner", "advanced", "expert")),
    )
    t = parse(csv_body(GOOD), features=features).table
    assert t.feature("level").levels == ("intermediate", "beginner", "advanced", "expert")
    np.testing.assert_array_equal(t.feature_values["level"], [1, 2, -1, 1, 0])


def test_empty_text_is_missing_in_every_format():
    cols = with_(level=["", "advanced", None, "beginner", ""])
    for ctype, make in BODIES.items():
        t = parse(make(cols), ctype).table
        assert t.feature("level").levels == ("advanced", "beginner")
        np.testing.assert_array_equal(t.feature_values["level"], [-1, 0, -1, 1, -1])


def test_extra_columns_are_ignored_with_a_warning():
    parsed = parse(csv_body(with_(note=["a", "b", "c", "d", "e"], zz=[1, 2, 3, 4, 5])))
    assert parsed.warnings == ("ignored columns not in the declaration: 'note', 'zz'",)
    assert "note" not in parsed.table.columns


def test_a_zero_denominator_is_accepted():
    t = parse(csv_body(with_(lessons=[0, 0, 0, 0, 1]))).table
    np.testing.assert_array_equal(t.columns["lessons"], [0.0, 0.0, 0.0, 0.0, 1.0])


@pytest.mark.parametrize("ctype", ["text/csv; charset=utf-8", "TEXT/CSV", "application/csv"])
def test_content_type_parameters_and_aliases(ctype):
    assert parse(csv_body(GOOD), ctype).n_rows == 5


def test_content_types_cover_the_three_formats():
    assert set(CONTENT_TYPES.values()) == {"csv", "parquet", "ndjson"}
    assert CONTENT_TYPES["application/ndjson"] == "ndjson"


def test_a_utf8_byte_order_mark_is_skipped():
    t = parse(b"\xef\xbb\xbf" + csv_body(GOOD)).table
    assert t.unit_ids.tolist()[0] == "m1"


def test_monitor_rows_with_a_holdout_flag_and_no_arm_column():
    cols = with_(arm=None, holdout=["true", "FALSE", "1", "0", " True "])
    for ctype, make in BODIES.items():
        parsed = parse(make(cols), ctype, arm_column=None, flag_columns=["holdout"])
        np.testing.assert_array_equal(parsed.table.arm, [0, 0, 0, 0, 0])
        np.testing.assert_array_equal(parsed.flags["holdout"], [True, False, True, False, True])
    parsed = parse(
        parquet_body(with_(arm=None, holdout=[True, False, True, False, False])),
        PARQUET,
        arm_column=None,
        flag_columns=["holdout"],
    )
    np.testing.assert_array_equal(parsed.flags["holdout"], [True, False, True, False, False])


# ---- refused uploads: exact errors -------------------------------------------------------------


def err(column, problem, rows, values, count=None):
    return {
        "column": column,
        "problem": problem,
        "rows": rows,
        "values": values,
        "count": len(rows) if count is None else count,
    }


DECLARED = "(declared: 'control', 'short', 'long')"
BAD_CASES = {
    "unknown arm": (
        with_(arm=["control", "x", "long", "y", "x"]),
        [err("arm", f"unknown arms 'x', 'y' {DECLARED}", [2, 4, 5], ["x", "y", "x"])],
    ),
    "missing arm": (
        with_(arm=["control", None, "long", "control", "short"]),
        [err("arm", "missing arm", [2], [None])],
    ),
    "missing component column": (
        with_(lessons=None),
        [err("lessons", "missing column", [], [])],
    ),
    "missing feature and id columns": (
        with_(unit_id=None, tenure_days=None),
        [err("unit_id", "missing column", [], []), err("tenure_days", "missing column", [], [])],
    ),
    "duplicate unit id": (
        with_(unit_id=["a", "b", "a", "b", "a"]),
        [err("unit_id", "duplicate unit id", [3, 4, 5], ["a", "b", "a"])],
    ),
    "missing unit id": (
        with_(unit_id=["a", None, "c", "d", "e"]),
        [err("unit_id", "missing unit id", [2], [None])],
    ),
    "missing metric value": (
        with_(minutes=[1.0, None, 2.0, None, 3.0]),
        [err("minutes", "missing or non-finite value", [2, 4], [None, None])],
    ),
    "proportion outside 0/1": (
        with_(completed=[1, 2, 0, -1, 1]),
        [err("completed", "proportion must be 0 or 1", [2, 4], [2, -1])],
    ),
    "negative ratio denominator": (
        with_(lessons=[1, 0, -2, 1, -1]),
        [err("lessons", "ratio denominator must be >= 0", [3, 5], [-2, -1])],
    ),
    "unknown categorical type": (
        with_(level=[1.5, 2.5, 1.5, 2.5, 1.5]),
        [
            err(
                "level",
                "unsupported type double for a categorical feature (expected text, integers or booleans)",
                [],
                [],
                0,
            )
        ],
    ),
}


# CSV has no types, so a categorical 1.5 is just the level "1.5" there: that case is typed formats only
_FORMAT_CASES = [
    pytest.param(case, ctype, id=f"{case}-{name}")
    for case in BAD_CASES
    for ctype, name in ((CSV, "csv"), (PARQUET, "parquet"), (NDJSON, "ndjson"))
    if not (case == "unknown categorical type" and ctype == CSV)
]


@pytest.mark.parametrize("case,ctype", _FORMAT_CASES)
def test_bad_upload_names_column_and_first_rows(case, ctype):
    cols, expected = BAD_CASES[case]
    got = errors_of(BODIES[ctype](cols), ctype)
    if ctype == CSV:  # CSV values come back as the numbers Arrow read them as (ints as floats)
        expected = [
            {
                **e,
                "values": [
                    float(v) if isinstance(v, int) and e["column"] not in ("unit_id", "arm") else v
                    for v in e["values"]
                ],
            }
            for e in expected
        ]
    assert got == expected


def test_non_finite_and_non_numeric_metric_values_in_csv():
    body = b"unit_id,arm,tenure_days,level,completed,minutes,mistakes,lessons\n" + (
        b"a,control,1,x,1,inf,1,1\n"
        b"b,control,1,x,1,NaN,1,1\n"
        b"c,control,1,x,1,2,many,1\n"
        b"d,control,1,x,1,-Infinity,1,1\n"
    )
    assert errors_of(body) == [
        # non-finite numbers are shown in JSON-safe spelling ("-Infinity" was read as -inf)
        err("minutes", "missing or non-finite value", [1, 2, 4], ["inf", "NaN", "-inf"]),
        err("mistakes", "expected numbers, got text", [3], ["many"]),
    ]


def test_numeric_feature_arriving_as_text_is_a_type_error():
    cols = with_(tenure_days=["3", "soon", "4", "", "later"])
    assert errors_of(ndjson_body(cols), NDJSON) == [
        err("tenure_days", "expected numbers, got text", [2, 5], ["soon", "later"])
    ]
    assert errors_of(csv_body(cols)) == [
        err("tenure_days", "expected numbers, got text", [2, 5], ["soon", "later"])
    ]


def test_infinite_numeric_feature_is_refused():
    cols = with_(tenure_days=[1.0, float("inf"), 2.0, None, 3.0])
    assert errors_of(parquet_body(cols), PARQUET) == [
        err("tenure_days", "infinite value", [2], ["inf"])
    ]


def test_value_outside_declared_levels():
    features = (FEATURES[0], FeatureSpec("level", "categorical", ("beginner", "advanced")))
    assert errors_of(csv_body(GOOD), features=features) == [
        err(
            "level",
            "unknown level 'intermediate' (declared levels: 'beginner', 'advanced')",
            [5],
            ["intermediate"],
        )
    ]


def test_bad_flags():
    cols = with_(arm=None, holdout=["true", "yes", None, "0", "2"])
    assert errors_of(csv_body(cols), arm_column=None, flag_columns=["holdout"]) == [
        err("holdout", "missing value", [3], [None]),
        err("holdout", "expected true/false/1/0", [2, 5], ["yes", "2"]),
    ]


@pytest.mark.parametrize("body", [b"", b"  \n"], ids=["empty", "blank"])
def test_empty_body(body):
    assert errors_of(body) == [err(None, "the upload is empty", [], [])]


def test_header_only_and_zero_row_files():
    assert errors_of(csv_body(GOOD).split(b"\n")[0] + b"\n") == [err(None, "no data rows", [], [])]
    empty = pa.table(GOOD).slice(0, 0)
    assert errors_of(parquet_body(empty), PARQUET) == [err(None, "no data rows", [], [])]


def test_rows_with_the_wrong_number_of_fields():
    lines = csv_body(GOOD).decode().splitlines()
    lines[2] += ",extra"
    lines[4] = lines[4].rsplit(",", 1)[0]
    got = errors_of(("\n".join(lines) + "\n").encode())
    assert got == [
        err(
            None,
            "row has a different number of fields than the header (8)",
            [2, 4],
            [lines[2], lines[4]],
        )
    ]


def test_ndjson_column_with_mixed_types_names_the_row():
    body = b"".join(json.dumps(r).encode() + b"\n" for r in pa.table(GOOD).to_pylist())
    body += json.dumps({**pa.table(GOOD).to_pylist()[0], "unit_id": 77}).encode() + b"\n"
    assert errors_of(body, NDJSON) == [
        err("unit_id", "values of mixed JSON types (string and number)", [6], [], 1)
    ]


@pytest.mark.parametrize("ctype", [PARQUET, NDJSON], ids=["parquet", "ndjson"])
def test_garbage_body_is_unreadable(ctype):
    with pytest.raises(InvalidInput, match="could not read the"):
        parse(b"\x00\x01 this is not data", ctype)


def test_unknown_content_type_is_distinct():
    with pytest.raises(InvalidInput) as info:
        parse(csv_body(GOOD), "application/xml")
    assert info.value.extra == {"unsupported_media_type": "application/xml"}
    assert str(info.value).startswith("unsupported content type 'application/xml'")


def test_all_problems_are_collected_and_the_message_carries_values():
    cols = with_(
        arm=["control", "zz", "long", "control", "short"], completed=[1, 0, 5, 1, 0], lessons=None
    )
    with pytest.raises(InvalidInput) as info:
        parse(parquet_body(cols), PARQUET)
    assert [(e["column"], e["rows"]) for e in info.value.errors] == [
        ("lessons", []),
        ("arm", [2]),
        ("completed", [3]),
    ]
    assert "column 'arm': unknown arm 'zz'" in info.value.detail
    assert "in rows 3 (values 5)" in info.value.detail


def test_rows_are_capped_at_max_examples_and_counted():
    n = 30
    cols = {k: (v * 6)[:n] for k, v in GOOD.items()}
    cols["unit_id"] = [f"u{i}" for i in range(n)]
    cols["minutes"] = [None] * n
    (e,) = errors_of(parquet_body(cols), PARQUET, max_examples=4)
    assert e == err("minutes", "missing or non-finite value", [1, 2, 3, 4], [None] * 4, count=30)


def test_bad_declaration():
    with pytest.raises(InvalidInput, match="control arm 'ctl' is not one of the arms"):
        parse(csv_body(GOOD), control="ctl")
    with pytest.raises(InvalidInput, match="2 design shares given for 3 arms"):
        parse(csv_body(GOOD), design_shares=[0.5, 0.5])


# ---- larger files ------------------------------------------------------------------------------


def _big(n: int, seed: int = 3) -> dict:
    rng = np.random.default_rng(seed)
    return {
        "unit_id": [f"u{i:06d}" for i in range(n)],
        "arm": np.asarray(ARMS, dtype=object)[rng.integers(0, 3, n)].tolist(),
        "tenure_days": np.round(rng.gamma(2, 30, n), 2),
        "level": np.asarray(["a", "b", "c", "d"], dtype=object)[rng.integers(0, 4, n)].tolist(),
        "completed": rng.integers(0, 2, n),
        "minutes": np.round(rng.normal(10, 4, n), 3),
        "mistakes": rng.poisson(3, n),
        "lessons": rng.poisson(2, n),
    }


def test_fifty_thousand_rows_parse_and_late_problems_are_found(monkeypatch):
    # small blocks so the upload is read as many blocks on both cores, as a large one would be
    monkeypatch.setattr("apportion.ingest.formats._CSV_BLOCK", 1 << 16)
    n = 50_000
    cols = _big(n)
    t = parse(csv_body(cols)).table
    assert t.n == n and np.bincount(t.arm).sum() == n
    np.testing.assert_array_equal(t.columns["minutes"], cols["minutes"])
    # a repeated id and a text value in the very last rows, many blocks after the first
    cols["unit_id"][-1] = "u000007"
    minutes = cols["minutes"].astype(object)
    minutes[-2] = "oops"
    cols["minutes"] = minutes.tolist()
    body = csv_body({**cols, "minutes": [str(v) for v in cols["minutes"]]})
    assert errors_of(body) == [
        err("unit_id", "duplicate unit id", [n], ["u000007"]),
        err("minutes", "expected numbers, got text", [n - 1], ["oops"]),
    ]


def test_text_in_many_number_columns_of_a_csv_is_all_found():
    # more culprit columns than single-column re-reads: the fallback reads all of them as text
    cols = with_(
        tenure_days=["1", "x", "2", "3", "4"],
        completed=["1", "0", "y", "1", "0"],
        minutes=["1", "2", "3", "z", "5"],
        mistakes=["w", "2", "3", "4", "5"],
        lessons=["1", "2", "3", "4", "v"],
    )
    got = errors_of(csv_body(cols))
    assert [(e["column"], e["rows"], e["values"]) for e in got] == [
        ("tenure_days", [2], ["x"]),
        ("completed", [3], ["y"]),
        ("minutes", [4], ["z"]),
        ("mistakes", [1], ["w"]),
        ("lessons", [5], ["v"]),
    ]
    assert {e["problem"] for e in got} == {"expected numbers, got text"}


def test_a_column_named_twice_in_the_header():
    body = csv_body(GOOD).replace(b'"minutes"', b'"lessons"', 1)
    assert errors_of(body) == [
        err("lessons", "column appears more than once in the header", [], [])
    ]


def test_invalid_utf8_in_csv_is_refused_naming_the_row():
    body = csv_body(GOOD).replace(b"beginner", b"beg\xff\xfener", 1)
    with pytest.raises(InvalidInput, match="a row is not valid UTF-8 .* in rows 1"):
        parse(body)
