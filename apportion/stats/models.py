"""Cohort models: split a readout's units into cohorts and estimate every cohort x arm x metric.

Four methods share one result type, `CohortModelFit`: `global` (one cohort), `segments` (cohorts
the caller names), `causal_tree` (one honest tree for all arms and metrics, Athey and Imbens 2016)
and `intersect` (one honest tree per arm and metric, intersected). Estimates always come from
`apportion.stats.estimates` on the estimation rows.

Longer than most modules (about 440 lines) on purpose: it is the one table of every method's
parameters with their bounds (`_Param`) and the dispatcher that validates and runs them, so a
reader sees every method's knobs in one place.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.stats.binning import FeatureBins, bin_features
from apportion.stats.decision import DECISION_METHODS, fit_decision
from apportion.stats.estimates import CellMoments, MetricEstimates, cell_moments, metric_estimates
from apportion.stats.honest import (
    criterion_outcomes,
    honest_split,
    pair_weights,
    root_pair_variance,
)
from apportion.stats.intersect import fit_intersect
from apportion.stats.partition import Partition
from apportion.stats.prune import collapsed_at, cv_prune, pruning_sequence
from apportion.stats.segments import fit_segments
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable
from apportion.stats.tree import GrowSpec, Tree, grow

__all__ = ["METHODS", "CohortModelFit", "fit_cohort_model", "honest_split", "validate_params"]

METHODS = ("global", "segments", "causal_tree", "intersect", *DECISION_METHODS)
MAX_SEGMENT_CELLS = 4096
_HONEST = ("causal_tree", "intersect", *DECISION_METHODS)
# methods that cannot run without a feature (their outcome models need at least one input);
# the others fit one cohort when no feature is left
_NEEDS_FEATURES = ("two_model", "forest")


@dataclass(frozen=True)
class CohortModelFit:
    method: str
    params: dict[str, Any]
    partition: Partition
    shares: np.ndarray  # (C,) share of all rows in each cohort
    moments: CellMoments  # per cohort x arm, on the estimation rows
    estimates: MetricEstimates
    estimation_mask: np.ndarray  # (n,) bool
    diagnostics: dict[str, Any]


# ---- parameters: one declarative table per method ------------------------------------------


@dataclass(frozen=True)
class _Param:
    kind: str  # int | float | features | metric | weights | bins
    default: Any = None
    lo: float = -math.inf
    hi: float = math.inf
    lo_open: bool = False
    required: bool = False
    note: str = ""
    choices: tuple[str, ...] = ()


_COMMON = {
    "seed": _Param("int", 0, lo=0),
    "features": _Param("features", None),
    "min_units_per_arm": _Param("int", 50, lo=2),
    "success_metric": _Param("metric", None),
}
_TREE = {
    "estimation_fraction": _Param("float", 0.5, lo=0.0, hi=1.0, lo_open=True),
    "max_bins": _Param("int", 64, lo=2, hi=64),
    "min_gain": _Param("float", 0.0, lo=0.0),
}
PARAMS: dict[str, dict[str, _Param]] = {
    "global": dict(_COMMON),
    "segments": {
        **_COMMON,
        "features": _Param("features", None, required=True),
        "bins": _Param("bins", None),
    },
    "causal_tree": {
        **_COMMON,
        **_TREE,
        "max_depth": _Param("int", 6, lo=1, hi=16),
        "metric_weights": _Param("weights", None),
        "cv_folds": _Param("int", 5, lo=0, hi=20, note="0 (off) or 2..20"),
        "cv_rule": _Param("choice", "best", choices=("best", "one_se")),
    },
    "intersect": {**_COMMON, **_TREE, "max_depth": _Param("int", 2, lo=1, hi=4)},
}
# decision-focused partitions (apportion.stats.decision): a shallow policy tree on doubly robust
# Lagrangian scores; the three methods differ in the outcome model inside the scores
_DECISION = {
    **_COMMON,
    "estimation_fraction": _TREE["estimation_fraction"],
    "max_bins": _TREE["max_bins"],
    "max_depth": _Param("int", 3, lo=1, hi=6),
    "guardrails": _Param("guardrails", None),
    "rounds": _Param("int", 3, lo=1, hi=10),
    "split_z": _Param("float", 1.0, lo=0.0, hi=10.0),
    "price_z": _Param("float", 0.0, lo=0.0, hi=10.0),
    "folds": _Param("int", 3, lo=2, hi=10),
}
_BOOST = {
    "learning_rate": _Param("float", 0.05, lo=0.0, hi=1.0, lo_open=True),
    "max_iter": _Param("int", 300, lo=10, hi=2000),
    "max_leaf_nodes": _Param("int", 15, lo=2, hi=255),
    "min_samples_leaf": _Param("int", 200, lo=1, hi=100_000),
    "l2_regularization": _Param("float", 1.0, lo=0.0, hi=1e6),
    "max_train_rows": _Param("int", 100_000, lo=1_000, hi=100_000_000),
}
PARAMS["two_model"] = {**_DECISION, **_BOOST}
PARAMS["forest"] = {
    **_DECISION,
    "n_trees": _Param("int", 100, lo=1, hi=2000),
    "sample_fraction": _Param("float", 0.5, lo=0.0, hi=1.0, lo_open=True),
    "max_tree_units": _Param("int", 40_000, lo=100, hi=100_000_000),
    "forest_max_depth": _Param("int", 8, lo=1, hi=16),
    "forest_min_units": _Param("int", 25, lo=2, hi=100_000),
    "mtry": _Param("int", 0, lo=0, hi=10_000, note="0 (automatic) or the features per tree"),
}
PARAMS["policy_tree"] = {
    **_DECISION,
    **_BOOST,
    "outcome_model": _Param("choice", "arm_means", choices=("arm_means", "boosted")),
}


def _specs(table_or_specs: Any) -> tuple[tuple[FeatureSpec, ...], tuple[MetricSpec, ...]]:
    if isinstance(table_or_specs, tuple) and len(table_or_specs) == 2:
        return tuple(table_or_specs[0]), tuple(table_or_specs[1])
    return tuple(table_or_specs.features), tuple(table_or_specs.metrics)


def _bad(name: str, msg: str, value: Any) -> InvalidInput:
    return InvalidInput(
        f"parameter '{name}' {msg}, got {value!r}",
        errors=[{"parameter": name, "message": msg, "value": repr(value)}],
    )


def validate_params(
    method: str, params: dict[str, Any] | None, table_or_specs: Any
) -> dict[str, Any]:
    """Resolved parameters (defaults filled, JSON-serializable) or InvalidInput naming the first
    bad parameter. `table_or_specs`: a UnitTable or (features, metrics) specs."""
    if method not in METHODS:
        raise _bad("method", f"must be one of {list(METHODS)}", method)
    params = dict(params or {})
    table = PARAMS[method]
    unknown = sorted(set(params) - set(table))
    if unknown:
        raise _bad(unknown[0], f"is not a parameter of method '{method}' (known: {sorted(table)})",
                   params[unknown[0]])  # fmt: skip
    features, metrics = _specs(table_or_specs)
    # a feature declared `personalize: false` is never a split variable nor a model input: it is
    # left out of the default and refused when named
    fkeys, mkeys = [f.key for f in features if f.personalize], [m.key for m in metrics]
    excluded = [f.key for f in features if not f.personalize]
    out: dict[str, Any] = {}
    for name, p in table.items():
        if name not in params or params[name] is None:
            if p.required:
                raise _bad(name, "is required", None)
            out[name] = p.default
            continue
        if p.kind == "features" and isinstance(params[name], list | tuple):
            barred = [x for x in params[name] if x in excluded]
            if barred:
                raise _bad(name, f"names {barred}, declared not for personalization "
                           "(personalize: false)", params[name])  # fmt: skip
        out[name] = _check(name, p, params[name], fkeys, mkeys)
    if out["features"] is None:
        out["features"] = fkeys
    if not out["features"] and method in _NEEDS_FEATURES:
        why = "every declared feature is personalize: false" if excluded else "none is declared"
        raise _bad("features", f"must name at least one feature for method '{method}', whose "
                   f"outcome models take them as inputs ({why})", out["features"])  # fmt: skip
    if out.get("cv_folds") == 1:
        raise _bad("cv_folds", "must be 0 (off) or 2..20", 1)
    if "metric_weights" in out:
        w = {k: 1.0 for k in mkeys}
        w.update(out["metric_weights"] or {})
        if mkeys and not any(v > 0 for v in w.values()):
            raise _bad("metric_weights", "must give at least one metric a positive weight", w)
        out["metric_weights"] = w
    if method == "segments":
        out["bins"] = _segment_bins(out, features)
    if "guardrails" in out:
        out["guardrails"] = _guardrail_list(out["guardrails"], out["success_metric"], metrics)
    return out


def _guardrail_list(
    v: Any, success: str | None, metrics: tuple[MetricSpec, ...]
) -> list[dict[str, Any]]:
    """The guardrails whose prices shape a decision-focused partition, in the plan's shape:
    [{metric, threshold, unit}] with the plan's sign rule (a lower-is-better metric's threshold
    is an allowed rise >= 0, a higher-is-better one's an allowed drop <= 0)."""
    name = "guardrails"
    if v is None:
        return []
    if not isinstance(v, list):
        raise _bad(name, "must be a list of {metric, threshold, unit}", v)
    spec = {m.key: m for m in metrics}
    out: list[dict[str, Any]] = []
    for i, g in enumerate(v):
        if not isinstance(g, dict) or "metric" not in g or "threshold" not in g:
            raise _bad(name, f"item {i} must be an object with 'metric' and 'threshold'", g)
        extra = sorted(set(g) - {"metric", "threshold", "unit"})
        if extra:
            raise _bad(
                name, f"item {i} has unknown keys {extra} (known: metric, threshold, unit)", g
            )
        m, t, unit = g["metric"], g["threshold"], g.get("unit", "absolute")
        if m not in spec:
            raise _bad(name, f"item {i} names unknown metric {m!r} (known: {sorted(spec)})", g)
        if m == (success or metrics[0].key):
            raise _bad(name, f"item {i} names the success metric {m!r}", g)
        if any(o["metric"] == m for o in out):
            raise _bad(name, f"item {i} repeats metric {m!r}", g)
        if isinstance(t, bool) or not isinstance(t, int | float) or not math.isfinite(t):
            raise _bad(name, f"item {i} needs a finite number as threshold", g)
        if unit not in ("absolute", "relative"):
            raise _bad(name, f"item {i} has unit {unit!r}; must be absolute or relative", g)
        if spec[m].direction == "lower" and t < 0:
            raise _bad(name, f"item {i}: {m!r} is lower-is-better, so its threshold (allowed rise) "
                       "must be >= 0", g)  # fmt: skip
        if spec[m].direction == "higher" and t > 0:
            raise _bad(name, f"item {i}: {m!r} is higher-is-better, so its threshold (allowed drop) "
                       "must be <= 0", g)  # fmt: skip
        out.append({"metric": m, "threshold": float(t), "unit": unit})
    return out


