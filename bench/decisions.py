"""Decision quality of every candidate (model method x optimizer) on the simulation designs.

For each design (aligned / opposed at sigma 0.5, 1, 2, and the demo scenario), candidate and
seed: simulate a readout, fit the cohort model (decision-focused methods get the guardrails, as a
plan passes them), draft the calibrated plan (apportion/optimize/calibrate.py) and score it on the
design's truth sample (apportion/demo/designs.py; the demo's own truth in apportion/demo/scenario.py).

Every run appends one JSON line to --out (default bench/decisions_runs.jsonl) and runs already in
that file are skipped, so the grid can be run in parts and resumed after an interruption. The
summary (one JSON line, and a Markdown table with --markdown) gives per candidate and design: the
median and minimum share of the oracle's true success lift, the true breach rate of each
guardrail with its Monte Carlo SE, the coverage of the report's 95 % interval for the true
success lift, the share of seeds refused (422: control kept) and the median seconds per plan.
The reference in the same run is the oracle (share 1 by definition) and the best safe single
arm's share, printed beside.

    nice -n 10 python bench/decisions.py --n 200000 --seeds 0-19 --designs opposed:1 \
        --candidates causal_tree/chance --jobs 2
    python bench/decisions.py --summary --markdown          # table of everything in --out

Seeds: the readout of seed s is drawn with generator seed 10_000 + s. Report on seeds 0..19;
tune on seeds 1000 and up, which the reported table never uses.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from collections import defaultdict
from concurrent.futures import ProcessPoolExecutor
from functools import lru_cache
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from apportion.demo import designs as d  # noqa: E402
from apportion.demo import scenario as sc  # noqa: E402
from apportion.errors import Infeasible  # noqa: E402
from apportion.optimize.calibrate import Z95, calibrated_solve  # noqa: E402
from apportion.optimize.crossfit import model_params_for, parse_candidates, registry  # noqa: E402
from apportion.optimize.linear import linearize  # noqa: E402
from apportion.optimize.problem import Guardrail, build_problem  # noqa: E402
from apportion.stats.models import fit_cohort_model  # noqa: E402

GRID = "aligned:0.5,aligned:1,aligned:2,opposed:0.5,opposed:1,opposed:2,demo"
DEFAULT_OUT = Path(__file__).resolve().parent / "decisions_runs.jsonl"
DEMO_TRUTH_N = 200_000


def parse_seeds(spec: str) -> list[int]:
    """'0-19' or '0,3,7' or '1000-1009,2000'."""
    out: list[int] = []
    for part in spec.split(","):
        if "-" in part:
            lo, hi = part.split("-")
            out.extend(range(int(lo), int(hi) + 1))
        elif part:
            out.append(int(part))
    return out


@lru_cache(maxsize=1)
def demo_truth() -> dict:
    _, fv = sc.simulate_features(DEMO_TRUTH_N, 424_242)
    return {"fv": fv, "oracle": sc.oracle_plan(fv)}


def _demo_guardrails(conf: float) -> tuple[Guardrail, ...]:
    return tuple(Guardrail(**{**g, "confidence": conf}) for g in sc.GUARDRAILS)


def _setup(spec: str, n: int, seed: int, conf: float):
    """(table, guardrails, success metric, scorer) of one design spec and seed."""
    if spec == "demo":
        table = sc.simulate(n, 10_000 + seed)
        g = _demo_guardrails(conf)
        tr = demo_truth()
        orc = tr["oracle"]

        def score(partition, x):
            cohort, _ = partition.route(tr["fv"], sc.FEATURES)
            lifts = sc.true_lifts(tr["fv"], np.asarray(x)[cohort])
            lim = orc["limits"]
            return (lifts[sc.SUCCESS] / orc["lifts"][sc.SUCCESS],
                    [lifts[k] > lim[k] + 1e-12 for k in lim], lifts[sc.SUCCESS],
                    [lifts[k] for k in lim])  # fmt: skip

        return table, g, sc.SUCCESS, score
    design, sigma = spec.split(":")
    table = d.simulate(n, design, float(sigma), 10_000 + seed)
    g = tuple(Guardrail(**x) for x in d.guardrails(conf))
    tr = d.truth(design)

    def score(partition, x):
        true = d.plan_true_lifts(tr, partition, x)
        breach = [bool(v > lim + 1e-12) for v, lim in zip(true[1:], d.LIMITS, strict=True)]
        return float(true[0] / tr.oracle[0]), breach, float(true[0]), true[1:].tolist()

    return table, g, d.SUCCESS, score


def best_single_share(spec: str) -> float:
    if spec == "demo":
        orc = demo_truth()["oracle"]
        return float(orc["best_single_lifts"][sc.SUCCESS] / orc["lifts"][sc.SUCCESS])
    tr = d.truth(spec.split(":")[0])
    return float(tr.single[tr.best_single_arm, 0] / tr.oracle[0])


def run_one(job: dict) -> dict:
    spec, cname, n, seed, conf = job["design"], job["candidate"], job["n"], job["seed"], job["conf"]
    cand = parse_candidates([cname])[0]
    table, g, success, score = _setup(spec, n, seed, conf)
    t0 = time.perf_counter()
    params = model_params_for(cand, g, {"seed": seed, **job.get("params", {})})
    fit = fit_cohort_model(table, cand.model, params, success_metric=success)
    problem = build_problem(shares=fit.shares, moments=fit.moments, metrics=table.metrics,
                            success=success, guardrails=g)  # fmt: skip
    refused, covered, prob, centre, half, calib = False, None, None, None, None, None
    try:
        sol, cal, shrunk, _ = calibrated_solve(problem, cand.optimizer, cand.allocation, seed=seed)
        x = sol.allocation
        prob = cal.probability.tolist()
        lin = linearize(shrunk, with_cellcov=False)
        plug_sd = float(np.sqrt(np.sum((lin.p[:, None] * (x - lin.b)) ** 2 * lin.obj_var)))
        centre = sol.objective + cal.success_optimism
        half = Z95 * max(cal.success_sd, plug_sd, 1e-15)
        calib = {"estimate": cal.estimate.tolist(), "optimism": cal.optimism.tolist(),
                 "error_sd": cal.error_sd.tolist(), "margin": cal.margin.tolist(),
                 "rounds": cal.rounds}  # fmt: skip
    except Infeasible:
        refused = True
        x = np.zeros((fit.partition.n_cohorts, table.n_arms))
        x[:, 0] = 1.0
    secs = time.perf_counter() - t0
    capture, breach, true_success, true_guard = score(fit.partition, x)
    if not refused:
        covered = bool(abs(true_success - centre) <= half)
    return {**job, "capture": float(capture), "breach": [bool(b) for b in breach],
            "covered": covered, "refused": refused, "probability": prob,
            "true_success": true_success, "reported_success": centre, "half_width": half,
            "true_guardrails": [float(v) for v in true_guard], "calibration": calib,
            "cohorts": int(fit.partition.n_cohorts), "seconds": round(secs, 2)}  # fmt: skip


def _key(r: dict) -> tuple:
    return (r["design"], r["candidate"], r["n"], r["seed"], r["conf"],
            json.dumps(r.get("params", {}), sort_keys=True))  # fmt: skip


def load(path: Path) -> list[dict]:
    if not path.exists():
        return []
    return [json.loads(line) for line in path.read_text().splitlines() if line.strip()]


def summarize(runs: list[dict], seeds: set[int] | None = None) -> list[dict]:
    groups: dict[tuple, list[dict]] = defaultdict(list)
    for r in runs:
        if seeds is not None and r["seed"] not in seeds:
            continue
        k = (r["design"], r["candidate"], r["n"], r["conf"],
             json.dumps(r.get("params", {}), sort_keys=True))  # fmt: skip
        groups[k].append(r)
    rows = []
    for (design, cand, n, conf, params), rs in sorted(groups.items()):
        s = len(rs)
        cap = np.array([r["capture"] for r in rs])
        br = np.array([r["breach"] for r in rs], dtype=float)
        rate = br.mean(axis=0)
        cov = [r["covered"] for r in rs if r["covered"] is not None]
        rows.append({
            "design": design, "candidate": cand, "n": n, "confidence": conf,
            "params": json.loads(params), "seeds": s,
            "seed_range": [min(r["seed"] for r in rs), max(r["seed"] for r in rs)],
            "capture_median": round(float(np.median(cap)), 4),
            "capture_min": round(float(cap.min()), 4),
            "capture_p10": round(float(np.quantile(cap, 0.1)), 4),
            "breach_rate": [round(float(v), 4) for v in rate],
            "breach_mc_se": [round(float(np.sqrt(max(v * (1 - v), conf * (1 - conf)) / s)), 4)
                             for v in rate],
            "breach_any": round(float(br.any(axis=1).mean()), 4),
            "coverage": round(float(np.mean(cov)), 4) if cov else None,
            "coverage_n": len(cov),
            "refused": round(float(np.mean([r["refused"] for r in rs])), 4),
            "cohorts_median": float(np.median([r["cohorts"] for r in rs])),
            "seconds_median": round(float(np.median([r["seconds"] for r in rs])), 2),
            "best_single_arm_capture": round(best_single_share(design), 4),
        })  # fmt: skip
    return rows


def markdown(rows: list[dict]) -> str:
    out = ["| design | n | conf | candidate | params | seeds | capture median (min) | breach per "
           "guardrail (MC SE) | coverage 95 % | refused | cohorts | s/plan | best single arm |",
           "|" + " --- |" * 13]  # fmt: skip
    for r in rows:
        br = " / ".join(f"{b:.2f}" for b in r["breach_rate"])
        se = " / ".join(f"{b:.2f}" for b in r["breach_mc_se"])
        cov = "–" if r["coverage"] is None else f"{r['coverage']:.2f} ({r['coverage_n']})"
        out.append(
            f"| {r['design']} | {r['n']:,} | {r['confidence']} | {r['candidate']} | "
            f"{json.dumps(r['params']) if r['params'] else ''} | {r['seeds']} | "
            f"{r['capture_median']:.2f} ({r['capture_min']:.2f}) | {br} ({se}) | {cov} | "
            f"{r['refused']:.2f} | {r['cohorts_median']:g} | {r['seconds_median']:.0f} | "
            f"{r['best_single_arm_capture']:.2f} |"
        )
    return "\n".join(out)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=200_000)
    ap.add_argument("--seeds", default="0-19", help="e.g. 0-19 (report) or 1000-1019 (tuning)")
    ap.add_argument("--designs", default=GRID, help=f"comma list; default the whole grid {GRID}")
    ap.add_argument("--candidates", default="", help="comma list model/optimizer; default: all")
    ap.add_argument("--confidence", type=float, default=0.9)
    ap.add_argument("--params", default="{}", help="JSON model parameters for every candidate")
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--out", type=Path, default=DEFAULT_OUT)
    ap.add_argument("--summary", action="store_true", help="only summarize --out")
    ap.add_argument("--markdown", action="store_true")
    a = ap.parse_args()
    seeds = parse_seeds(a.seeds)
    if not a.summary:
        cands = (parse_candidates([c for c in a.candidates.split(",") if c])
                 if a.candidates else registry())  # fmt: skip
        params = json.loads(a.params)
        done = {_key(r) for r in load(a.out)}
        jobs = [{"design": spec, "candidate": c.name, "n": a.n, "seed": s, "conf": a.confidence,
                 **({"params": params} if params else {})}
                for spec in a.designs.split(",") for c in cands for s in seeds]  # fmt: skip
        jobs = [j for j in jobs if _key(j) not in done]
        print(f"{len(jobs)} runs to do", file=sys.stderr)
        with a.out.open("a") as fh:
            if a.jobs > 1:
                with ProcessPoolExecutor(a.jobs) as ex:
                    for r in ex.map(run_one, jobs):
                        fh.write(json.dumps(r) + "\n")
                        fh.flush()
            else:
                for j in jobs:
                    fh.write(json.dumps(run_one(j)) + "\n")
                    fh.flush()
    rows = summarize(load(a.out), set(seeds))
    print(json.dumps({"bench": "decisions", "load_avg_1m": round(os.getloadavg()[0], 2),
                      "rows": rows}))  # fmt: skip
    if a.markdown:
        print(markdown(rows))


if __name__ == "__main__":
    main()
