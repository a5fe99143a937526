"""Time parse_units and encode_table on a 1,000,000-row, 30-column readout built in memory.

Prints ONE JSON line. The reference run is a plain pyarrow CSV read of the same bytes in the same
process (the floor any CSV parser here has to pay); `ratio_*` are our times over that reference.
The target: upload end to end under 20 s on two cores; parse + validate under ~5 s.

    .venv/bin/python bench/ingest_parse.py [--rows 1000000] [--repeat 1]
"""

from __future__ import annotations

import argparse
import io
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout, not installed

from apportion.ingest import decode_table, encode_table, parse_units
from apportion.stats.table import FeatureSpec, MetricSpec

ARMS = ["control", "short", "long"]
SHARES = [0.34, 0.33, 0.33]


def _declaration() -> tuple[tuple[MetricSpec, ...], tuple[FeatureSpec, ...]]:
    features = tuple(FeatureSpec(f"x{i}", "numeric") for i in range(8)) + tuple(
        FeatureSpec(f"c{i}", "categorical") for i in range(4)
    )
    metrics = (
        tuple(MetricSpec(f"p{i}", "proportion") for i in range(6))
        + tuple(MetricSpec(f"m{i}", "mean") for i in range(4))
        + tuple(
            MetricSpec(f"r{i}", "ratio", numerator=f"rn{i}", denominator=f"rd{i}") for i in range(3)
        )
    )
    return metrics, features  # 2 id columns + 12 features + 16 metric components = 30 columns


def build_table(n: int, seed: int = 0) -> pa.Table:
    rng = np.random.default_rng(seed)
    cols: dict[str, pa.Array] = {
        "unit_id": pa.array(np.char.add("u", np.arange(n).astype(str)).astype(object)),
        "arm": pa.array(np.asarray(ARMS, dtype=object)[rng.integers(0, 3, n)]),
    }
    for i in range(8):
        x = np.round(rng.normal(50, 15, n), 2)
        x[rng.random(n) < 0.02] = np.nan  # some missing feature values
        cols[f"x{i}"] = pa.array(x, from_pandas=True)
    for i in range(4):
        levels = np.asarray([f"level{k}" for k in range(3 + 2 * i)], dtype=object)
        cols[f"c{i}"] = pa.array(levels[rng.integers(0, len(levels), n)])
    for i in range(6):
        cols[f"p{i}"] = pa.array(rng.integers(0, 2, n))
    for i in range(4):
        cols[f"m{i}"] = pa.array(np.round(rng.gamma(2.0, 3.0, n), 3))
    for i in range(3):
        d = rng.poisson(4, n)
        cols[f"rn{i}"] = pa.array(np.round(d * rng.gamma(2.0, 1.5, n), 2))
        cols[f"rd{i}"] = pa.array(d)
    return pa.table(cols)


def _best(fn, repeat: int) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=1)
    args = ap.parse_args()
    metrics, features = _declaration()
    table = build_table(args.rows)
    sink = io.BytesIO()
    pacsv.write_csv(table, sink)
    csv_body = sink.getvalue()
    sink = io.BytesIO()
    pq.write_table(table, sink)
    parquet_body = sink.getvalue()

    def parse(body: bytes, ctype: str):
        return parse_units(
            body,
            ctype,
            arms=ARMS,
            control="control",
            design_shares=SHARES,
            metrics=metrics,
            features=features,
        )

    t_ref, _ = _best(lambda: pacsv.read_csv(pa.BufferReader(csv_body)), args.repeat)
    t_csv, parsed = _best(lambda: parse(csv_body, "text/csv"), args.repeat)
    t_pq, _ = _best(lambda: parse(parquet_body, "application/vnd.apache.parquet"), args.repeat)
    t_enc, blob = _best(lambda: encode_table(parsed.table), args.repeat)
    t_dec, _ = _best(lambda: decode_table(blob), args.repeat)
    assert parsed.n_rows == args.rows and len(table.column_names) == 30
    print(
        json.dumps(
            {
                "bench": "ingest_parse",
                "rows": args.rows,
                "columns": len(table.column_names),
                "cpus": os.cpu_count(),
                "csv_mb": round(len(csv_body) / 2**20, 1),
                "parquet_mb": round(len(parquet_body) / 2**20, 1),
                "blob_mb": round(len(blob) / 2**20, 1),
                "reference_csv_read_s": round(t_ref, 3),
                "parse_csv_s": round(t_csv, 3),
                "parse_parquet_s": round(t_pq, 3),
                "encode_s": round(t_enc, 3),
                "decode_s": round(t_dec, 3),
                "ratio_parse_csv": round(t_csv / t_ref, 2),
                "ratio_parse_parquet": round(t_pq / t_ref, 2),
                "ratio_encode": round(t_enc / t_ref, 2),
                "target_parse_csv_s": 5.0,
            }
        )
    )


if __name__ == "__main__":
    main()
