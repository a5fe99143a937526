"""Member-level outcome models: predictions mu_jq(X) of every metric component
q under every arm j, made for each row without that row's outcome, so they can feed the doubly
robust scores of `apportion.stats.dr`.

* `boosted_outcomes`: the two-model (T-learner) family of Kunzel, Sekhon, Bickel and Yu (2019): one
  scikit-learn HistGradientBoostingRegressor per (arm, component), cross-fitted over folds
  stratified by arm.
* `fit_forest` / `Forest`: an honest causal forest in the sense of Wager and Athey (2018): many
  honest multi-arm trees (the grower of `apportion.stats.tree`), each grown on a random subsample
  without replacement that is split into a structure half (chooses the splits) and an estimation
  half (fills the leaves), and a random subset of the features per tree. The forest's estimate
  is the average of the trees' leaf means, as in Wager and Athey's definition; a row's
  out-of-bag prediction averages only the trees whose subsample left it out.
* `arm_mean_outcomes`: the cross-fitted arm means (the outcome model of the plain AIPW score).
"""

from __future__ import annotations

import math
import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np

from apportion.stats.binning import FeatureBins
from apportion.stats.honest import pair_weights, root_pair_variance
from apportion.stats.table import UnitTable
from apportion.stats.tree import GrowSpec, Tree, grow

Progress = Callable[[float], None]


def _quiet(_f: float) -> None:
    return None


