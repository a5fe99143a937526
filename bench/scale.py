"""Fits of large readouts per engine: time, process peak memory, growth of time in rows.

Generates readouts of the given sizes (20 features: 14 numeric, 6 categorical; 4 arms; 4 metrics:
two means, a proportion and a ratio) as Parquet files of row groups of 1,000,000 rows, then fits
a causal tree (depth 8, no cross-validation) on each with each engine, every fit in its own
process so its peak resident memory (ru_maxrss) is its own. Prints one JSON line: per engine and
size the fit seconds and peak MB, per engine the growth exponent of time in rows (the slope of
log time on log rows), and Spark's time as a multiple of DuckDB's at each size.

    .venv/bin/python bench/scale.py --rows 1e6,1e7,5e7 --engines duckdb,spark
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

ARMS = ("control", "short", "medium", "long")
SHARES = (0.25, 0.25, 0.25, 0.25)
N_NUM, N_CAT = 14, 6
LEVELS = ("north", "south", "east", "west", "centre")
CHUNK = 1_000_000
FILE_ROWS = 10_000_000


def specs():
    from apportion.stats.table import FeatureSpec, MetricSpec

    feats = tuple(FeatureSpec(f"x{i}", "numeric") for i in range(N_NUM)) + tuple(
        FeatureSpec(f"g{i}", "categorical") for i in range(N_CAT)
    )
    metrics = (
        MetricSpec("minutes", "mean"),
        MetricSpec("spend", "mean"),
        MetricSpec("retained", "proportion"),
        MetricSpec("pages_per_visit", "ratio", numerator="pages", denominator="visits"),
    )
    return feats, metrics


def chunk(rng: np.random.Generator, start: int, n: int) -> pa.Table:
    """Invented units: the arms' effects depend on x0, x1 and g0 (so the tree has splits to find);
    numeric features take 1,000 distinct values each (as many real features do), so the files
    stay a few bytes per value."""
    arm = rng.integers(0, 4, n)
    cols: dict[str, pa.Array] = {
        "unit_id": pa.array(np.char.add("u", np.arange(start, start + n).astype(str))),
        "arm": pa.array(np.asarray(ARMS, dtype=object)[arm]),
    }
    x = np.round(rng.random((N_NUM, n)), 3)
    for i in range(N_NUM):
        cols[f"x{i}"] = pa.array(x[i])
    g = rng.integers(0, len(LEVELS), (N_CAT, n))
    for i in range(N_CAT):
        cols[f"g{i}"] = pa.array(np.asarray(LEVELS, dtype=object)[g[i]]).dictionary_encode()
    lift = np.array([0.0, 0.3, 0.1, -0.2])[arm] * (x[0] > 0.5) + 0.2 * (arm == 2) * (g[0] < 2)
    cols["minutes"] = pa.array(10 + lift * 3 + rng.normal(0, 3, n))
    cols["spend"] = pa.array(np.maximum(0, 5 + lift + rng.normal(0, 2, n)))
    cols["retained"] = pa.array((rng.random(n) < 0.6 + 0.05 * lift * (x[1] > 0.3)).astype(float))
    visits = rng.poisson(3, n) + 1.0
    cols["visits"] = pa.array(visits)
    cols["pages"] = pa.array(visits * (2 + 0.2 * lift) + rng.normal(0, 1, n))
    return pa.table(cols)


def generate(directory: Path, rows: int, seed: int = 0) -> None:
    directory.mkdir(parents=True, exist_ok=True)
    done = directory / "_complete"
    if done.exists():
        return
    rng = np.random.default_rng(seed)
    written = 0
    while written < rows:
        path = directory / f"part-{written // FILE_ROWS:04d}.parquet"
        writer = None
        for start in range(written, min(rows, written + FILE_ROWS), CHUNK):
            t = chunk(rng, start, min(CHUNK, rows - start))
            writer = writer or pq.ParquetWriter(path, t.schema)
            writer.write_table(t)
        assert writer is not None
        writer.close()
        written = min(rows, written + FILE_ROWS)
    done.write_text(str(rows))


def fit_once(directory: str, engine: str, memory_limit: str) -> dict:
    """Run in a child process: open the dataset, fit, report seconds and peak memory."""
    import resource

    from apportion.engines.dataset import ReadoutDataset
    from apportion.stats.pushdown import fit_on_engine

    feats, metrics = specs()
    ds = ReadoutDataset.open(directory, arm_keys=ARMS, design_shares=SHARES, features=feats,
                             metrics=metrics)  # fmt: skip
    params = {"max_depth": 8, "cv_folds": 0}
    t0 = time.perf_counter()
    if engine == "memory":
        from apportion.engines.memory import read_table
        from apportion.stats.models import fit_cohort_model

        fit = fit_cohort_model(read_table(ds), "causal_tree", params)
    else:
        from apportion.engines import open_engine

        with open_engine(ds, engine, memory_limit=memory_limit) as eng:
            fit = fit_on_engine(eng, "causal_tree", params)
    seconds = time.perf_counter() - t0
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {"seconds": round(seconds, 2), "peak_mb": round(peak_mb, 1),
            "leaves": fit.diagnostics["n_leaves"]}  # fmt: skip


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", default="1e6,1e7,5e7")
    ap.add_argument("--engines", default="duckdb,spark")
    ap.add_argument("--dir", default="var/bench-scale")
    ap.add_argument("--memory-limit", default="1GB", help="DuckDB's memory limit")
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(fit_once(*args.child[:2], args.child[2])))
        return
    sizes = [int(float(r)) for r in args.rows.split(",")]
    engines = args.engines.split(",")
    out: dict = {"bench": "scale", "rows": sizes, "fits": {}, "load": os.getloadavg()[0]}
    for n in sizes:
        d = Path(args.dir) / f"rows-{n}"
        t0 = time.perf_counter()
        generate(d, n)
        out.setdefault("generate_seconds", {})[str(n)] = round(time.perf_counter() - t0, 1)
        for e in engines:
            r = subprocess.run([sys.executable, __file__, "--child", str(d), e, args.memory_limit],
                               capture_output=True, text=True)  # fmt: skip
            if r.returncode != 0:
                out["fits"].setdefault(e, {})[str(n)] = {"error": r.stderr.strip()[-400:]}
            else:
                out["fits"].setdefault(e, {})[str(n)] = json.loads(
                    r.stdout.strip().splitlines()[-1]
                )
            print(f"# {e} {n}: {out['fits'][e][str(n)]}", file=sys.stderr, flush=True)
    out["growth_exponent"] = {}
    for e, by_n in out["fits"].items():
        pts = [(int(k), v["seconds"]) for k, v in by_n.items() if "seconds" in v]
        if len(pts) >= 2:
            x, y = np.log([p[0] for p in pts]), np.log([p[1] for p in pts])
            out["growth_exponent"][e] = round(float(np.polyfit(x, y, 1)[0]), 3)
    if "duckdb" in out["fits"] and "spark" in out["fits"]:
        out["spark_over_duckdb"] = {
            k: round(v["seconds"] / out["fits"]["duckdb"][k]["seconds"], 2)
            for k, v in out["fits"]["spark"].items()
            if "seconds" in v and "seconds" in out["fits"]["duckdb"].get(k, {})
        }
    out["load_after"] = os.getloadavg()[0]
    print(json.dumps(out))


if __name__ == "__main__":
    main()
