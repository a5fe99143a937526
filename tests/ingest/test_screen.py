"""The byte screens that run before the upload readers: line ends, UTF-8, the shape of NDJSON rows.

References outside the project: Python's own `json` module (the nesting depth and key count of a
parsed row) and its `utf-8` codec (which byte is invalid); RFC 4180 (CSV lines end with CRLF) and
the NDJSON convention (lines end with LF) for the line-end rule."""

from __future__ import annotations

import io
import json
import random

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from ingest.test_parse import CSV, GOOD, NDJSON, PARQUET, csv_body, errors_of, ndjson_body

from apportion.ingest.problems import Problems
from apportion.ingest.screen import JsonShapeScreen, screen_text


def _depth(value: object) -> int:
    if isinstance(value, dict):
        return 1 + max((_depth(v) for v in value.values()), default=0)
    if isinstance(value, list):
        return 1 + max((_depth(v) for v in value), default=0)
    return 0


def _value(rng: random.Random, depth: int) -> object:
    r = rng.random()
    if depth > 0 and r < 0.2:
        return [_value(rng, depth - 1) for _ in range(rng.randint(0, 3))]
    if depth > 0 and r < 0.4:
        return {f"k{i}": _value(rng, depth - 1) for i in range(rng.randint(0, 3))}
    # strings full of the characters the scanner must not be fooled by
    return rng.choice(["a[{", '\\"[', "x\\\\", "}}]]", 1, 2.5, None, True, 'q"{\\\\"[', ":::"])


def test_shape_screen_agrees_with_the_json_module_on_random_rows() -> None:
    """300 random NDJSON bodies with strings holding brackets, colons, quotes and backslashes, fed
    in random block sizes: the first row over the depth or key cap is the one Python's json
    module finds (reference: json.loads and a recursive depth)."""
    rng = random.Random(20261203)
    checked_failures = 0
    for _ in range(300):
        rows = [
            {f"c{i}": _value(rng, rng.randint(0, 6)) for i in range(rng.randint(1, 8))}
            for _ in range(rng.randint(1, 20))
        ]
        body = "".join(json.dumps(r) + "\n" for r in rows).encode()
        max_depth, max_fields = rng.randint(1, 6), rng.randint(1, 8)
        expected = next(
            (
                i + 1
                for i, line in enumerate(body.splitlines())
                if _depth(json.loads(line)) > max_depth or len(json.loads(line)) > max_fields
            ),
            None,
        )
        problems = Problems()
        screen = JsonShapeScreen(problems, max_depth=max_depth, max_fields=max_fields)
        step = rng.randint(1, 50)
        for k in range(0, len(body), step):
            screen.feed(body[k : k + step])
        screen.close()
        got = problems.items[0]["rows"][0] if problems else None
        assert got == expected, (body, max_depth, max_fields, problems.items)
        checked_failures += expected is not None
    assert checked_failures > 50  # the caps were actually exercised


@pytest.mark.parametrize(
    "line, problem",
    [
        (b'{"unit_id":"m9","x":' + b"[" * 5000 + b"]" * 5000 + b"}\n", "nests deeper than 32"),
        (
            b'{"unit_id":"m9",' + b",".join(b'"k%d":1' % i for i in range(5000)) + b"}\n",
            "more than 1000 keys",
        ),
        (b'{"unit_id":"' + b"x" * (2 << 20) + b'"}\n', "longer than 1048576 bytes"),
    ],
    ids=["deep", "wide", "long"],
)
def test_ndjson_rows_over_a_cap_are_refused_naming_the_row(line: bytes, problem: str) -> None:
    errors = errors_of(ndjson_body(GOOD) + line, NDJSON)
    assert errors[0]["rows"] == [6] and problem in errors[0]["problem"]


def test_a_bracket_inside_a_string_is_not_nesting() -> None:
    body = b'{"a":"' + b"[" * 100 + b'","b":"\\"' + b"{" * 100 + b'"}\n'
    problems = Problems()
    screen_text(body, "ndjson", problems)
    assert not problems


@pytest.mark.parametrize("ctype", [CSV, NDJSON])
def test_bare_carriage_returns_are_refused(ctype: str) -> None:
    body = (csv_body if ctype == CSV else ndjson_body)(GOOD).replace(b"\n", b"\r")
    assert "bare carriage return" in errors_of(body, ctype)[0]["problem"]


@pytest.mark.parametrize("ctype", [CSV, NDJSON])
def test_crlf_line_ends_are_read(ctype: str) -> None:
    body = (csv_body if ctype == CSV else ndjson_body)(GOOD).replace(b"\n", b"\r\n")
    problems = Problems()
    screen_text(body, "csv" if ctype == CSV else "ndjson", problems)
    assert not problems


@pytest.mark.parametrize(
    "ctype, old, new, row",
    [
        (CSV, b"beginner", b"begi\xe9nner", 1),  # Latin-1 e-acute in a value
        (CSV, b"tenure_days", b"tenure\xffdays", None),  # the header
        (NDJSON, b'"level"', b'"lev\xffel"', 1),  # a key
        (NDJSON, b"advanced", b"adv\xc3nced", 2),  # a truncated two-byte sequence
    ],
    ids=["csv-value", "csv-header", "ndjson-key", "ndjson-truncated"],
)
def test_undecodable_bytes_are_refused_naming_the_row(
    ctype: str, old: bytes, new: bytes, row: int | None
) -> None:
    body = (csv_body if ctype == CSV else ndjson_body)(GOOD).replace(old, new, 1)
    with pytest.raises(UnicodeDecodeError):  # the reference: Python's codec refuses it too
        body.decode("utf-8")
    err = errors_of(body, ctype)[0]
    assert "not valid UTF-8" in err["problem"]
    assert err["rows"] == ([] if row is None else [row])


@pytest.mark.parametrize("ctype", [CSV, NDJSON])
def test_nul_in_text_is_refused(ctype: str) -> None:
    body = (csv_body if ctype == CSV else ndjson_body)(GOOD)
    body = body.replace(b"beginner", b"beg\x00inner" if ctype == CSV else b"beg\\u0000inner", 1)
    err = errors_of(body, ctype)[0]
    assert err["column"] == "level" and "NUL" in err["problem"] and err["rows"] == [1]


def test_parquet_text_that_is_not_utf8_is_refused_naming_the_column() -> None:
    """Parquet readers hand over string pages unchecked; an invalid value must not get further."""
    sink = io.BytesIO()
    pq.write_table(pa.table(GOOD), sink, compression="none", use_dictionary=False)
    body = sink.getvalue().replace(b"beginner", b"beg\xff\xfener")  # same length, plain pages
    err = errors_of(body, PARQUET)[0]
    assert err["column"] == "level" and "not valid UTF-8" in err["problem"]
