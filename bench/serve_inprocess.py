"""In-process assignment speed: single lookups and a 10,000-member batch on a depth-8 partition.

Builds a full depth-8 random tree (255 splits, 256 leaves over 24 cohorts) on 10 features (6
numeric, 4 categorical, some levels unseen at some nodes), compiles it with 3 arms and a 10 %
holdout, then times `assign` over 100,000 calls (median and p99 of per-call times) and
`assign_batch` on 10,000 members (median of 15 runs; also `assign_columns` on the same members
already in columns, which skips pulling values out of 10,000 dicts).
Also the portable document (apportion/serving/portable.py) of a depth-8, 200-cohort random plan: its
size, and the dependency-free evaluator's (apportion/lookup.py) lookups per second on it (wall
clock and CPU time of this thread, best of 3 rounds alternating with a reference loop that only
strips, encodes and draws both hashes per member, the work no evaluator can skip), against the
server's own `assign` on the same members in the same process.
Prints ONE JSON line. Also usable as a module: `measure(...) -> dict` for bench/serve.py.

The reference in the same process is a plain Python loop that only hashes the member id
(`hash_only_us`): the single-lookup ratio against it says how much the walk and checks add. The
batch's reference is the two draws of its 10,000 members alone (`batch_hash_only_cpu_ms`); batch
times are also given as this thread's CPU time, which a busy machine inflates far less than the
wall clock (numpy runs these operations on the calling thread).
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run as a script from anywhere

from apportion.lookup import Plan
from apportion.serving.hashing import hash_state, uniform_from_state, uniforms_from_state
from apportion.serving.index import CompiledPlan, PlanParts, compile_plan, new_salt
from apportion.serving.portable import document_bytes
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

LEVELS = ("a", "b", "c", "d", "e", "f")


def bench_features() -> tuple[FeatureSpec, ...]:
    num = tuple(FeatureSpec(f"x{i}", "numeric") for i in range(6))
    cat = tuple(FeatureSpec(f"c{i}", "categorical", LEVELS) for i in range(4))
    return num + cat


def random_partition(rng: np.random.Generator, depth: int = 8, n_cohorts: int = 24) -> Partition:
    """A full binary tree of the given depth with random splits (flat arrays, root = 0)."""
    feats = bench_features()
    n = 2 ** (depth + 1) - 1
    feature = np.full(n, -1, dtype=np.int64)
    threshold = np.full(n, np.nan)
    left_lv: list[tuple[str, ...]] = [()] * n
    right_lv: list[tuple[str, ...]] = [()] * n
    left = np.full(n, -1, dtype=np.int64)
    right = np.full(n, -1, dtype=np.int64)
    default_left = rng.random(n) < 0.5
    cohort = np.full(n, -1, dtype=np.int64)
    for nd in range(n):
        if nd >= 2**depth - 1:  # leaf (heap layout)
            cohort[nd] = rng.integers(n_cohorts)
            continue
        fi = int(rng.integers(len(feats)))
        feature[nd] = fi
        left[nd], right[nd] = 2 * nd + 1, 2 * nd + 2
        if feats[fi].kind == "numeric":
            threshold[nd] = rng.normal()
        else:
            lv = list(rng.permutation(LEVELS))
            k = int(rng.integers(1, 5))
            left_lv[nd], right_lv[nd] = tuple(lv[:k]), tuple(lv[k:5])  # lv[5] unseen here
    cohort[2**depth - 1 :][:n_cohorts] = np.arange(n_cohorts)  # every cohort has a leaf
    return Partition(
        features=feats,
        feature=feature,
        threshold=threshold,
        left_levels=tuple(left_lv),
        right_levels=tuple(right_lv),
        left=left,
        right=right,
        default_left=default_left,
        cohort=cohort,
        n_cohorts=n_cohorts,
    )


def random_members(rng: np.random.Generator, n: int) -> tuple[list[str], list[dict[str, Any]]]:
    """Ids and feature objects as JSON would deliver them (2 % of values missing)."""
    ids = [f"member-{i:07d}" for i in range(n)]
    rows: list[dict[str, Any]] = []
    xs = rng.normal(size=(n, 6))
    cs = rng.integers(len(LEVELS), size=(n, 4))
    miss = rng.random((n, 10)) < 0.02
    for i in range(n):
        row: dict[str, Any] = {}
        for j in range(6):
            if not miss[i, j]:
                row[f"x{j}"] = float(xs[i, j])
        for j in range(4):
            if not miss[i, 6 + j]:
                row[f"c{j}"] = LEVELS[cs[i, j]]
        rows.append(row)
    return ids, rows


def build(seed: int = 7, depth: int = 8, n_cohorts: int = 24) -> CompiledPlan:
    rng = np.random.default_rng(seed)
    p = random_partition(rng, depth=depth, n_cohorts=n_cohorts)
    alloc = rng.dirichlet(np.ones(3), size=p.n_cohorts)
    return compile_plan(
        PlanParts(
            plan="bench",
            version=1,
            partition=p,
            allocation=alloc,
            arm_keys=("control", "short", "long"),
            holdout_share=0.1,
            holdout_arm="control",
            salt=new_salt(),
        )
    )


def _per_call_us(
    fn: Any, ids: list[str], rows: list[dict[str, Any]], calls: int, block: int
) -> list[float]:
    out: list[float] = []
    n = len(ids)
    clock = time.perf_counter_ns
    for start in range(0, calls, block):
        pairs = [(ids[(start + k) % n], rows[(start + k) % n]) for k in range(block)]
        t0 = clock()
        for m, r in pairs:
            fn(m, r)
        out.append((clock() - t0) / block / 1e3)
    return out


def measure(
    calls: int = 100_000, batch: int = 10_000, repeats: int = 15, seed: int = 7
) -> dict[str, Any]:
    cp = build(seed)
    ids, rows = random_members(np.random.default_rng(seed + 1), max(batch, 20_000))
    state = hash_state(cp.salt, "arm")

    def hash_only(m: str, r: dict[str, Any]) -> float:
        return uniform_from_state(state, m.strip().encode("utf-8"))

    block = 1  # per-call times (perf_counter_ns adds ~0.1 us of clock overhead to each)
    _per_call_us(cp.assign, ids, rows, 20_000, block)  # warm up
    single = _per_call_us(cp.assign, ids, rows, calls, block)
    ref = _per_call_us(hash_only, ids, rows, calls, block)
    bids, brows = ids[:batch], rows[:batch]
    cp.assign_batch(bids, brows)
    times, cpu_times = [], []
    for _ in range(repeats):
        t0, c0 = time.perf_counter(), time.thread_time()
        cp.assign_batch(bids, brows)
        times.append((time.perf_counter() - t0) * 1e3)
        cpu_times.append((time.thread_time() - c0) * 1e3)
    # the batch's floor in the same run: only the two draws of every member (no walk, no checks)
    hold_state = hash_state(cp.salt, "holdout")
    hash_times = []
    for _ in range(repeats):
        c0 = time.thread_time()
        enc = [m.strip().encode("utf-8") for m in bids]
        uniforms_from_state(hold_state, enc)
        uniforms_from_state(state, enc)
        hash_times.append((time.thread_time() - c0) * 1e3)
    cols = {k: [r.get(k) for r in brows] for k in cp.feature_specs}
    col_times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        cp.assign_columns(bids, cols)
        col_times.append((time.perf_counter() - t0) * 1e3)
    # the portable document of a depth-8, 200-cohort plan and the Python evaluator's rate on it
    big = build(seed, n_cohorts=200)
    raw, _ = document_bytes(big)
    portable = Plan.from_json(raw)
    n_eval = min(calls, len(ids))
    pairs = list(zip(ids[:n_eval], rows[:n_eval], strict=True))
    assign = portable.assign
    p_hold, p_arm = portable._holdout_state.copy, portable._arm_state.copy

    def reference(m: str, r: dict[str, Any]) -> None:
        """What any evaluator must do per call: the id stripped and encoded, both draws."""
        e = m.strip().encode("utf-8")
        (h := p_hold()).update(e)
        h.digest()
        (h := p_arm()).update(e)
        h.digest()

    eval_s, eval_cpu, ref_s, ref_cpu = [], [], [], []
    for _ in range(3):  # alternating rounds: load drift hits both
        for fn, wall, cpu in ((assign, eval_s, eval_cpu), (reference, ref_s, ref_cpu)):
            t0, c0 = time.perf_counter(), time.thread_time()
            for m, r in pairs:
                fn(m, r)
            wall.append(time.perf_counter() - t0)
            cpu.append(time.thread_time() - c0)
    eval_s, eval_cpu = min(eval_s), min(eval_cpu)
    ref_s, ref_cpu = min(ref_s), min(ref_cpu)
    server = big.assign
    t0 = time.perf_counter()
    for m, r in pairs:
        server(m, r)
    server_s = time.perf_counter() - t0
    single_sorted = sorted(single)
    med = statistics.median(single)
    return {
        "bench": "serve_inprocess",
        "depth": cp.depth,
        "features": len(cp.feature_specs),
        "cohorts": cp.n_cohorts,
        "single_calls": calls,
        "single_median_us": round(med, 3),
        "single_p99_us": round(single_sorted[int(0.99 * (len(single_sorted) - 1))], 3),
        "hash_only_us": round(statistics.median(ref), 3),
        "single_over_hash_only": round(med / statistics.median(ref), 2),
        "batch_members": batch,
        "batch_median_ms": round(statistics.median(times), 3),
        "batch_per_member_us": round(statistics.median(times) * 1e3 / batch, 3),
        "batch_columns_median_ms": round(statistics.median(col_times), 3),
        "batch_cpu_median_ms": round(statistics.median(cpu_times), 3),
        "batch_hash_only_cpu_ms": round(statistics.median(hash_times), 3),
        "batch_over_hash_only_cpu": round(
            statistics.median(cpu_times) / statistics.median(hash_times), 2
        ),
        "document_cohorts": big.n_cohorts,
        "document_depth": big.depth,
        "document_kb": round(len(raw) / 1024, 1),
        "evaluator_lookups_per_s": round(n_eval / eval_s),
        "evaluator_lookups_per_cpu_s": round(n_eval / eval_cpu),
        "evaluator_reference_per_s": round(n_eval / ref_s),
        "evaluator_over_reference_time": round(eval_cpu / ref_cpu, 2),
        "evaluator_over_server_assign_time": round(eval_s / server_s, 2),
        "single_target_us": 5.0,
        "batch_target_ms": 10.0,
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--calls", type=int, default=100_000)
    ap.add_argument("--batch", type=int, default=10_000)
    ap.add_argument("--seed", type=int, default=7)
    a = ap.parse_args()
    print(json.dumps(measure(calls=a.calls, batch=a.batch, seed=a.seed)))


if __name__ == "__main__":
    main()
