"""Decision quality of every candidate (model method x optimizer) on the simulation designs.

For each design (aligned / opposed at sigma 0.5, 1, 2), candidate and seed: fit the cohort model
on a simulated readout, draft the calibrated plan (service/optimize/calibrate.py), and score it on
the design's truth sample (service/demo/designs.py). Prints one JSON line: per candidate and
design, the median and minimum share of the oracle's true success lift, the true breach rate of
each guardrail, the coverage of the report's 95 % interval for the true success lift, the share
of seeds refused (422: control kept) and the median seconds per plan. The reference run in the
same process is the oracle itself (its share is 1 by definition) and the best safe single arm's
share, printed beside.

    python bench/decisions.py --n 200000 --seeds 10 --designs opposed:1,aligned:1
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np

from service.demo import designs as d
from service.errors import Infeasible
from service.optimize.calibrate import Z95, calibrated_solve
from service.optimize.crossfit import parse_candidates, registry
from service.optimize.problem import Guardrail, build_problem
from service.stats.models import fit_cohort_model


def run_one(design: str, sigma: float, cand, n: int, seed: int, conf: float) -> dict:
    tr = d.truth(design)
    table = d.simulate(n, design, sigma, 10_000 + seed)
    g = tuple(Guardrail(**x) for x in d.guardrails(conf))
    t0 = time.perf_counter()
    fit = fit_cohort_model(table, cand.model, {"seed": seed}, success_metric=d.SUCCESS)
    problem = build_problem(shares=fit.shares, moments=fit.moments, metrics=table.metrics,
                            success=d.SUCCESS, guardrails=g)  # fmt: skip
    refused, covered = False, None
    try:
        sol, cal, _, _ = calibrated_solve(problem, cand.optimizer, cand.allocation, seed=seed)
        x = sol.allocation
    except Infeasible:
        refused = True
        x = np.zeros((fit.partition.n_cohorts, d.J))
        x[:, 0] = 1.0
    secs = time.perf_counter() - t0
    true = d.plan_true_lifts(tr, fit.partition, x)
    if not refused:
        centre = sol.objective + cal.success_optimism
        half = Z95 * max(cal.success_sd, 1e-15)
        covered = bool(abs(true[0] - centre) <= half)
    return {
        "capture": float(true[0] / tr.oracle[0]),
        "breach": [bool(v > lim + 1e-12) for v, lim in zip(true[1:], d.LIMITS, strict=True)],
        "covered": covered,
        "refused": refused,
        "cohorts": int(fit.partition.n_cohorts),
        "seconds": secs,
    }


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=200_000)
    ap.add_argument("--seeds", type=int, default=10)
    ap.add_argument(
        "--designs", default="aligned:0.5,aligned:1,aligned:2,opposed:0.5,opposed:1,opposed:2"
    )
    ap.add_argument("--candidates", default="", help="comma list model/optimizer; default: all")
    ap.add_argument("--confidence", type=float, default=0.9)
    a = ap.parse_args()
    cands = (
        parse_candidates([c for c in a.candidates.split(",") if c]) if a.candidates else registry()
    )
    rows = []
    for spec in a.designs.split(","):
        design, sigma = spec.split(":")
        tr = d.truth(design)
        ref = float(tr.single[tr.best_single_arm, 0] / tr.oracle[0])
        for cand in cands:
            runs = [
                run_one(design, float(sigma), cand, a.n, s, a.confidence) for s in range(a.seeds)
            ]
            cap = np.array([r["capture"] for r in runs])
            br = np.array([r["breach"] for r in runs])
            cov = [r["covered"] for r in runs if r["covered"] is not None]
            s = len(runs)
            rows.append({
                "design": f"{design}:{sigma}", "candidate": cand.name, "seeds": s, "n": a.n,
                "capture_median": float(np.median(cap)), "capture_min": float(cap.min()),
                "breach_rate": br.mean(axis=0).tolist(),
                "breach_mc_se": np.sqrt(br.mean(axis=0) * (1 - br.mean(axis=0)) / s).tolist(),
                "coverage": float(np.mean(cov)) if cov else None,
                "refused": float(np.mean([r["refused"] for r in runs])),
                "cohorts_median": float(np.median([r["cohorts"] for r in runs])),
                "seconds_median": float(np.median([r["seconds"] for r in runs])),
                "best_single_arm_capture": ref,
            })  # fmt: skip
    print(json.dumps({"bench": "decisions", "confidence": a.confidence, "rows": rows}))


if __name__ == "__main__":
    main()