def _check(name: str, p: _Param, v: Any, fkeys: list[str], mkeys: list[str]) -> Any:
    if p.kind in ("int", "float"):
        ok_type = isinstance(v, int) and not isinstance(v, bool)
        if p.kind == "float":
            ok_type = ok_type or (isinstance(v, float) and math.isfinite(v))
        # the type first: comparing a text value with a bound would raise TypeError (a 500)
        lo_ok = ok_type and (v > p.lo if p.lo_open else v >= p.lo)
        if not ok_type or not lo_ok or not v <= p.hi:
            lo = "(" if p.lo_open else "["
            rng = p.note or f"in {lo}{p.lo:g}, {p.hi:g}]"
            raise _bad(name, f"must be {'an integer' if p.kind == 'int' else 'a number'} {rng}", v)
        return int(v) if p.kind == "int" else float(v)
    if p.kind == "features":
        if not isinstance(v, list | tuple) or not v or not all(isinstance(x, str) for x in v):
            raise _bad(name, "must be a non-empty list of feature keys", v)
        missing = [x for x in v if x not in fkeys]
        if missing:
            raise _bad(name, f"names unknown features {missing} (known: {fkeys})", v)
        if len(set(v)) != len(v):
            raise _bad(name, "must not repeat a feature", v)
        return list(v)
    if p.kind == "guardrails":
        return v  # checked with the metric specs in validate_params
    if p.kind == "choice":
        if v not in p.choices:
            raise _bad(name, f"must be one of {list(p.choices)}", v)
        return v
    if p.kind == "metric":
        if v not in mkeys:
            raise _bad(name, f"must be one of the metrics {mkeys}", v)
        return v
    if p.kind == "weights":
        if not isinstance(v, dict):
            raise _bad(name, "must map metric keys to weights >= 0", v)
        for k, w in v.items():
            if k not in mkeys:
                raise _bad(name, f"names unknown metric {k!r} (known: {mkeys})", v)
            if (
                isinstance(w, bool)
                or not isinstance(w, int | float)
                or not (w >= 0 and math.isfinite(w))
            ):
                raise _bad(name, f"weight of {k!r} must be a finite number >= 0", v)
        return {k: float(w) for k, w in v.items()}
    if p.kind == "bins":
        if not isinstance(v, dict):
            raise _bad(
                name, "must map numeric feature keys to a number of quantile bins (2..64)", v
            )
        for k, b in v.items():
            if isinstance(b, bool) or not isinstance(b, int) or not 2 <= b <= 64:
                raise _bad(name, f"bins of {k!r} must be an integer in [2, 64]", v)
        return {k: int(b) for k, b in v.items()}
    raise AssertionError(p.kind)


