"""Benchmark: the method comparison job's computation (apportion/optimize/crossfit.py,
`evaluate_candidates`) on a 1,000,000-unit readout (20 features, 4 arms, 4 metrics; bench/fit.py's
readout), 5 folds, every candidate the service offers (model method x optimizer), against a
reference run in the same process: one `causal_tree` fit on the whole table (max_depth 8, no
pruning: bench/fit.py's and bench/member.py's reference setting).

The target: within 600 s on two cores, with progress. Progress goes to stderr (one line
per tenth); the figures go to stdout as one JSON line: total seconds, its ratio to the reference,
fit seconds per model method summed over the folds, seconds per candidate (its share of its model's
fits plus its optimizer), the recommendation, and the 1-minute load average at the start and end
(the box is shared, so read the seconds beside the load).
Run: .venv/bin/python bench/compare.py [n] [folds] [candidates, comma separated] [workers]
(workers: processes that run folds at once, default min(2, cores) as the comparison job; the JSON
line says whether the LPs went through highspy or linprog).
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))

from fit import readout  # noqa: E402
from member import GUARDRAILS  # noqa: E402

from apportion.optimize.crossfit import (  # noqa: E402
    COMPARISON_DRAWS,
    comparison_workers,
    evaluate_candidates,
    parse_candidates,
)
from apportion.optimize.lp import HAVE_HIGHSPY  # noqa: E402
from apportion.optimize.problem import Guardrail  # noqa: E402
from apportion.stats.models import fit_cohort_model  # noqa: E402


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000
    folds = int(sys.argv[2]) if len(sys.argv) > 2 else 5
    names = [c for c in sys.argv[3].split(",") if c] if len(sys.argv) > 3 else None
    candidates = parse_candidates(names)
    workers = comparison_workers(int(sys.argv[4]) if len(sys.argv) > 4 else 0, n)
    load_start = os.getloadavg()[0]
    table = readout(n)
    guardrails = tuple(
        Guardrail(g["metric"], g["threshold"], g.get("unit", "absolute"), 0.9) for g in GUARDRAILS
    )
    t0 = time.perf_counter()
    fit_cohort_model(table, "causal_tree", {"max_depth": 8, "cv_folds": 0})
    ref_s = time.perf_counter() - t0
    print(
        f"reference causal_tree fit {ref_s:.1f} s; load {os.getloadavg()[0]:.1f}", file=sys.stderr
    )
    marks: list[int] = []

    def progress(p: float) -> None:
        tenth = int(p * 10)
        if not marks or tenth > marks[-1]:
            marks.append(tenth)
            print(f"comparison {p:.0%} at {time.perf_counter() - t1:.0f} s, "
                  f"load {os.getloadavg()[0]:.1f}", file=sys.stderr)  # fmt: skip

    t1 = time.perf_counter()
    # guardrails also shape the decision-focused partitions, as the comparison job passes them
    params = {m: {"guardrails": [{k: v for k, v in g.items()} for g in GUARDRAILS]}
              for m in ("two_model", "forest", "policy_tree")}  # fmt: skip
    out = evaluate_candidates(table, candidates, success="active", guardrails=guardrails,
                              folds=folds, seed=0, progress=progress, draws=COMPARISON_DRAWS,
                              workers=workers,
                              model_params={m: p for m, p in params.items()
                                            if any(c.model == m for c in candidates)})  # fmt: skip
    total = time.perf_counter() - t1
    print(json.dumps({
        "bench": "comparison",
        "n": n, "features": len(table.features), "arms": table.n_arms,
        "metrics": len(table.metrics), "folds": folds, "candidates": len(candidates),
        "calibration_draws_per_fold_plan": COMPARISON_DRAWS, "workers": workers,
        "lp": "highspy" if HAVE_HIGHSPY else "linprog",
        "seconds": round(total, 1), "reference_seconds": round(ref_s, 2),
        "ratio": round(total / ref_s, 2), "target_seconds": 600,
        "fit_seconds": out["fit_seconds"],
        "candidate_seconds": {r["candidate"]: r["seconds"] for r in out["candidates"]},
        "progress_marks": len(marks),
        "recommended": out["recommended"],
        "load_1min_start": round(load_start, 2), "load_1min_end": round(os.getloadavg()[0], 2),
        "cpus": os.cpu_count(),
    }))  # fmt: skip


if __name__ == "__main__":
    main()
