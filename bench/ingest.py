"""Upload a 1,000,000-row, 30-column CSV readout to the real server, end to end over HTTP.

Starts `apportion serve` as a subprocess on a free 127.0.0.1 port with a temporary SQLite store,
creates an analyst key with `apportion keys create`, declares an experiment, POSTs the CSV with
httpx and prints ONE JSON line:

- `upload_s`: wall time of the POST from the first byte sent to the parsed JSON answer;
- `server_upload_s`: the server's own time for that request (the delta of the
  `apportion_http_request_seconds` histogram sum on /metrics for the readouts route);
- `reference_parse_s`: `parse_units` on the same bytes in this process after the server stopped
  (the reference run in the same process), and `reference_csv_read_s`, a plain pyarrow CSV read
  (the floor any CSV parser here pays);
- `ratio_target` = upload_s / 20 s (the target: upload end to end under 20 s on two cores),
  `ratio_parse` = upload_s / reference_parse_s.

    .venv/bin/python bench/ingest.py [--rows 1000000] [--keep-server-log] [--py-spy OUT.svg|OUT.txt]

`--py-spy` runs the server under `py-spy record` (install py-spy into the venv for profiling only;
it is not a project dependency); OUT.txt gives collapsed stacks instead of a flame graph.
"""

from __future__ import annotations

import argparse
import io
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # run from a checkout, not installed

TARGET_S = 20.0
ROUTE = "/v1/experiments/{key}/readouts"
ARMS = [("control", 0.34), ("short", 0.33), ("long", 0.33)]
N_NUMERIC, N_CATEGORICAL = 12, 8
METRICS = [
    {"key": "spend", "kind": "mean", "direction": "higher"},
    {"key": "sessions", "kind": "mean", "direction": "higher"},
    {"key": "minutes", "kind": "mean", "direction": "higher"},
    {"key": "converted", "kind": "proportion", "direction": "higher"},
    {"key": "refunded", "kind": "proportion", "direction": "lower"},
    {"key": "churned", "kind": "proportion", "direction": "lower"},
    {
        "key": "pages_per_visit",
        "kind": "ratio",
        "direction": "higher",
        "numerator": "pages",
        "denominator": "visits",
    },
]


def declaration() -> dict:
    features = [{"key": f"x{i}", "kind": "numeric"} for i in range(N_NUMERIC)] + [
        {"key": f"c{i}", "kind": "categorical"} for i in range(N_CATEGORICAL)
    ]
    return {
        "key": "bench-ingest",
        "name": "Ingest benchmark",
        "arms": [{"key": k, "share": s} for k, s in ARMS],
        "control": "control",
        "metrics": METRICS,
        "features": features,
    }  # 2 id columns + 20 features + 8 metric columns (ratio: 2) = 30 columns


def build_table(n: int, seed: int = 0) -> pa.Table:
    rng = np.random.default_rng(seed)
    arm_keys = np.asarray([k for k, _ in ARMS], dtype=object)
    cols: dict[str, pa.Array] = {
        "unit_id": pa.array(np.char.add("u", np.arange(n).astype(str)).astype(object)),
        "arm": pa.array(arm_keys[rng.choice(3, n, p=[s for _, s in ARMS])]),
    }
    for i in range(N_NUMERIC):
        x = np.round(rng.normal(50, 15, n), 2)
        x[rng.random(n) < 0.02] = np.nan  # some missing feature values (empty CSV fields)
        cols[f"x{i}"] = pa.array(x, from_pandas=True)
    for i in range(N_CATEGORICAL):
        levels = np.asarray([f"level{k}" for k in range(3 + i)], dtype=object)
        cols[f"c{i}"] = pa.array(levels[rng.integers(0, len(levels), n)])
    cols["spend"] = pa.array(np.round(rng.gamma(2.0, 12.0, n), 2))
    cols["sessions"] = pa.array(rng.poisson(6, n))
    cols["minutes"] = pa.array(np.round(rng.gamma(3.0, 4.0, n), 1))
    for name, p in (("converted", 0.12), ("refunded", 0.03), ("churned", 0.2)):
        cols[name] = pa.array((rng.random(n) < p).astype(np.int64))
    visits = rng.poisson(4, n) + 1
    cols["pages"] = pa.array(rng.binomial(visits * 5, 0.6))
    cols["visits"] = pa.array(visits)
    return pa.table(cols)


def apportion_command() -> list[str]:
    exe = ROOT / ".venv" / "bin" / "apportion"
    if exe.exists():
        return [str(exe)]
    # the project is not pip-installed in the venv: run the same entry point as a module
    entry = "import sys; from apportion.cli import main; sys.exit(main())"
    return [str(ROOT / ".venv" / "bin" / "python"), "-c", entry]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def upload_seconds_sum(client: httpx.Client) -> float:
    """Sum of the server's request-latency histogram for the readouts route (0 before any)."""
    text = client.get("/metrics").text
    pattern = re.compile(
        r'^apportion_http_request_seconds_sum\{route="' + re.escape(ROUTE) + r'"\} (\S+)$', re.M
    )
    m = pattern.search(text)
    return float(m.group(1)) if m else 0.0