def _segment_bins(out: dict[str, Any], features: tuple[FeatureSpec, ...]) -> dict[str, int]:
    spec = {f.key: f for f in features}
    given = out["bins"] or {}
    for k in given:
        if k not in out["features"] or spec[k].kind != "numeric":
            raise _bad("bins", f"names {k!r}, which is not a numeric feature in 'features'", given)
    bins = {k: int(given.get(k, 4)) for k in out["features"] if spec[k].kind == "numeric"}
    cells = 1
    for k in out["features"]:
        cells *= bins[k] if k in bins else max(len(spec[k].levels), 1)
    if cells > MAX_SEGMENT_CELLS:
        raise _bad("features", f"give at most {MAX_SEGMENT_CELLS} cells in their cross product "
                   f"(these give {cells})", out["features"])  # fmt: skip
    return bins


# ---- fitting ---------------------------------------------------------------------------------


def fit_cohort_model(
    table: UnitTable,
    method: str,
    params: dict[str, Any] | None = None,
    *,
    success_metric: str | None = None,
    progress: Callable[[float], None] | None = None,
) -> CohortModelFit:
    """Fit `method` on `table`. The same table, params and seed give the same fit bit for bit."""
    t0 = time.perf_counter()
    params = dict(params or {})
    if success_metric is not None:
        if params.get("success_metric") not in (None, success_metric):
            raise _bad("success_metric", f"conflicts with the argument {success_metric!r}",
                       params["success_metric"])  # fmt: skip
        params["success_metric"] = success_metric
    p = validate_params(method, params, table)
    _check_table(table)
    report = progress or (lambda _f: None)
    report(0.0)
    features = tuple(table.feature(k) for k in p["features"])
    n, J = table.n, table.n_arms
    diag: dict[str, Any] = {}
    if method == "global":
        partition = Partition.single(features)
        cohort = np.zeros(n, dtype=np.int64)
        est = np.ones(n, dtype=bool)
    elif method == "segments":
        bins = bin_features(table, p["features"], p["bins"])
        rows = np.arange(n)
        y = criterion_outcomes(table, rows)
        weights = pair_weights(root_pair_variance(y, table.arm, J), np.ones(y.shape[1]))
        tree, leaf, cnode, n_coh = fit_segments(bins, table.arm, J, y, weights,
                                                p["min_units_per_arm"])  # fmt: skip
        partition = tree.to_partition(features, cnode, n_coh)
        cohort = cnode[leaf]
        est = np.ones(n, dtype=bool)
        diag.update(_tree_diag(tree, bins))
    elif method in DECISION_METHODS:
        tree, cnode, n_coh, cohort, est, bins, diag = fit_decision(
            table, method, p, lambda f: report(0.95 * f)
        )
        partition = tree.to_partition(features, cnode, n_coh)
        diag.update(_tree_diag(tree, bins))
    else:
        partition, cohort, est, diag = _fit_honest(table, method, p, features, report)
    C = partition.n_cohorts
    e = np.flatnonzero(est)
    moments = cell_moments(cohort[e], C, table.arm[e], J, table.component_matrix()[e],
                           table.component_names())  # fmt: skip
    estimates = metric_estimates(moments, table.metrics)
    shares = np.bincount(cohort, minlength=C) / n
    diag.update(
        method=method,
        n_cohorts=C,
        n_leaves=len(partition.leaves()),
        depth=partition.depth(),
        features_used=partition.used_features(),
        n_estimation=int(est.sum()),
        n_structure=int(n - est.sum()) if method in _HONEST else n,
        seconds=time.perf_counter() - t0,
    )
    report(1.0)
    return CohortModelFit(method, p, partition, shares, moments, estimates, est, diag)


