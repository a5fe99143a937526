"""Benchmark: the member-level and decision-focused model methods on a 1,000,000-unit readout
(20 features, 4 arms, 4 metrics; bench/fit.py's readout) against the causal tree fitted on the
same table in the same run (max_depth 8, no pruning: bench/fit.py's reference setting).

Prints one JSON line: seconds per method with its guardrails (three guardrails, as a plan would
pass them), each method's ratio to the causal tree, and the cohort counts. The target is a
`two_model` or `forest` fit of 1,000,000 units within 180 s on two cores.
Run: .venv/bin/python bench/member.py [n] [methods, comma separated]
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

from apportion.stats.models import fit_cohort_model  # noqa: E402

GUARDRAILS = [
    {"metric": "abandon_rate", "threshold": 0.005},
    {"metric": "cancelled", "threshold": 0.002},
    {"metric": "support", "threshold": 2.0, "unit": "relative"},
]


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000
    methods = (
        sys.argv[2].split(",") if len(sys.argv) > 2 else ["two_model", "forest", "policy_tree"]
    )
    table = readout(n)
    t0 = time.perf_counter()
    ref = fit_cohort_model(table, "causal_tree", {"max_depth": 8, "cv_folds": 0})
    ref_s = time.perf_counter() - t0
    out: dict = {"bench": "fit_member_models", "n": n, "features": len(table.features),
                 "arms": table.n_arms, "metrics": len(table.metrics), "cores": os.cpu_count(),
                 "load_avg_1m": round(os.getloadavg()[0], 2),
                 "reference": {"method": "causal_tree", "seconds": round(ref_s, 2),
                               "n_cohorts": ref.partition.n_cohorts}}  # fmt: skip
    for m in methods:
        t0 = time.perf_counter()
        fit = fit_cohort_model(table, m, {"guardrails": GUARDRAILS}, success_metric="active")
        s = time.perf_counter() - t0
        om = fit.diagnostics["outcome_model"]
        out[m] = {"seconds": round(s, 2), "ratio": round(s / ref_s, 2),
                  "n_cohorts": fit.partition.n_cohorts, "rounds": len(fit.diagnostics["rounds"]),
                  "within_180s": s <= 180,
                  **{k: om[k] for k in ("trees", "tree_units", "boosting_iterations") if k in om}}  # fmt: skip
    out["load_avg_1m_end"] = round(os.getloadavg()[0], 2)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