def peak_rss_mb(pid: int) -> float | None:
    """The server's peak resident memory so far (Linux VmHWM), to size container limits."""
    try:
        status = Path(f"/proc/{pid}/status").read_text()
    except OSError:
        return None
    m = re.search(r"^VmHWM:\s+(\d+) kB", status, re.M)
    return round(int(m.group(1)) / 1024, 1) if m else None


def wait_ready(client: httpx.Client, proc: subprocess.Popen, timeout: float = 60.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"the server exited with code {proc.returncode}")
        try:
            if client.get("/readyz").status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    raise RuntimeError(f"the server was not ready within {timeout} s")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--keep-server-log", action="store_true")
    ap.add_argument("--py-spy", metavar="OUT", help="profile the server with py-spy into OUT")
    args = ap.parse_args()

    decl = declaration()
    table = build_table(args.rows)
    sink = io.BytesIO()
    pacsv.write_csv(table, sink)
    body = sink.getvalue()
    del sink

    tmp = Path(tempfile.mkdtemp(prefix="apportion-bench-"))
    env = {
        **os.environ,
        "APPORTION_DATABASE_URL": f"sqlite:///{tmp}/bench.db",
        "APPORTION_LOG_LEVEL": "WARNING",
        "APPORTION_RUN_JOBS_IN_PROCESS": "false",
    }
    cmd = apportion_command()
    made = subprocess.run(
        [*cmd, "keys", "create", "--name", "bench", "--role", "analyst"],
        env=env,
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=True,
    )
    secret = made.stdout.strip().splitlines()[-1]
    port = free_port()
    serve = [*cmd, "serve", "--host", "127.0.0.1", "--port", str(port)]
    if args.py_spy:
        spy = ROOT / ".venv" / "bin" / "py-spy"
        fmt = "raw" if args.py_spy.endswith(".txt") else "flamegraph"  # raw: collapsed stacks
        serve = [
            str(spy),
            "record",
            "--idle",
            "--rate",
            "50",
            "--format",
            fmt,
            "-o",
            args.py_spy,
            "--",
        ]
        serve += [*cmd, "serve", "--host", "127.0.0.1", "--port", str(port)]
    log_path = tmp / "server.log"
    with log_path.open("wb") as log:
        proc = subprocess.Popen(serve, env=env, cwd=ROOT, stdout=log, stderr=subprocess.STDOUT)
    headers = {"Authorization": f"Bearer {secret}"}
    try:
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", headers=headers) as client:
            wait_ready(client, proc)
            r = client.post("/v1/experiments", json=decl)
            r.raise_for_status()
            before = upload_seconds_sum(client)
            t0 = time.perf_counter()
            r = client.post(
                f"/v1/experiments/{decl['key']}/readouts",
                content=body,
                headers={"Content-Type": "text/csv"},
                timeout=httpx.Timeout(900.0),
            )
            answer = r.json()
            upload_s = time.perf_counter() - t0
            if r.status_code != 201:
                raise RuntimeError(f"upload answered {r.status_code}: {str(answer)[:500]}")
            server_s = upload_seconds_sum(client) - before
            peak_mb = peak_rss_mb(proc.pid) if not args.py_spy else None
    finally:
        proc.send_signal(signal.SIGINT)  # py-spy writes its profile when the child ends
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        if not args.keep_server_log:
            shutil.rmtree(tmp, ignore_errors=True)
    assert answer["n_rows"] == args.rows, answer["n_rows"]

    # the reference runs in this process, after the server has stopped (two cores only)
    from apportion.ingest import parse_units
    from apportion.usecases.experiments import specs_of

    specs = specs_of(decl)
    t0 = time.perf_counter()
    pacsv.read_csv(pa.BufferReader(body))
    t_csv = time.perf_counter() - t0
    t0 = time.perf_counter()
    parse_units(
        body,
        "text/csv",
        arms=specs.arm_keys,
        control=specs.arm_keys[0],
        design_shares=list(specs.design_shares),
        metrics=specs.metrics,
        features=specs.features,
    )
    t_parse = time.perf_counter() - t0
    print(
        json.dumps(
            {
                "bench": "ingest",
                "rows": args.rows,
                "columns": table.num_columns,
                "bytes": len(body),
                "cpus": os.cpu_count(),
                "upload_s": round(upload_s, 3),
                "server_upload_s": round(server_s, 3),
                "upload_minus_server_s": round(upload_s - server_s, 3),  # two clocks: may be < 0
                "server_peak_rss_mb": peak_mb,
                "reference_parse_s": round(t_parse, 3),
                "reference_csv_read_s": round(t_csv, 3),
                "target_s": TARGET_S,
                "ratio_target": round(upload_s / TARGET_S, 3),
                "ratio_parse": round(upload_s / t_parse, 2),
                "server_log": str(log_path) if args.keep_server_log else None,
            }
        )
    )


if __name__ == "__main__":
    main()