def _check_table(table: UnitTable) -> None:
    if table.n == 0:
        raise InvalidInput(
            "the readout has no rows", errors=[{"field": "rows", "message": "empty"}]
        )
    for c in table.component_names():
        bad = np.flatnonzero(~np.isfinite(table.columns[c]))
        if bad.size:
            raise InvalidInput(
                f"column {c!r} has missing or infinite values in rows {bad[:5].tolist()}",
                errors=[{"column": c, "rows": bad[:5].tolist()}],
            )


def _fit_honest(
    table: UnitTable, method: str, p: dict[str, Any], features: Any, report: Any
) -> tuple[Any, Any, Any, dict[str, Any]]:
    """causal_tree and intersect: honest split, root standardizers, growth, estimation half."""
    est = honest_split(table.arm, p["seed"], p["estimation_fraction"])
    s_rows, e_rows = np.flatnonzero(~est), np.flatnonzero(est)
    if s_rows.size == 0 or e_rows.size == 0:
        raise _bad("estimation_fraction", "leaves one half of the rows empty",
                   p["estimation_fraction"])  # fmt: skip
    y = criterion_outcomes(table, s_rows)
    J = table.n_arms
    v = root_pair_variance(y[s_rows], table.arm[s_rows], J)
    w_metric = np.array([p.get("metric_weights", {}).get(m.key, 1.0) for m in table.metrics])
    keys = [m.key for m in table.metrics]
    order = keys.index(p["success_metric"]) if p["success_metric"] else 0
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_sd = np.nan_to_num(np.where(v > 0, 1.0 / np.sqrt(v), 0.0))
    spec = GrowSpec(
        weights=pair_weights(v, w_metric), inv_sd=inv_sd, n_arms=J, max_depth=p["max_depth"],
        min_units=p["min_units_per_arm"], min_gain=p["min_gain"], n_tr=int(s_rows.size),
        n_est=int(e_rows.size), order_metric=order,
    )  # fmt: skip
    bins = bin_features(table, p["features"], p["max_bins"])
    diag: dict[str, Any] = {}
    cv = method == "causal_tree" and p["cv_folds"] > 0
    if method == "causal_tree":
        grow_share = 1.0 / (1 + p["cv_folds"]) if cv else 1.0
        tree, leaf_s, leaf_e = grow(bins, s_rows, e_rows, table.arm, y, spec,
                                    lambda f: report(0.95 * grow_share * f))  # fmt: skip
        if cv:
            lam, grid, scores = cv_prune(tree, bins, s_rows, e_rows, table.arm, y, spec,
                                         p["cv_folds"], p["seed"], p["cv_rule"] == "one_se",
                                         lambda f: report(0.95 * (grow_share + (1 - grow_share) * f)))  # fmt: skip
            tree, old_to_new = tree.pruned(collapsed_at(pruning_sequence(tree), lam))
            leaf_s, leaf_e = old_to_new[leaf_s], old_to_new[leaf_e]
            diag.update(cv_penalty=lam, cv_grid=grid, cv_scores=scores)
        leaves = tree.leaves()
        cnode = np.full(len(tree), -1, dtype=np.int64)
        cnode[leaves] = np.arange(len(leaves))
        n_coh = len(leaves)
        cohort = np.empty(table.n, dtype=np.int64)
        cohort[s_rows], cohort[e_rows] = cnode[leaf_s], cnode[leaf_e]
    else:
        tree, leaf, cnode, n_coh, pair_trees = fit_intersect(
            bins, s_rows, e_rows, table.arm, y, spec, lambda f: report(0.95 * f)
        )
        cohort = cnode[leaf]
        diag["pair_tree_leaves"] = [len(t.leaves()) for t in pair_trees]
    partition = tree.to_partition(features, cnode, n_coh)
    diag.update(_tree_diag(tree, bins))
    diag["root_pair_variance"] = v.tolist()
    return partition, cohort, est, diag


def _tree_diag(tree: Tree, bins: FeatureBins) -> dict[str, Any]:
    splits = [
        {"node": i, "feature": bins.features[f].key, "gain": None if math.isnan(tree.gain[i])
         else float(tree.gain[i]), "depth": tree.depth[i]}
        for i, f in enumerate(tree.feature) if f >= 0
    ]  # fmt: skip
    return {"splits": splits}