def feature_matrix(table: UnitTable, keys: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """(n, d) float64 features for scikit-learn (NaN = missing; categorical levels as their codes)
    and the (d,) bool mask of the categorical columns it may treat natively (<= 255 levels)."""
    cols, cat = [], []
    for k in keys:
        f = table.feature(k)
        v = table.feature_values[k]
        if f.kind == "categorical":
            cols.append(np.where(v < 0, np.nan, v).astype(np.float64))
            cat.append(len(f.levels) <= 255)
        else:
            cols.append(np.asarray(v, dtype=np.float64))
            cat.append(False)
    x = np.column_stack(cols) if cols else np.empty((table.n, 0))
    return x, np.array(cat, dtype=bool)


def arm_mean_outcomes(
    values: np.ndarray, arm: np.ndarray, n_arms: int, folds: np.ndarray
) -> np.ndarray:
    """(n, J, Q): for rows of fold f, each arm's component means over the rows outside f."""
    n, q = values.shape
    out = np.empty((n, n_arms, q))
    for f in np.unique(folds):
        train, test = folds != f, folds == f
        cnt = np.bincount(arm[train], minlength=n_arms).astype(np.float64)
        for c in range(q):
            s = np.bincount(arm[train], weights=values[train, c], minlength=n_arms)
            with np.errstate(invalid="ignore", divide="ignore"):
                out[test, :, c] = np.nan_to_num(s / cnt)[None, :]
    return out


@dataclass(frozen=True)
class BoostSettings:
    """scikit-learn HistGradientBoostingRegressor settings of the two-model fit (scikit-learn's defaults
    where they serve, except the row cap, which bounds the cost at a million units)."""

    learning_rate: float = 0.05
    max_iter: int = 300
    max_leaf_nodes: int = 15
    min_samples_leaf: int = 200
    l2_regularization: float = 1.0
    max_train_rows: int = 100_000
    n_jobs: int = 0  # fits run at once (threads); 0: one per core


def boosted_outcomes(
    x: np.ndarray,
    categorical: np.ndarray,
    values: np.ndarray,
    arm: np.ndarray,
    n_arms: int,
    folds: np.ndarray,
    settings: BoostSettings,
    seed: int,
    progress: Progress = _quiet,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Cross-fitted predictions (n, J, Q): rows of fold f get the models fitted on arm j's rows
    outside f (at most `max_train_rows` of them, drawn at random). Early stopping on a 10 %
    validation split; random_state is fixed per (fold, arm, component), so a seed reproduces
    the predictions exactly. Also returns the out-of-fold R^2 per component (diagnostics)."""
    from sklearn.ensemble import HistGradientBoostingRegressor
    from threadpoolctl import threadpool_limits

    n, q = values.shape
    fold_ids = np.unique(folds)
    out = np.empty((n, n_arms, q))
    rng = np.random.default_rng(seed)
    tasks = []  # (fold index, test rows, arm, train rows), subsamples drawn in a fixed order
    for fi, f in enumerate(fold_ids):
        test = np.flatnonzero(folds == f)
        for j in range(n_arms):
            train = np.flatnonzero((folds != f) & (arm == j))
            if train.size > settings.max_train_rows:
                train = np.sort(rng.choice(train, settings.max_train_rows, replace=False))
            tasks.append((fi, test, j, train))
    total = len(tasks) * q
    done = [0]
    lock = threading.Lock()

    def run(task: tuple[int, np.ndarray, int, np.ndarray]) -> list[int]:
        fi, test, j, train = task
        iters = []
        xt = x[train]
        for c in range(q):
            y = values[train, c]
            if train.size < 2 * settings.min_samples_leaf or np.ptp(y) == 0:
                out[test, j, c] = y.mean() if y.size else 0.0
            else:
                model = HistGradientBoostingRegressor(
                    learning_rate=settings.learning_rate,
                    max_iter=settings.max_iter,
                    max_leaf_nodes=settings.max_leaf_nodes,
                    min_samples_leaf=settings.min_samples_leaf,
                    l2_regularization=settings.l2_regularization,
                    categorical_features=categorical if categorical.any() else None,
                    early_stopping=True,
                    validation_fraction=0.1,
                    n_iter_no_change=10,
                    random_state=(seed * 7919 + fi * 101 + j * 11 + c) % (2**31 - 1),
                )
                model.fit(xt, y)
                out[test, j, c] = model.predict(x[test])
                iters.append(int(model.n_iter_))
            with lock:
                done[0] += 1
                progress(done[0] / total)
        return iters

    # One OpenMP thread per fit and the fits spread over the cores: on a busy machine OpenMP's
    # threads inside each fit contend (measured 10x slower than one thread on a loaded 2-core
    # host); separate fits release the GIL in scikit-learn's compiled loops.
    workers = max(1, min(settings.n_jobs or (os.cpu_count() or 1), len(tasks)))
    with threadpool_limits(limits=1, user_api="openmp"):
        if workers == 1:
            results = [run(t) for t in tasks]
        else:
            with ThreadPoolExecutor(max_workers=workers) as pool:
                results = list(pool.map(run, tasks))
    iters = [i for r in results for i in r]
    rows = np.arange(n)
    resid = values - out[rows, arm]
    var = values.var(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r2 = np.where(var > 0, 1.0 - resid.var(axis=0) / var, 0.0)
    diag = {
        "out_of_fold_r2": [round(float(v), 4) for v in r2],
        "boosting_iterations": [min(iters), max(iters)] if iters else [],
    }
    return out, diag


# ---- the honest causal forest ------------------------------------------------------------------


@dataclass(frozen=True)
class ForestSettings:
    n_trees: int = 100
    sample_fraction: float = 0.5  # of the rows the forest is fitted on, per tree
    max_tree_units: int = 40_000  # cap on a tree's subsample (cost at a million units)
    max_depth: int = 8
    min_units: int = 25  # per arm, on both halves of every leaf
    mtry: int | None = None  # features per tree; None: min(ceil(sqrt(d)) + 20, d) [M]


@dataclass(frozen=True)
class Forest:
    """B honest trees over binned features; `leaf_mean[b]` is (nodes_b, J, Q), filled at leaves
    from tree b's estimation half; `features[b]` the feature indexes tree b was grown on;
    `inbag[b]` its subsample (sorted row indexes into the table)."""

    trees: tuple[Tree, ...]
    features: tuple[np.ndarray, ...]
    leaf_mean: tuple[np.ndarray, ...]
    inbag: tuple[np.ndarray, ...]

    def predict(self, codes: np.ndarray, rows: np.ndarray, out_of_bag: bool = True) -> np.ndarray:
        """(len(rows), J, Q) average of the trees' leaf means for `rows` of the binned `codes`
        (F, n). With `out_of_bag`, a row skips the trees whose subsample held it (a row held by
        every tree gets the plain average)."""
        j, q = self.leaf_mean[0].shape[1:]
        acc = np.zeros((rows.size, j, q))
        cnt = np.zeros(rows.size)
        held = np.zeros(codes.shape[1], dtype=bool)
        trees = zip(self.trees, self.features, self.leaf_mean, self.inbag, strict=True)
        for tree, feats, lm, bag in trees:
            leaf = tree.route(codes[feats], rows)
            if out_of_bag:
                held[bag] = True
                use = ~held[rows]
                held[bag] = False
                acc[use] += lm[leaf[use]]
                cnt[use] += 1
            else:
                acc += lm[leaf]
                cnt += 1
        none = cnt == 0
        if none.any():  # held by every tree: fall back to all trees
            acc[none] = self.predict(codes, rows[none], out_of_bag=False)
            cnt[none] = 1
        return acc / cnt[:, None, None]


def fit_forest(
    bins: FeatureBins,
    rows: np.ndarray,
    arm: np.ndarray,
    y: np.ndarray,
    values: np.ndarray,
    n_arms: int,
    settings: ForestSettings,
    seed: int,
    progress: Progress = _quiet,
) -> Forest:
    """Grow `settings.n_trees` honest trees on subsamples of `rows`.

    y: (n, K) criterion outcomes (standardized metrics, as the causal tree uses); values: (n, Q)
    metric components whose per-arm leaf means the trees store. Every tree uses the existing
    grower unchanged: equal pair weights from the root variance of the forest's rows, no
    pruning, `min_units` per arm on both halves of every leaf."""
    rng = np.random.default_rng(seed)
    d = bins.codes.shape[0]
    mtry = settings.mtry or min(math.ceil(math.sqrt(d)) + 20, d)
    mtry = max(1, min(mtry, d))
    v = root_pair_variance(y[rows], arm[rows], n_arms)
    weights = pair_weights(v, np.ones(y.shape[1]))
    with np.errstate(divide="ignore", invalid="ignore"):
        inv_sd = np.nan_to_num(np.where(v > 0, 1.0 / np.sqrt(v), 0.0))
    size = int(min(max(settings.sample_fraction * rows.size, 4 * n_arms), settings.max_tree_units))
    size = min(size, rows.size)
    q = values.shape[1]
    trees, feats, means, bags = [], [], [], []
    for b in range(settings.n_trees):
        bag = np.sort(rng.choice(rows, size, replace=False))
        half = rng.random(size) < 0.5
        s_rows, e_rows = bag[~half], bag[half]
        fsel = np.sort(rng.choice(d, mtry, replace=False))
        sub = FeatureBins(
            features=tuple(bins.features[i] for i in fsel),
            codes=bins.codes[fsel],
            n_bins=bins.n_bins[fsel],
            thresholds=tuple(bins.thresholds[i] for i in fsel),
        )
        spec = GrowSpec(
            weights=weights, inv_sd=inv_sd, n_arms=n_arms, max_depth=settings.max_depth,
            min_units=settings.min_units, min_gain=0.0, n_tr=int(s_rows.size),
            n_est=int(e_rows.size), order_metric=0,
        )  # fmt: skip
        tree, _, leaf_e = grow(sub, s_rows, e_rows, arm, y, spec)
        nodes = len(tree)
        idx = leaf_e * n_arms + arm[e_rows]
        cnt = np.bincount(idx, minlength=nodes * n_arms).astype(np.float64)
        lm: np.ndarray = np.empty((nodes * n_arms, q))
        for c in range(q):
            s = np.bincount(idx, weights=values[e_rows, c], minlength=nodes * n_arms)
            with np.errstate(invalid="ignore", divide="ignore"):
                lm[:, c] = s / cnt
        lm = lm.reshape(nodes, n_arms, q)
        if not np.isfinite(lm[tree.leaves()]).all():  # an arm missing from a leaf's half
            root = np.array([values[e_rows][arm[e_rows] == j].mean(axis=0) for j in range(n_arms)])
            lm = np.where(np.isfinite(lm), lm, root[None])
        trees.append(tree)
        feats.append(fsel)
        means.append(lm)
        bags.append(bag)
        progress((b + 1) / settings.n_trees)
    return Forest(tuple(trees), tuple(feats), tuple(means), tuple(bags))


def forest_outcomes(
    bins: FeatureBins,
    rows: np.ndarray,
    arm: np.ndarray,
    y: np.ndarray,
    values: np.ndarray,
    n_arms: int,
    settings: ForestSettings,
    seed: int,
    progress: Progress = _quiet,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Out-of-bag forest predictions (len(rows), J, Q) for `rows`, and diagnostics."""
    forest = fit_forest(bins, rows, arm, y, values, n_arms, settings, seed,
                        lambda f: progress(0.8 * f))  # fmt: skip
    pred = forest.predict(bins.codes, rows, out_of_bag=True)
    progress(1.0)
    leaves = [len(t.leaves()) for t in forest.trees]
    used = np.zeros(bins.codes.shape[0])
    for t, fs in zip(forest.trees, forest.features, strict=True):
        for node_f in t.feature:
            if node_f >= 0:
                used[fs[node_f]] += 1
    diag = {
        "trees": len(forest.trees),
        "tree_units": int(forest.inbag[0].size),
        "leaves_per_tree": [min(leaves), max(leaves)],
        "splits_per_feature": {bins.features[i].key: int(used[i]) for i in np.flatnonzero(used)},
    }
    return pred, diag
