"""Benchmark: the causal tree on a 1,000,000-unit readout (20 features, 4 arms, 4 metrics) against
scikit-learn's DecisionTreeRegressor(max_depth=8) on the same features and ONE outcome.

Prints one JSON line: our seconds (all arms and metrics), the reference seconds (one outcome),
their ratio, and our peak traced memory over the size of the readout's own arrays.
Run: .venv/bin/python bench/fit.py [n]
"""

from __future__ import annotations

import json
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sklearn.tree import DecisionTreeRegressor  # noqa: E402

from apportion.stats.models import fit_cohort_model  # noqa: E402
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable  # noqa: E402


def readout(n: int, seed: int = 0) -> UnitTable:
    """Synthetic readout: 18 numeric (normal, skewed, integer, uniform) + 2 categorical features;
    effects depend on a few of them; 4 metrics (mean, proportion, count, ratio)."""
    rng = np.random.default_rng(seed)
    feats: dict[str, np.ndarray] = {}
    specs: list[FeatureSpec] = []
    for i in range(18):
        kind = i % 4
        if kind == 0:
            x = rng.standard_normal(n)
        elif kind == 1:
            x = rng.lognormal(3.0, 1.0, n)
        elif kind == 2:
            x = rng.integers(0, 30, n).astype(np.float64)
        else:
            x = rng.random(n)
        x[rng.random(n) < 0.01] = np.nan
        feats[f"f{i}"] = x
        specs.append(FeatureSpec(f"f{i}", "numeric"))
    for i, levels in enumerate([5, 12]):
        feats[f"c{i}"] = rng.integers(-1, levels, n).astype(np.int32)
        specs.append(FeatureSpec(f"c{i}", "categorical", tuple(f"l{v}" for v in range(levels))))
    arm = rng.integers(0, 4, n)
    lift = 0.3 * (feats["f0"] > 0) * (arm == 1) + 0.2 * (feats["c0"] == 2) * (arm == 2)
    lift += 0.1 * (np.nan_to_num(feats["f2"]) > 10) * (arm == 3)
    active = rng.binomial(7, np.clip(0.4 + lift / 7, 0, 1)).astype(np.float64)
    started = rng.poisson(5 * active / 3 + 1).astype(np.float64)
    abandoned = rng.binomial(started.astype(np.int64), 0.12 + 0.02 * (arm == 2)).astype(np.float64)
    cancelled = (rng.random(n) < 0.04 + 0.01 * (arm == 3) * (feats["f3"] < 0.3)).astype(np.float64)
    support = rng.poisson(0.08, n).astype(np.float64)
    return UnitTable(
        unit_ids=np.arange(n).astype(str).astype(object),
        arm=arm,
        arm_keys=("a0", "a1", "a2", "a3"),
        design_shares=np.full(4, 0.25),
        features=tuple(specs),
        feature_values=feats,
        metrics=(
            MetricSpec("active", "mean"),
            MetricSpec("abandon_rate", "ratio", "lower", "abandoned", "started"),
            MetricSpec("cancelled", "proportion", "lower"),
            MetricSpec("support", "mean", "lower"),
        ),
        columns={"active": active, "abandoned": abandoned, "started": started,
                 "cancelled": cancelled, "support": support},
    )  # fmt: skip


def main() -> None:
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000
    table = readout(n)
    arrays = [table.arm, table.unit_ids, *table.feature_values.values(), *table.columns.values()]
    readout_bytes = sum(a.nbytes for a in arrays)
    params = {"max_depth": 8, "cv_folds": 0}

    t0 = time.perf_counter()
    fit = fit_cohort_model(table, "causal_tree", params)
    ours = time.perf_counter() - t0

    x = np.column_stack([table.feature_values[f.key].astype(np.float64) for f in table.features])
    x = np.nan_to_num(x, nan=-1.0)  # the reference needs no missing values
    t0 = time.perf_counter()
    DecisionTreeRegressor(max_depth=8, random_state=0).fit(x, table.columns["active"])
    ref = time.perf_counter() - t0
    del x

    tracemalloc.start()
    fit_cohort_model(table, "causal_tree", params)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()

    print(json.dumps({
        "bench": "fit_causal_tree",
        "n": n, "features": len(table.features), "arms": table.n_arms, "metrics": len(table.metrics),
        "params": params, "n_cohorts": fit.partition.n_cohorts,
        "ours_seconds": round(ours, 3), "reference_seconds": round(ref, 3),
        "ratio": round(ours / ref, 3),
        "peak_bytes": peak, "readout_bytes": readout_bytes,
        "memory_ratio": round(peak / readout_bytes, 3),
    }))  # fmt: skip


if __name__ == "__main__":
    main()
