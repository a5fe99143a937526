"""Lookups over HTTP against a pure ASGI reference on the same server, plus in-process figures.

Starts `apportion serve --workers N` (uvicorn with httptools and uvloop, the project's keep-alive
and backlog) on a fresh SQLite store, makes keys with `apportion keys create`, and brings a plan
live through the API the way an analyst would: declare the invented scenario, upload a readout of
`--units` learners, fit a causal tree with `max_depth=8` (cv off, small `min_units_per_arm`, so
the tree reaches depth 8), draft, approve with an approver who is not the author, activate (this setup goes through the
client library, `apportion.client`, and its job waiter; the measured calls below are plain httpx
or wrk, so the figures are the server's, not the client's). Beside
it runs bench/serve_reference.py: a pure ASGI callable that reads the same body, parses it as JSON
and answers a constant object, served by the same uvicorn with the same settings and worker count.

For N in `--workers` (default 1 and 2), `wrk` (`--threads`, `--connections` keep-alive
connections, `--seconds` per run, after a warm-up) sends both servers the same `--members`
different assign bodies with the same header, in `--rounds` alternating reference / lookup pairs,
so drifting machine load (other work on a shared machine) hits both alike. Reported per N: medians
over rounds of requests/s, p50 and p99 latency, and the server's CPU per request (from /proc, all
processes of the server); `lookup_over_reference_rps` and `lookup_p99_over_reference_p99` are
medians of the per-round ratios; `lookup_rps_2_over_1` compares the two worker counts' lookup
medians. Then the 10,000-member `POST .../assign/batch` end to end (median of `--repeats`), and,
with the servers stopped, bench/serve_inprocess.py's `measure()` in this process (single lookup
median, 10k batch, the portable evaluator's rate and the compiled document's size).

Per worker count also: the 10,000-member batch on the lookup server and on the reference server
(which reads and parses the same body), alternately (`batch_lookup_over_reference`); wrk's own
CPU per request (from the children's rusage); and `two_worker_ceiling`, the most two workers can
give over one when wrk runs on the same cores: one worker keeps at most one core busy, so it
serves at most 1 / server_cpu requests a second, and two serve at most cores / (server_cpu +
wrk_cpu); the ratio of the two bounds is 2 * server_cpu / (server_cpu + wrk_cpu) on two cores.
`--wrk-cpu 0` pins wrk to CPU 0 (taskset), so it competes for one known core.

Prints ONE JSON line. Needs `wrk` on PATH (Debian package `wrk`). wrk and the servers share the
machine's cores, so the figures are for that shared setting; `loadavg_1m_before` says how busy
the machine already was.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import resource
import shutil
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
sys.path.insert(0, str(ROOT / "tests"))  # the server harness the tests use (tests/servers.py)

from servers import Server  # noqa: E402

from apportion.client import ApportionClient  # noqa: E402
from apportion.demo.scenario import (  # noqa: E402
    FEATURES,
    GUARDRAILS,
    SUCCESS,
    experiment_declaration,
    simulate,
    simulate_features,
    to_csv_bytes,
)
from apportion.stats.partition import Partition  # noqa: E402
from bench.serve_inprocess import measure as measure_inprocess  # noqa: E402

LUA = Path(__file__).with_name("serve_assign.lua")
PLAN = "lesson-length"


def _cli(env: dict[str, str], *args: str) -> str:
    exe = ROOT / ".venv" / "bin" / "apportion"
    out = subprocess.run(
        [str(exe), *args], env=env, capture_output=True, text=True, check=True, timeout=120
    )
    return out.stdout.strip().splitlines()[-1]


def _start_servers(env: dict[str, str], workers: int, tmp: Path) -> tuple[Server, Server]:
    """(lookup server, reference server), both with `workers` processes (tests/servers.py's
    harness, without the test settings)."""
    lookup = Server(
        env["APPORTION_DATABASE_URL"], tmp / f"serve-{workers}.log", env=env,
        args=["--workers", str(workers)], test_settings=False,
    ).launch()  # fmt: skip
    ref = Server(
        "", tmp / f"reference-{workers}.log", env=env, test_settings=False, ready_path="/",
        ready_status=None,
        command=[sys.executable, str(ROOT / "bench" / "serve_reference.py"), "--port", "{port}",
                 "--workers", str(workers)],
    ).launch()  # fmt: skip
    try:
        lookup.wait_ready(60)
        ref.wait_ready(60)
    except AssertionError:
        lookup.stop()
        ref.stop()
        raise
    return lookup, ref


def _ok(r: httpx.Response, *codes: int) -> dict[str, Any]:
    if r.status_code not in codes:
        raise RuntimeError(f"{r.request.method} {r.request.url} -> {r.status_code}: {r.text[:500]}")
    return r.json()


def live_plan(url: str, secrets: dict[str, str], units: int, seed: int) -> dict:
    """Declare, upload, fit a depth-8 causal tree, draft, approve, activate (through the client
    library, its waiter for the fit); returns facts."""
    decl = experiment_declaration()
    t0 = time.perf_counter()
    with ApportionClient(url, secrets["analyst"], timeout=600) as analyst:
        approver = analyst.with_key(secrets["approver"])
        analyst.create_experiment(decl)
        data = to_csv_bytes(simulate(units, seed=seed))
        readout, _ = analyst.upload_readout(decl["key"], data, "text/csv")
        params = {"max_depth": 8, "min_units_per_arm": 20, "cv_folds": 0, "seed": seed}
        fit = analyst.fit_model(decl["key"], readout_version=readout.version,
                                method="causal_tree", params=params)  # fmt: skip
        job = analyst.wait(fit.job_id, timeout=600)
        if job.status != "done":
            raise RuntimeError(f"fit failed: {job.error}")
        partition = Partition.from_dict(analyst.model(fit.model_id).partition or {})
        draft = {
            "model_id": fit.model_id,
            "success_metric": SUCCESS,
            "guardrails": GUARDRAILS,
            "method": "deterministic",
            "holdout": {"share": 0.1},
        }
        v = analyst.draft_plan(PLAN, draft)
        approver.approve(PLAN, v.version, "bench")
        approver.activate(PLAN, v.version, "bench", expected_revision=0)
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
    """User + system CPU time of a process and its children (uvicorn's worker processes; all
    threads) from /proc, in seconds."""
    total = 0.0
    todo = [pid]
    while todo:
        p = todo.pop()
        try:
            fields = Path(f"/proc/{p}/stat").read_text().rsplit(")", 1)[1].split()
            kids = Path(f"/proc/{p}/task/{p}/children").read_text().split()
        except OSError:
            continue
        total += (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
        todo += [int(k) for k in kids]
    return total


def run_wrk(
    url: str,
    auth: str,
    seconds: int,
    conns: int,
    body_file: Path | None,
    pid: int | None = None,
    threads: int = 1,
    wrk_cpu: str | None = None,
) -> dict[str, Any]:
    cmd = [
        "wrk",
        f"-t{threads}",
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
    if wrk_cpu is not None:  # pin the load generator, so it competes for one known core
        cmd = ["taskset", "-c", wrk_cpu, *cmd]
    cpu0 = _cpu_seconds(pid) if pid else 0.0
    kids0 = resource.getrusage(resource.RUSAGE_CHILDREN)
    out = subprocess.run(cmd, capture_output=True, text=True, check=True, timeout=seconds + 60)
    kids1 = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = _cpu_seconds(pid) - cpu0 if pid else float("nan")
    wrk_cpu_s = (kids1.ru_utime - kids0.ru_utime) + (kids1.ru_stime - kids0.ru_stime)
    m = re.search(r"^RESULT (\{.*\})$", out.stdout, re.M)
    if not m:
        raise RuntimeError(f"no RESULT line from wrk: {out.stdout}\n{out.stderr}")
    res = json.loads(m.group(1))
    res["server_cpu_us_per_request"] = cpu / max(res["requests"], 1) * 1e6
    res["wrk_cpu_us_per_request"] = wrk_cpu_s / max(res["requests"], 1) * 1e6
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


def alternate_batches(
    p_lookup: int, p_ref: int, h: dict[str, str], members: list[dict], repeats: int
) -> dict[str, Any]:
    """The 10,000-member batch end to end on the lookup server and, alternately, the same body
    on the reference server (which reads and parses it and answers a constant), so the ratio
    says what the lookup adds to what the HTTP stack and a JSON parse cost on this machine."""
    raw = json.dumps({"members": members}).encode()
    hdr = {**h, "content-type": "application/json"}
    times: dict[str, list[float]] = {"lookup": [], "reference": []}
    with (
        httpx.Client(base_url=f"http://127.0.0.1:{p_lookup}", timeout=600) as cl,
        httpx.Client(base_url=f"http://127.0.0.1:{p_ref}", timeout=600) as cr,
    ):
        for k in range(repeats + 1):
            for name, c in (("reference", cr), ("lookup", cl)):
                t0 = time.perf_counter()
                r = c.post(f"/v1/plans/{PLAN}/assign/batch", content=raw, headers=hdr)
                r.read()
                dt = (time.perf_counter() - t0) * 1e3
                if r.status_code != 200:
                    raise RuntimeError(f"{name} batch -> {r.status_code}: {r.text[:300]}")
                if k:  # the first pair warms up
                    times[name].append(dt)
    lk, rf = statistics.median(times["lookup"]), statistics.median(times["reference"])
    return {
        "batch_lookup_ms": round(lk, 2),
        "batch_reference_ms": round(rf, 2),
        "batch_lookup_over_reference": round(lk / rf, 2),
    }


def _live_everywhere(c: httpx.Client, h: dict[str, str], body: dict, tries: int = 40) -> None:
    """Wait until every worker process answers 200 (each loads the plan by polling)."""
    ok = 0
    for _ in range(tries * 10):
        r = c.post(f"/v1/plans/{PLAN}/assign", json=body, headers=h)
        ok = ok + 1 if r.status_code == 200 else 0
        if ok >= tries:
            return
        time.sleep(0.02)
    raise RuntimeError("the plan did not become live in every worker")


def compare(
    a: Any, workers: int, env: dict, keys: dict, bodies: Path, members: list, tmp: Path
) -> dict:
    """Alternating reference / lookup rounds on `workers` processes each."""
    lookup, ref = _start_servers(env, workers, tmp)
    p1, p2 = lookup.port, ref.port
    auth = keys["reader"]["Authorization"]
    try:
        with httpx.Client(base_url=f"http://127.0.0.1:{p1}", timeout=600) as c:
            _live_everywhere(c, keys["reader"], members[0])
        urls = {
            "lookup": (f"http://127.0.0.1:{p1}/v1/plans/{PLAN}/assign", lookup.pid),
            "reference": (f"http://127.0.0.1:{p2}/v1/plans/{PLAN}/assign", ref.pid),
        }
        for url, _ in urls.values():
            run_wrk(url, auth, a.warmup, a.connections, bodies, threads=a.threads)
        rounds = []
        for _ in range(a.rounds):
            r = run_wrk(*[urls["reference"][0], auth, a.seconds, a.connections, bodies],
                        urls["reference"][1], a.threads, a.wrk_cpu)  # fmt: skip
            s = run_wrk(*[urls["lookup"][0], auth, a.seconds, a.connections, bodies],
                        urls["lookup"][1], a.threads, a.wrk_cpu)  # fmt: skip
            for name, res in (("lookup", s), ("reference", r)):
                if res["non_2xx"] or res["socket_errors"]:
                    raise RuntimeError(f"{name} run had errors: {res}")
            rounds.append((s, r))
        batches = alternate_batches(p1, p2, keys["reader"], members[: a.batch], a.repeats)
    finally:
        lookup.stop()
        ref.stop()

    def med(which: int, key: str) -> float:
        return statistics.median(x[which][key] for x in rounds)

    return {
        "lookup_rps": round(med(0, "rps"), 1),
        "reference_rps": round(med(1, "rps"), 1),
        "lookup_over_reference_rps": round(
            statistics.median(s["rps"] / r["rps"] for s, r in rounds), 3
        ),
        "lookup_p50_ms": round(med(0, "p50_us") / 1e3, 3),
        "lookup_p99_ms": round(med(0, "p99_us") / 1e3, 3),
        "reference_p50_ms": round(med(1, "p50_us") / 1e3, 3),
        "reference_p99_ms": round(med(1, "p99_us") / 1e3, 3),
        "lookup_p99_over_reference_p99": round(
            statistics.median(s["p99_us"] / r["p99_us"] for s, r in rounds), 3
        ),
        "lookup_server_cpu_us": round(med(0, "server_cpu_us_per_request"), 1),
        "reference_server_cpu_us": round(med(1, "server_cpu_us_per_request"), 1),
        "wrk_cpu_us_per_lookup": round(med(0, "wrk_cpu_us_per_request"), 1),
        # the most a second worker can add when wrk shares the cores: one worker at best keeps
        # one core busy (1 / server_cpu per second); two keep every core busy with their own
        # work plus wrk's, (cores / (server_cpu + wrk_cpu)) per second
        "two_worker_ceiling": round(
            min(
                2.0,
                (os.cpu_count() or 1)
                * med(0, "server_cpu_us_per_request")
                / (med(0, "server_cpu_us_per_request") + med(0, "wrk_cpu_us_per_request")),
            ),
            2,
        ),  # fmt: skip
        **batches,
        "rounds_rps": [[round(s["rps"]), round(r["rps"])] for s, r in rounds],
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--units", type=int, default=200_000, help="readout size for the fit")
    ap.add_argument("--members", type=int, default=2000, help="distinct assign bodies cycled")
    ap.add_argument("--seconds", type=int, default=10, help="each measured wrk run")
    ap.add_argument("--rounds", type=int, default=3, help="reference/lookup pairs per N")
    ap.add_argument("--warmup", type=int, default=2)
    ap.add_argument("--connections", type=int, default=16)
    ap.add_argument("--threads", type=int, default=1, help="wrk threads")
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    ap.add_argument("--batch", type=int, default=10_000)
    ap.add_argument("--repeats", type=int, default=7, help="HTTP batch calls timed")
    ap.add_argument("--seed", type=int, default=3)
    ap.add_argument("--skip-inprocess", action="store_true")
    ap.add_argument("--wrk-cpu", default=None, help="pin wrk to these CPUs (taskset -c), e.g. 0")
    a = ap.parse_args()
    if shutil.which("wrk") is None:
        sys.exit("wrk is not on PATH (Debian: apt-get install wrk)")

    load_before = round(os.getloadavg()[0], 2)  # other work on the machine skews both sides
    tmp = Path(tempfile.mkdtemp(prefix="apportion-bench-serve-"))
    env = {
        **os.environ,
        "APPORTION_DATABASE_URL": f"sqlite:///{tmp}/apportion.db",
        "APPORTION_LOG_LEVEL": "WARNING",
        # lookups are measured, not drafting: no per-draft held-out job (approval would wait for it)
        "APPORTION_HELD_OUT_FOLDS": "0",
    }
    secrets = {
        role: _cli(env, "keys", "create", "--name", f"b-{role}", "--role", role)
        for role in ("analyst", "approver", "reader")
    }
    keys = {role: {"Authorization": f"Bearer {secret}"} for role, secret in secrets.items()}
    lookup, ref = _start_servers(env, 1, tmp)
    port = lookup.port
    ref.stop()
    result: dict[str, Any] = {"bench": "serve"}
    try:
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=600) as c:
            facts = live_plan(f"http://127.0.0.1:{port}", secrets, a.units, a.seed)
            members = member_bodies(max(a.members, a.batch), a.seed + 1)
            probe = _ok(
                c.post(f"/v1/plans/{PLAN}/assign", json=members[0], headers=keys["reader"]), 200
            )
            assert probe["plan_version"] == 1, probe
            batch = http_batch(c, keys["reader"], members[: a.batch], a.repeats)
    finally:
        lookup.stop()
    bodies = tmp / "bodies.jsonl"
    bodies.write_text("\n".join(json.dumps(m) for m in members[: a.members]) + "\n")
    per_workers = {str(n): compare(a, n, env, keys, bodies, members, tmp) for n in a.workers}
    result.update(
        {
            "partition_depth": facts["depth"],
            "partition_leaves": facts["leaves"],
            "partition_cohorts": facts["cohorts"],
            "readout_units": a.units,
            "load": f"wrk -t{a.threads} -c{a.connections} -d{a.seconds}s x {a.rounds} rounds"
            " alternating per worker count, 127.0.0.1, servers and wrk share the cores",
            "loadavg_1m_before": load_before,
            "cpus": os.cpu_count(),
            "workers": per_workers,
            "http_batch_members": a.batch,
            "http_batch_median_ms": round(batch["median_ms"], 2),
            "targets": {
                "lookup_over_reference_rps_min": 0.5,
                "lookup_p99_over_reference_p99_max": 2.0,
                "lookup_rps_2_over_1_min": 1.7,
                "inprocess_single_median_us_max": 5.0,
                "batch_10k_ms_max": 10.0,
                "http_batch_10k_ms_max": 40.0,
                "evaluator_lookups_per_s_min": 200_000,
                "document_kb_max": 100,
            },
        }
    )
    if "1" in per_workers and "2" in per_workers:
        result["lookup_rps_2_over_1"] = round(
            per_workers["2"]["lookup_rps"] / per_workers["1"]["lookup_rps"], 3
        )
        result["reference_rps_2_over_1"] = round(
            per_workers["2"]["reference_rps"] / per_workers["1"]["reference_rps"], 3
        )
    result["loadavg_1m_after"] = round(os.getloadavg()[0], 2)
    if not a.skip_inprocess:
        ip = measure_inprocess(batch=a.batch)
        result.update({f"inprocess_{k}": v for k, v in ip.items() if k != "bench"})
    shutil.rmtree(tmp, ignore_errors=True)
    print(json.dumps(result))


if __name__ == "__main__":
    main()
