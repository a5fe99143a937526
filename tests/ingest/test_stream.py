"""Streaming ingest: the same checks as the whole-upload parser (`parse_units` is the reference),
batch by batch, with rows numbered in the whole upload; duplicates across batches; nothing left in
the staging directory on failure; the stored dataset reads back as the parser's table; the
streamed summary moments equal the whole-table moments."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pyarrow.fs as pafs
import pytest

import apportion.ingest.stream as stream
from apportion.errors import InvalidInput
from apportion.ingest.dataset import read_dataset
from apportion.ingest.problems import Problems
from apportion.stats.estimates import cell_moments

_spec = importlib.util.spec_from_file_location(
    "parse_cases", Path(__file__).with_name("test_parse.py")
)
cases = importlib.util.module_from_spec(_spec)  # the parser's own test corpus, reused as is
_spec.loader.exec_module(cases)  # type: ignore[union-attr]

FMT = {cases.CSV: "csv", cases.PARQUET: "parquet", cases.NDJSON: "ndjson"}


def run_stream(tmp_path, body: bytes, ctype: str, **kw):
    src = tmp_path / "upload.bin"
    src.write_bytes(body)
    out = tmp_path / "staging"
    out.mkdir(exist_ok=True)
    problems = Problems()
    args = dict(
        arms=cases.ARMS,
        control="control",
        design_shares=cases.SHARES,
        metrics=cases.METRICS,
        features=cases.FEATURES,
    )
    args.update(kw)
    source = stream.file_source(str(src), FMT[ctype], problems)
    return stream.ingest(
        source,
        fs=pafs.LocalFileSystem(),
        directory=str(out),
        problems=problems,
        work_dir=str(tmp_path),
        **args,
    )


def stream_errors(tmp_path, body: bytes, ctype: str) -> list[dict]:
    with pytest.raises(InvalidInput) as info:
        run_stream(tmp_path, body, ctype)
    assert list((tmp_path / "staging").iterdir()) == []  # nothing written survives a failure
    return info.value.errors


@pytest.fixture
def tiny_batches(monkeypatch):
    """Batches of 2 rows (Parquet) or 256 bytes (CSV, NDJSON; an NDJSON line must fit in one): every upload spans batches."""
    monkeypatch.setattr(stream, "BATCH_ROWS", 2)
    monkeypatch.setattr(stream, "BATCH_BYTES", 256)


@pytest.mark.parametrize("batches", ["one", "tiny"])
@pytest.mark.parametrize("case,ctype", cases._FORMAT_CASES)
def test_every_bad_case_gets_the_parsers_errors(case, ctype, batches, tmp_path, request):
    if batches == "tiny":
        request.getfixturevalue("tiny_batches")
    cols, _expected = cases.BAD_CASES[case]
    body = cases.BODIES[ctype](cols)
    whole = cases.errors_of(body, ctype)
    got = stream_errors(tmp_path, body, ctype)
    if batches == "tiny" and case == "unknown arm":
        # per batch the unknown values are named batch by batch: same rows and count, one
        # problem per distinct set of names
        assert sorted(r for e in got for r in e["rows"]) == whole[0]["rows"]
        assert sum(e["count"] for e in got) == whole[0]["count"]
        return
    assert got == whole


def test_duplicates_across_batches_are_found_with_their_rows(tmp_path, tiny_batches):
    n = 60
    ids = [f"m{i}" for i in range(n)]
    ids[41], ids[57], ids[58] = "m3", "m3", "m20"  # repeats far from the first occurrence
    cols = {
        "unit_id": ids,
        "arm": (["control", "short", "long"] * n)[:n],
        "tenure_days": [float(i) for i in range(n)],
        "level": (["a", "b"] * n)[:n],
        "completed": [i % 2 for i in range(n)],
        "minutes": [1.0] * n,
        "mistakes": [1] * n,
        "lessons": [2] * n,
    }
    for ctype in (cases.CSV, cases.PARQUET, cases.NDJSON):
        body = cases.BODIES[ctype](cols)
        expected = cases.errors_of(body, ctype)
        assert expected == [
            {
                "column": "unit_id",
                "problem": "duplicate unit id",
                "rows": [42, 58, 59],
                "values": ["m3", "m3", "m20"],
                "count": 3,
            }
        ]
        assert stream_errors(tmp_path, body, ctype) == expected


def test_late_problems_in_a_long_csv_have_their_rows_in_the_whole_upload(tmp_path, tiny_batches):
    cols = cases.with_()
    n = 400
    big = {k: (v * (n // 5)) for k, v in cols.items()}
    big["unit_id"] = [f"u{i}" for i in range(n)]
    big["minutes"][371] = None
    big["arm"][398] = "nope"
    body = cases.csv_body(big)
    assert stream_errors(tmp_path, body, cases.CSV) == cases.errors_of(body, cases.CSV)


@pytest.mark.parametrize("ctype", [cases.CSV, cases.PARQUET, cases.NDJSON])
def test_stored_dataset_is_the_parsers_table_and_moments_pool_exactly(
    ctype, tmp_path, tiny_batches
):
    n = 50
    rng = np.random.default_rng(11)
    cols = {
        "unit_id": [f"m{i}" for i in range(n)],
        "arm": list(rng.choice(["control", "short", "long"], size=n)),
        "tenure_days": [None if i % 7 == 0 else float(rng.normal()) for i in range(n)],
        "level": [None if i % 9 == 0 else str(rng.choice(["b", "a", "c"])) for i in range(n)],
        "completed": [int(x) for x in rng.integers(0, 2, size=n)],
        "minutes": [float(x) for x in rng.gamma(2.0, 5.0, size=n)],
        "mistakes": [int(x) for x in rng.integers(0, 4, size=n)],
        "lessons": [int(x) for x in rng.integers(1, 5, size=n)],
    }
    body = cases.BODIES[ctype](cols)
    whole = cases.parse(body, ctype).table
    got = run_stream(tmp_path, body, ctype)
    paths = [str(tmp_path / "staging" / f["name"]) for f in got.manifest.files]
    table, _ = read_dataset(pafs.LocalFileSystem(), paths, got.manifest)
    assert list(table.unit_ids) == list(whole.unit_ids)
    assert table.features == whole.features  # discovered levels: sorted union over batches
    np.testing.assert_array_equal(table.arm, whole.arm)
    for key in whole.feature_values:
        np.testing.assert_array_equal(table.feature_values[key], whole.feature_values[key])
    for c in whole.columns:
        np.testing.assert_array_equal(table.columns[c], whole.columns[c])
    ref = cell_moments(
        np.zeros(n, dtype=np.int64),
        1,
        whole.arm,
        whole.n_arms,
        whole.component_matrix(),
        whole.component_names(),
    )
    np.testing.assert_array_equal(got.moments.n, ref.n)
    # pooled over 25 batches vs one pass: equal to rounding (Chan, Golub and LeVeque 1979)
    np.testing.assert_allclose(got.moments.mean, ref.mean, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got.moments.cov, ref.cov, rtol=1e-10, atol=1e-12)
    # and the moments agree with numpy's own sample covariance of one arm (outside reference)
    j = 1
    rows = whole.arm == j
    np.testing.assert_allclose(
        got.moments.cov[0, j], np.cov(whole.component_matrix()[rows], rowvar=False), rtol=1e-10
    )
