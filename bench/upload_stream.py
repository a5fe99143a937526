"""Streaming upload of a 10,000,000-row, 30-column CSV readout over HTTP: time and server peak memory.

Writes the CSV to a temporary file one million rows at a time (the same columns and generator as
`bench/ingest.py`), starts `apportion serve` on a free 127.0.0.1 port with a temporary SQLite
store and blob store, and POSTs the file with httpx as a stream (the client never holds it
either). Prints ONE JSON line:

- `upload_s`: wall time of the POST, first byte sent to the parsed JSON answer;
- `server_peak_rss_mb`: the server process's peak resident memory (Linux VmHWM) after the upload;
- `ratio_memory_target` = server_peak_rss_mb / 1024 (the target: under 1 GB whatever the row count);
- `reference_stream_read_s`: a plain pyarrow streaming CSV read of the same file in this process
  after the server stopped (the floor any streamed CSV parse pays), and
  `ratio_reference` = upload_s / reference_stream_read_s;
- `gzip`: with `--gzip` the body is sent with Content-Encoding gzip (the server decodes it to disk).

    .venv/bin/python bench/upload_stream.py [--rows 10000000] [--gzip]
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import pyarrow.csv as pacsv

sys.path.insert(0, str(Path(__file__).resolve().parent))
import ingest as base  # noqa: E402  (the 30-column generator and the server helpers)

MEMORY_TARGET_MB = 1024.0
CHUNK_ROWS = 1_000_000


def write_csv(path: Path, rows: int, compress: bool) -> int:
    """The readout as CSV, a million rows at a time (unit ids stay unique across chunks)."""
    opener = gzip.open if compress else open
    with opener(path, "wb") as out:  # type: ignore[operator]
        done = 0
        while done < rows:
            n = min(CHUNK_ROWS, rows - done)
            table = base.build_table(n, seed=done)
            ids = [f"u{i}" for i in range(done, done + n)]
            table = table.set_column(0, "unit_id", base.pa.array(ids))
            opts = pacsv.WriteOptions(include_header=done == 0)
            pacsv.write_csv(table, out, write_options=opts)
            done += n
    return path.stat().st_size


def chunks(path: Path, size: int = 1 << 20):  # type: ignore[no-untyped-def]
    with path.open("rb") as f:
        while block := f.read(size):
            yield block


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--gzip", action="store_true", help="send with Content-Encoding gzip")
    args = ap.parse_args()

    tmp = Path(tempfile.mkdtemp(prefix="apportion-bench-stream-"))
    body = tmp / ("readout.csv.gz" if args.gzip else "readout.csv")
    t0 = time.perf_counter()
    size = write_csv(body, args.rows, args.gzip)
    generate_s = time.perf_counter() - t0
    decl = {**base.declaration(), "key": "bench-stream"}
    env = {
        **os.environ,
        "APPORTION_DATABASE_URL": f"sqlite:///{tmp}/bench.db",
        "APPORTION_BLOB_URI": str(tmp / "blobs"),
        "APPORTION_UPLOAD_DIR": str(tmp),
        "APPORTION_MAX_UPLOAD_BYTES": str(8 << 30),
        "APPORTION_LOG_LEVEL": "WARNING",
        "APPORTION_RUN_JOBS_IN_PROCESS": "false",
    }
    cmd = base.apportion_command()
    made = subprocess.run(
        [*cmd, "keys", "create", "--name", "bench", "--role", "analyst"],
        env=env,
        cwd=base.ROOT,
        capture_output=True,
        text=True,
        check=True,
    )
    secret = made.stdout.strip().splitlines()[-1]
    port = base.free_port()
    log_path = tmp / "server.log"
    with log_path.open("wb") as log:
        proc = subprocess.Popen(
            [*cmd, "serve", "--host", "127.0.0.1", "--port", str(port)],
            env=env,
            cwd=base.ROOT,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    headers = {"Authorization": f"Bearer {secret}"}
    try:
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", headers=headers) as client:
            base.wait_ready(client, proc)
            client.post("/v1/experiments", json=decl).raise_for_status()
            idle_mb = base.peak_rss_mb(proc.pid)
            sent = {"Content-Type": "text/csv", "Content-Length": str(size)}
            if args.gzip:
                sent["Content-Encoding"] = "gzip"
            t0 = time.perf_counter()
            r = client.post(
                f"/v1/experiments/{decl['key']}/readouts",
                content=chunks(body),
                headers=sent,
                timeout=httpx.Timeout(3600.0),
            )
            answer = r.json()
            upload_s = time.perf_counter() - t0
            if r.status_code != 201:
                raise RuntimeError(f"upload answered {r.status_code}: {str(answer)[:500]}")
            peak_mb = base.peak_rss_mb(proc.pid)
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    try:
        assert answer["n_rows"] == args.rows, answer["n_rows"]
        stored = sum(f.stat().st_size for f in (tmp / "blobs").rglob("*.parquet"))
        # the reference: a plain pyarrow streaming read of the same file, in this process
        t0 = time.perf_counter()
        for _ in pacsv.open_csv(str(body), read_options=pacsv.ReadOptions(block_size=8 << 20)):
            pass
        t_ref = time.perf_counter() - t0
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    print(
        json.dumps(
            {
                "bench": "upload_stream",
                "rows": args.rows,
                "columns": 30,
                "bytes_sent": size,
                "gzip": args.gzip,
                "cpus": os.cpu_count(),
                "load_1min": round(os.getloadavg()[0], 2),
                "generate_s": round(generate_s, 1),
                "upload_s": round(upload_s, 2),
                "server_idle_rss_mb": idle_mb,
                "server_peak_rss_mb": peak_mb,
                "memory_target_mb": MEMORY_TARGET_MB,
                "ratio_memory_target": round((peak_mb or 0) / MEMORY_TARGET_MB, 3),
                "stored_parquet_mb": round(stored / 2**20, 1),
                "reference_stream_read_s": round(t_ref, 2),
                "ratio_reference": round(upload_s / t_ref, 2),
            }
        )
    )


if __name__ == "__main__":
    main()
