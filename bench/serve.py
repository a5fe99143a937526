"""Assignment over HTTP against the bare route, plus in-process lookups and batches.

Starts one `apportion serve` process (uvicorn, one worker) on 127.0.0.1 with a fresh SQLite store,
makes keys with `apportion keys create`, and brings a plan live through the API the way an analyst
would: declare the invented scenario, upload a readout of `--units` learners, fit a causal tree with
`max_depth=8` (cv off, small `min_units_per_arm`, so the tree reaches depth 8), draft, approve with
an approver who is not the author, activate. Then, with the load generator `wrk` (1 thread,
`--connections` keep-alive connections, `--seconds` each, after a short warm-up):

- `POST /v1/plans/{plan}/assign`, cycling through `--members` different learners' bodies;
- `POST /v1/bare` with the same bodies and header, a constant answer through the same app and
  middleware that does no lookup: the reference.

Both routes hit the same process with the same settings, in `--rounds` alternating bare/assign
pairs (machine load drifts; the medians over rounds are reported, the ratios are medians of the
per-round ratios), so `assign_over_bare_rps` and `assign_p99_over_bare_p99` say what the lookup
costs on top of the HTTP stack. `*_server_cpu_us` is the server's CPU time (/proc, all threads)
per request during the run: less sensitive to other work on the machine than requests/s.
`loadavg_1m_before` records how busy the machine already was. Then the 10,000-member
`POST .../assign/batch` end to end (median of `--repeats`, body pre-encoded; the time is send +
full response received), then, with the server stopped, bench/serve_inprocess.py's `measure()`
(single assign median, 10k batch on its random depth-8 tree) in this process.

Prints ONE JSON line. Needs `wrk` on PATH (Debian package `wrk`); the server and wrk share the
machine's cores, so the figures are for that shared setting. `--profile DIR` also records the
server with py-spy (wall time; if installed) during one extra run of each route and writes
collapsed stacks DIR/serve_bare.collapsed and DIR/serve_assign.collapsed.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # run as a script from anywhere

from bench.serve_inprocess import measure as measure_inprocess  # noqa: E402
from service.demo.scenario import (  # noqa: E402
    FEATURES,
    GUARDRAILS,
    SUCCESS,
    experiment_declaration,
    simulate,
    simulate_features,
    to_csv_bytes,
)
from service.stats.partition import Partition  # noqa: E402

LUA = Path(__file__).with_name("serve_assign.lua")
PLAN = "lesson-length"


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _cli(env: dict[str, str], *args: str) -> str:
    exe = ROOT / ".venv" / "bin" / "apportion"
    out = subprocess.run(
        [str(exe), *args], env=env, capture_output=True, text=True, check=True, timeout=120
    )
    return out.stdout.strip().splitlines()[-1]


def _start_server(env: dict[str, str], port: int, log: Path) -> subprocess.Popen:
    exe = ROOT / ".venv" / "bin" / "apportion"
    with log.open("wb") as fh:
        proc = subprocess.Popen(
            [str(exe), "serve", "--host", "127.0.0.1", "--port", str(port)],
            env=env,
            stdout=fh,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise RuntimeError(f"server exited with {proc.returncode}: {log.read_text()[-2000:]}")
        try:
            if httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1).status_code == 200:
                return proc
        except httpx.HTTPError:
            pass
        time.sleep(0.2)
    proc.terminate()
    raise RuntimeError("server did not become ready in 60 s")


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def _ok(r: httpx.Response, *codes: int) -> dict[str, Any]:
    if r.status_code not in codes:
        raise RuntimeError(f"{r.request.method} {r.request.url} -> {r.status_code}: {r.text[:500]}")
    return r.json()


def _wait_job(c: httpx.Client, h: dict[str, str], url: str, timeout: float = 600) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        job = _ok(c.get(url, headers=h), 200)
        if job["status"] in ("done", "failed"):
            return job
        time.sleep(0.2)
    raise RuntimeError(f"job {url} did not finish in {timeout} s")


def live_plan(c: httpx.Client, keys: dict[str, dict[str, str]], units: int, seed: int) -> dict:
    """Declare, upload, fit a depth-8 causal tree, draft, approve, activate; returns facts."""
    decl = experiment_declaration()
    t0 = time.perf_counter()
    _ok(c.post("/v1/experiments", json=decl, headers=keys["analyst"]), 201)
    r = c.post(
        f"/v1/experiments/{decl['key']}/readouts",
        content=to_csv_bytes(simulate(units, seed=seed)),
        headers={**keys["analyst"], "content-type": "text/csv"},
    )
    version = _ok(r, 200, 201)["version"]
    params = {"max_depth": 8, "min_units_per_arm": 20, "cv_folds": 0, "seed": seed}
    body = {"readout_version": version, "method": "causal_tree", "params": params}
    fit = _ok(
        c.post(f"/v1/experiments/{decl['key']}/models", json=body, headers=keys["analyst"]), 202
    )
    job = _wait_job(c, keys["reader"], fit["job"])
    if job["status"] != "done":
        raise RuntimeError(f"fit failed: {job}")
    model = _ok(c.get(f"/v1/models/{fit['model_id']}", headers=keys["reader"]), 200)
    partition = Partition.from_dict(model["partition"])
    draft = {
        "model_id": fit["model_id"],
        "success_metric": SUCCESS,
        "guardrails": GUARDRAILS,
        "method": "deterministic",
        "holdout": {"share": 0.1},
    }
    v = _ok(c.post(f"/v1/plans/{PLAN}/versions", json=draft, headers=keys["analyst"]), 201)
    path = f"/v1/plans/{PLAN}/versions/{v['version']}/approve"
    _ok(c.post(path, json={"reason": "bench"}, headers=keys["approver"]), 200)
    act = {"version": v["version"], "reason": "bench", "expected_revision": 0}
    _ok(c.post(f"/v1/plans/{PLAN}/activate", json=act, headers=keys["approver"]), 200)
    return {
        "depth": partition.depth(),
        "leaves": len(partition.leaves()),
        "cohorts": partition.n_cohorts,
        "setup_s": round(time.perf_counter() - t0, 1),
    }


def member_bodies(n: int, seed: int) -> list[dict[str, Any]]:
    """`n` learners as JSON would deliver them (missing values left out)."""
    ids, values = simulate_features(n, seed=seed)
    out = []
    for i in range(n):
        feats: dict[str, Any] = {}
        for f in FEATURES:
            x = values[f.key][i]
            if f.kind == "numeric":
                if not np.isnan(x):
                    feats[f.key] = float(x)
            elif x >= 0:
                feats[f.key] = f.levels[int(x)]
        out.append({"member_id": f"m-{ids[i]}", "features": feats})
    return out


def _cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process (all threads) from /proc, in seconds."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def run_wrk(
    url: str, auth: str, seconds: int, conns: int, body_file: Path | None, pid: int | None = None
) -> dict[str, Any]:
    cmd = [
        "wrk",
        "-t1",
        f"-c{conns}",
        f"-d{seconds}s",
        "--timeout",
        "5s",
        "-H",
        f"Authorization: {auth}",
        "-s",
        str(LUA),
        url,
    ]
    if body_file is not None:
        cmd += ["--", str(body_file)]
    cpu0 = _cpu_seconds(pid) if pid else 0.0
    out = subprocess.run(cmd, capture_output=True, text=True, check=True, timeout=seconds + 60)
    cpu = _cpu_seconds(pid) - cpu0 if pid else float("nan")
    m = re.search(r"^RESULT (\{.*\})$", out.stdout, re.M)
    if not m:
        raise RuntimeError(f"no RESULT line from wrk: {out.stdout}\n{out.stderr}")
    res = json.loads(m.group(1))
    res["server_cpu_us_per_request"] = cpu / max(res["requests"], 1) * 1e6
    return res


def http_batch(c: httpx.Client, h: dict[str, str], members: list[dict], repeats: int) -> dict:
    raw = json.dumps({"members": members}).encode()
    hdr = {**h, "content-type": "application/json"}
    times = []
    for k in range(repeats + 1):
        t0 = time.perf_counter()
        r = c.post(f"/v1/plans/{PLAN}/assign/batch", content=raw, headers=hdr)
        r.read()
        dt = (time.perf_counter() - t0) * 1e3
        if r.status_code != 200 or len(r.json()["assignments"]) != len(members):
            raise RuntimeError(f"batch -> {r.status_code}: {r.text[:300]}")
        if k:  # the first call warms up
            times.append(dt)
    return {"median_ms": statistics.median(times), "min_ms": min(times)}


def profile_runs(
    pid: int, out_dir: Path, runs: dict[str, tuple[str, Path | None]], auth: str, a: Any
) -> dict[str, Any] | None:
    """py-spy the server (wall time, 200 Hz, native frames off) during one extra wrk run per
    route; collapsed stacks go to DIR/serve_<route>.collapsed. Returns requests and samples."""
    spy = shutil.which("py-spy") or str(ROOT / ".venv" / "bin" / "py-spy")
    if not Path(spy).exists():
        return None
    out_dir.mkdir(parents=True, exist_ok=True)
    out: dict[str, Any] = {}
    for name, (url, bodies) in runs.items():
        dest = out_dir / f"serve_{name}.collapsed"
        rec = subprocess.Popen(
            [
                spy,
                "record",
                "-p",
                str(pid),
                "-d",
                str(a.seconds),
                "-r",
                "200",
                "-f",
                "raw",
                "-o",
                str(dest),
                "--nonblocking",
            ],  # fmt: skip
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        time.sleep(0.5)
        r = run_wrk(url, auth, a.seconds - 1, a.connections, bodies, pid)
        rec.wait(timeout=a.seconds + 60)
        samples = sum(int(line.rsplit(" ", 1)[1]) for line in dest.read_text().splitlines())
        out[name] = {"file": str(dest), "requests": r["requests"], "samples": samples}
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=200_000, help="readout size for the fit")
    ap.add_argument("--members", type=int, default=2000, help="distinct assign bodies cycled")
    ap.add_argument("--seconds", type=int, default=10, help="each measured wrk run")
    ap.add_argument("--rounds", type=int, default=3, help="bare/assign pairs; medians reported")
    ap.add_argument("--warmup", type=int, default=2)
    ap.add_argument("--connections", type=int, default=8)
    ap.add_argument("--batch", type=int, default=10_000)
    ap.add_argument("--repeats", type=int, default=7, help="HTTP batch calls timed")
    ap.add_argument("--seed", type=int, default=3)
    ap.add_argument("--profile", type=Path, default=None, help="py-spy the server into DIR")
    ap.add_argument("--skip-inprocess", action="store_true")
    a = ap.parse_args()
    if shutil.which("wrk") is None:
        sys.exit("wrk is not on PATH (Debian: apt-get install wrk)")

    load_before = round(os.getloadavg()[0], 2)  # other work on the machine skews both routes
    tmp = Path(tempfile.mkdtemp(prefix="apportion-bench-serve-"))
    env = {
        **os.environ,
        "APPORTION_DATABASE_URL": f"sqlite:///{tmp}/apportion.db",
        "APPORTION_LOG_LEVEL": "WARNING",
    }
    keys = {
        role: {
            "Authorization": f"Bearer {_cli(env, 'keys', 'create', '--name', f'b-{role}', '--role', r)}"
        }
        for role, r in (("analyst", "analyst"), ("approver", "approver"), ("reader", "reader"))
    }
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    server = _start_server(env, port, tmp / "server.log")
    result: dict[str, Any] = {"bench": "serve"}
    try:
        with httpx.Client(base_url=base, timeout=600) as c:
            facts = live_plan(c, keys, a.units, a.seed)
            members = member_bodies(max(a.members, a.batch), a.seed + 1)
            probe = _ok(
                c.post(f"/v1/plans/{PLAN}/assign", json=members[0], headers=keys["reader"]), 200
            )
            assert probe["plan_version"] == 1, probe
            bodies = tmp / "bodies.jsonl"
            bodies.write_text("\n".join(json.dumps(m) for m in members[: a.members]) + "\n")
            auth = keys["reader"]["Authorization"]
            assign_url = f"{base}/v1/plans/{PLAN}/assign"
            bare_url = f"{base}/v1/bare"
            # warm both, then measure alternately bare / assign
            run_wrk(bare_url, auth, a.warmup, a.connections, bodies)
            run_wrk(assign_url, auth, a.warmup, a.connections, bodies)
            rounds = []
            for _ in range(a.rounds):  # alternate, so drifting machine load hits both alike
                b = run_wrk(bare_url, auth, a.seconds, a.connections, bodies, server.pid)
                s = run_wrk(assign_url, auth, a.seconds, a.connections, bodies, server.pid)
                rounds.append((s, b))
            batch = http_batch(c, keys["reader"], members[: a.batch], a.repeats)
            prof = None
            if a.profile is not None:
                runs = {"bare": (bare_url, bodies), "assign": (assign_url, bodies)}
                prof = profile_runs(server.pid, a.profile, runs, auth, a)
    finally:
        _stop(server)
    for s, b in rounds:
        for name, r in (("assign", s), ("bare", b)):
            if r["non_2xx"] or r["socket_errors"]:
                raise RuntimeError(f"{name} run had errors: {r}")

    def med(which: int, key: str) -> float:
        return statistics.median(r[which][key] for r in rounds)

    rps_ratio = statistics.median(s["rps"] / b["rps"] for s, b in rounds)
    p99_ratio = statistics.median(s["p99_us"] / b["p99_us"] for s, b in rounds)
    result.update(
        {
            "partition_depth": facts["depth"],
            "partition_leaves": facts["leaves"],
            "partition_cohorts": facts["cohorts"],
            "readout_units": a.units,
            "load": f"wrk -t1 -c{a.connections} -d{a.seconds}s x {a.rounds} rounds alternating,"
            " 127.0.0.1, server and wrk share the cores",
            "loadavg_1m_before": load_before,
            "assign_rps": round(med(0, "rps"), 1),
            "assign_p50_ms": round(med(0, "p50_us") / 1e3, 3),
            "assign_p99_ms": round(med(0, "p99_us") / 1e3, 3),
            "bare_rps": round(med(1, "rps"), 1),
            "bare_p50_ms": round(med(1, "p50_us") / 1e3, 3),
            "bare_p99_ms": round(med(1, "p99_us") / 1e3, 3),
            "assign_server_cpu_us": round(med(0, "server_cpu_us_per_request"), 1),
            "bare_server_cpu_us": round(med(1, "server_cpu_us_per_request"), 1),
            "bare_over_assign_server_cpu": round(
                med(1, "server_cpu_us_per_request") / med(0, "server_cpu_us_per_request"), 3
            ),
            "assign_over_bare_rps": round(rps_ratio, 3),
            "assign_p99_over_bare_p99": round(p99_ratio, 3),
            "rounds_rps": [[round(s["rps"]), round(b["rps"])] for s, b in rounds],
            "http_batch_members": a.batch,
            "http_batch_median_ms": round(batch["median_ms"], 2),
            "targets": {
                "assign_over_bare_rps_min": 0.8,
                "assign_p99_over_bare_p99_max": 2.0,
                "inprocess_single_median_us_max": 10.0,
                "batch_10k_ms_max": 20.0,
            },
        }
    )
    if prof:
        result["profile"] = prof
    if not a.skip_inprocess:
        ip = measure_inprocess(batch=a.batch)
        result.update(
            {
                "inprocess_depth": ip["depth"],
                "inprocess_single_median_us": ip["single_median_us"],
                "inprocess_single_p99_us": ip["single_p99_us"],
                "inprocess_batch_10k_ms": ip["batch_median_ms"],
                "inprocess_batch_columns_10k_ms": ip["batch_columns_median_ms"],
            }
        )
    shutil.rmtree(tmp, ignore_errors=True)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
