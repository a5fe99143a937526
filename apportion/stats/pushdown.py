"""Cohort models fitted where the rows live: the same fit as `models.fit_cohort_model`, with every
pass over the rows asked of an engine (`RowEngine`) that returns only small arrays.

The engine (DuckDB or Spark in `apportion.engines`, which compute these as SQL aggregations over the
readout's Parquet files) never hands rows back. This module keeps everything that decides the
fit: the honest split and the cross-validation folds (drawn here from the arm column exactly as
the in-memory fit draws them), the bins (from exact quantiles the engine computes), the growth
(`tree.grow_on` over the engine's per-level histograms), the pruning and the estimates. Hence the
in-memory fit and every engine give the same partition for the same readout, seed and parameters,
and the same estimates up to the order of floating-point additions.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import replace
from typing import Any, Protocol

import numpy as np

from apportion.errors import InvalidInput
from apportion.stats.binning import FeatureBins, thresholds_from_quantiles
from apportion.stats.estimates import CellMoments, metric_estimates
from apportion.stats.honest import honest_split, leaf_criterion, pair_weights
from apportion.stats.models import CohortModelFit, _bad, _tree_diag, validate_params
from apportion.stats.partition import Partition
from apportion.stats.prune import choose_penalty, collapsed_at, penalty_grid, pruning_sequence
from apportion.stats.table import FeatureSpec, MetricSpec
from apportion.stats.tree import GrowSpec, LevelHistograms, Tree, grow_on

PUSHDOWN_METHODS = ("global", "causal_tree")

ESTIMATION = 0  # row role: the estimation half; structure rows have role 1 + their CV fold


class RowEngine(Protocol):
    """Rows held by an engine. `features` carry their resolved categorical levels."""

    name: str
    n: int
    arm_keys: tuple[str, ...]
    design_shares: np.ndarray
    features: tuple[FeatureSpec, ...]
    metrics: tuple[MetricSpec, ...]

    def arm_codes(self) -> np.ndarray:
        """(n,) int8 arm code of every row, in the readout's row order (0 = control)."""
        ...

    def quantiles(
        self, keys: list[str], probs: np.ndarray
    ) -> dict[str, tuple[np.ndarray, float] | None]:
        """Per numeric feature of `keys`: its inverted-CDF quantiles at `probs` and its minimum,
        over the non-missing values; None when every value is missing."""
        ...

    def non_finite(self) -> dict[str, int]:
        """Per metric component column, the number of missing or infinite values."""
        ...

    def load(self, bins: FeatureBins, role: np.ndarray) -> None:
        """Keep per row its role (n,) int8, arm, bin codes of `bins` and metric components."""
        ...

    def standardize(self, roles: tuple[int, ...]) -> None:
        """Fix the criterion outcomes (`honest.criterion_outcomes`) on the rows of `roles`."""
        ...

    def histograms(self, s_roles: tuple[int, ...], n_arms: int) -> LevelHistograms:
        """Per-level histograms: structure rows are those of `s_roles`, estimation rows role 0."""
        ...

    def leaf_stats(
        self, tree: Tree, roles: tuple[int, ...], n_arms: int
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Counts (L, J), sums and sums of squares (L, J, K) of the criterion outcomes per
        (node, arm) on rows of `roles`, L = len(tree), indexed by the leaf each row reaches."""
        ...

    def cell_moments(
        self, tree: Tree, cohort_of_node: np.ndarray, n_cohorts: int, roles: tuple[int, ...]
    ) -> CellMoments:
        """`estimates.cell_moments` per (cohort, arm) on rows of `roles`."""
        ...

    def cohort_counts(self, tree: Tree, cohort_of_node: np.ndarray, n_cohorts: int) -> np.ndarray:
        """(C,) rows per cohort over all rows."""
        ...


def fit_on_engine(
    engine: RowEngine,
    method: str,
    params: dict[str, Any] | None = None,
    *,
    success_metric: str | None = None,
    progress: Callable[[float], None] | None = None,
) -> CohortModelFit:
    """`models.fit_cohort_model` for rows held by `engine` (methods in PUSHDOWN_METHODS)."""
    t0 = time.perf_counter()
    params = dict(params or {})
    if success_metric is not None:
        params["success_metric"] = params.get("success_metric") or success_metric
    p = validate_params(method, params, (engine.features, engine.metrics))
    if method not in PUSHDOWN_METHODS:
        raise _bad("method", f"is not fitted on the {engine.name} engine (it fits "
                   f"{list(PUSHDOWN_METHODS)}); use the in-memory engine", method)  # fmt: skip
    if engine.n == 0:
        raise InvalidInput(
            "the readout has no rows", errors=[{"field": "rows", "message": "empty"}]
        )
    bad = {c: k for c, k in engine.non_finite().items() if k}
    if bad:
        c = next(iter(bad))
        raise InvalidInput(f"column {c!r} has {bad[c]} missing or infinite values",
                           errors=[{"column": c, "rows": bad[c]}])  # fmt: skip
    report = progress or (lambda _f: None)
    report(0.0)
    features = tuple(engine.features[i] for i in _feature_index(engine, p["features"]))
    arm = engine.arm_codes()
    diag: dict[str, Any] = {}
    if method == "global":
        role = np.full(engine.n, ESTIMATION, dtype=np.int8)
        bins = _bins(engine, [], 2)
        engine.load(bins, role)
        tree, cnode, n_coh = _single()
        partition = Partition.single(features)
    else:
        role, tree, cnode, n_coh, diag = _fit_tree(engine, arm, p, report)
        partition = tree.to_partition(features, cnode, n_coh)
    moments = engine.cell_moments(tree, cnode, n_coh, (ESTIMATION,))
    estimates = metric_estimates(moments, engine.metrics)
    shares = engine.cohort_counts(tree, cnode, n_coh) / engine.n
    est = role == ESTIMATION
    n_est = int(est.sum())
    diag.update(
        method=method,
        engine=engine.name,
        n_cohorts=n_coh,
        n_leaves=len(partition.leaves()),
        depth=partition.depth(),
        features_used=partition.used_features(),
        n_estimation=n_est,
        n_structure=engine.n - n_est if method == "causal_tree" else engine.n,
        seconds=time.perf_counter() - t0,
    )
    report(1.0)
    return CohortModelFit(method, p, partition, shares, moments, estimates, est, diag)


def _feature_index(engine: RowEngine, keys: list[str]) -> list[int]:
    pos = {f.key: i for i, f in enumerate(engine.features)}
    return [pos[k] for k in keys]


def _single() -> tuple[Tree, np.ndarray, int]:
    tree = Tree()
    tree.add_leaf()
    return tree, np.zeros(1, dtype=np.int64), 1


def _bins(engine: RowEngine, keys: list[str], max_bins: int) -> FeatureBins:
    """The bin layout `binning.bin_features` gives, from the engine's exact quantiles."""
    specs = tuple(engine.features[i] for i in _feature_index(engine, keys))
    n_bins = np.empty(len(specs), dtype=np.int64)
    thresholds: list[np.ndarray | None] = []
    probs = np.arange(1, max_bins) / max_bins
    numeric = [f.key for f in specs if f.kind == "numeric"] if max_bins >= 2 else []
    quantiles = engine.quantiles(numeric, probs) if numeric else {}
    for i, f in enumerate(specs):
        if f.kind == "numeric":
            q = quantiles.get(f.key)
            thr = np.empty(0) if q is None else thresholds_from_quantiles(*q)
            n_bins[i] = thr.size + 2
            thresholds.append(thr)
        else:
            n_bins[i] = len(f.levels) + 1
            thresholds.append(None)
    codes = np.empty((len(specs), 0), dtype=np.uint8)  # the engine holds the codes
    return FeatureBins(features=specs, codes=codes, n_bins=n_bins, thresholds=tuple(thresholds))


def _roles(arm: np.ndarray, p: dict[str, Any]) -> tuple[np.ndarray, int]:
    """Role per row: 0 estimation, 1 + fold for structure rows; the split of
    `honest.honest_split` and the folds of `prune.cv_prune`, drawn the same way."""
    est = honest_split(arm, p["seed"], p["estimation_fraction"])
    folds = p["cv_folds"]
    role = np.where(est, ESTIMATION, 1).astype(np.int8)
    if folds > 0:
        s_rows = np.flatnonzero(~est)
        a_s = arm[s_rows]
        fold = np.empty(s_rows.size, dtype=np.int64)
        rng = np.random.default_rng([p["seed"], 1])
        for j in np.unique(a_s):
            r = np.flatnonzero(a_s == j)
            fold[r[rng.permutation(r.size)]] = np.arange(r.size) % folds
        role[s_rows] = 1 + fold
    return role, int(est.sum())


def _fit_tree(
    engine: RowEngine, arm: np.ndarray, p: dict[str, Any], report: Any
) -> tuple[Any, Tree, np.ndarray, int, dict[str, Any]]:
    role, n_est = _roles(arm, p)
    n_tr = engine.n - n_est
    if n_tr == 0 or n_est == 0:
        raise _bad("estimation_fraction", "leaves one half of the rows empty",
                   p["estimation_fraction"])  # fmt: skip
    del arm
    folds = p["cv_folds"]
    structure = tuple(range(1, folds + 1)) if folds > 0 else (1,)
    bins = _bins(engine, p["features"], p["max_bins"])
    engine.load(bins, role)
    engine.standardize(structure)
    J = len(engine.arm_keys)
    root, _, _ = _single()
    n, s, q = engine.leaf_stats(root, structure, J)
    with np.errstate(divide="ignore", invalid="ignore"):
        var = (q[0] - s[0] * s[0] / n[0][:, None]) / (n[0][:, None] - 1)  # (J, K), ddof = 1
    v = 0.5 * (var[1:] + var[:1])
    keys = [m.key for m in engine.metrics]
    w_metric = np.array([p["metric_weights"].get(k, 1.0) for k in keys])
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_sd = np.nan_to_num(np.where(v > 0, 1.0 / np.sqrt(v), 0.0))
    spec = GrowSpec(
        weights=pair_weights(v, w_metric), inv_sd=inv_sd, n_arms=J, max_depth=p["max_depth"],
        min_units=p["min_units_per_arm"], min_gain=p["min_gain"], n_tr=n_tr, n_est=n_est,
        order_metric=keys.index(p["success_metric"]) if p["success_metric"] else 0,
    )  # fmt: skip
    grow_share = 1.0 / (1 + folds)
    tree = grow_on(engine.histograms(structure, J), bins, spec,
                   lambda f: report(0.95 * grow_share * f))  # fmt: skip
    diag: dict[str, Any] = {}
    if folds > 0:
        lam, grid, scores = _cv_prune(engine, tree, bins, spec, folds, p["cv_rule"] == "one_se",
                                      lambda f: report(0.95 * (grow_share + (1 - grow_share) * f)))  # fmt: skip
        tree, _ = tree.pruned(collapsed_at(pruning_sequence(tree), lam))
        diag.update(cv_penalty=lam, cv_grid=grid, cv_scores=scores)
    leaves = tree.leaves()
    cnode = np.full(len(tree), -1, dtype=np.int64)
    cnode[leaves] = np.arange(len(leaves))
    diag.update(_tree_diag(tree, bins))
    diag["root_pair_variance"] = v.tolist()
    return role, tree, cnode, len(leaves), diag


def _cv_prune(engine: RowEngine, tree: Tree, bins: FeatureBins, spec: GrowSpec, folds: int,
              one_se: bool, progress: Callable[[float], None]) -> tuple[Any, Any, list[float]]:  # fmt: skip
    """`prune.cv_prune` with the folds' rows held by the engine: each fold's tree grows on the
    other folds, and its held-out criterion comes from per-leaf statistics of the held-out fold
    summed into the pruned tree's leaves."""
    grid = penalty_grid(pruning_sequence(tree))
    scores = np.zeros((folds, len(grid)))
    J = spec.n_arms
    for f in range(folds):
        train = tuple(r for r in range(1, folds + 1) if r != f + 1)
        n_leaf, _, _ = engine.leaf_stats(_single()[0], train, J)
        sub = replace(spec, n_tr=int(n_leaf.sum()))
        t_f = grow_on(engine.histograms(train, J), bins, sub)
        seq = pruning_sequence(t_f)
        n, s, q = engine.leaf_stats(t_f, (f + 1,), J)
        n_te = int(n.sum())
        for g, lam in enumerate(grid):
            _, old_to_new = t_f.pruned(collapsed_at(seq, lam))
            scores[f, g] = _grouped_score(old_to_new, n, s, q, spec, n_te)
        progress((f + 1) / folds)
    best = choose_penalty(scores, one_se)
    return grid[best], grid, scores.mean(axis=0).tolist()


def _grouped_score(
    old_to_new: np.ndarray,
    n: np.ndarray,
    s: np.ndarray,
    q: np.ndarray,
    spec: GrowSpec,
    n_te: int,
) -> float:
    """`prune._score` from per-leaf statistics: the leaves' sums added into the pruned groups."""
    G = int(old_to_new.max()) + 1
    ng = np.zeros((G,) + n.shape[1:])
    sg = np.zeros((G,) + s.shape[1:])
    qg = np.zeros((G,) + q.shape[1:])
    np.add.at(ng, old_to_new, n)
    np.add.at(sg, old_to_new, s)
    np.add.at(qg, old_to_new, q)
    crit = leaf_criterion(ng, sg, qg, spec.weights, n_te, spec.n_est)  # empty groups give NaN
    return float(np.nansum(crit))
