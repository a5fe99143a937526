"""Weakest-link pruning (Breiman et al. 1984, ch. 3) and the K-fold choice of the penalty per leaf
for the honest criterion (Athey and Imbens 2016).

The penalized criterion is Crit(tree) - lambda * n_leaves. The gain of a split is the criterion
change it brings, so a branch's improvement over its root is the sum of the gains inside it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace

import numpy as np

from apportion.stats.binning import FeatureBins
from apportion.stats.honest import leaf_criterion
from apportion.stats.tree import GrowSpec, Tree, grow


def pruning_sequence(tree: Tree) -> list[tuple[float, int]]:
    """[(alpha_k, node_k)]: collapsing node_1, node_2, ... in order gives the nested optimal
    subtrees; subtree k is optimal for penalties in [alpha_k, alpha_{k+1})."""
    n = len(tree)
    internal = [i for i in range(n) if tree.feature[i] >= 0]
    branch_gain = np.zeros(n)
    branch_leaves = np.ones(n, dtype=np.int64)
    for i in reversed(range(n)):  # children come after parents
        if tree.feature[i] >= 0:
            lc, rc = tree.left[i], tree.right[i]
            branch_gain[i] = tree.gain[i] + branch_gain[lc] + branch_gain[rc]
            branch_leaves[i] = branch_leaves[lc] + branch_leaves[rc]
    alive = set(internal)
    out: list[tuple[float, int]] = []
    alpha = 0.0
    while alive:
        cand = sorted(alive)
        g = [branch_gain[t] / (branch_leaves[t] - 1) for t in cand]
        t = cand[int(np.argmin(g))]
        alpha = max(alpha, float(min(g)))
        out.append((alpha, t))
        # remove t's branch and update its ancestors
        stack = [t]
        while stack:
            u = stack.pop()
            alive.discard(u)
            if tree.feature[u] >= 0:
                stack += [tree.left[u], tree.right[u]]
        dg, dl = branch_gain[t], branch_leaves[t] - 1
        p = tree.parent[t]
        while p >= 0:
            branch_gain[p] -= dg
            branch_leaves[p] -= dl
            p = tree.parent[p]
    return out


def collapsed_at(sequence: list[tuple[float, int]], lam: float) -> set[int]:
    """Nodes made leaves in the subtree optimal for penalty `lam`."""
    return {node for alpha, node in sequence if alpha <= lam}


def penalty_grid(sequence: list[tuple[float, int]]) -> list[float]:
    """0 and the geometric midpoints of consecutive breakpoints, as CART does."""
    alphas = sorted({a for a, _ in sequence})
    grid = [0.0]
    if not alphas:  # a tree without splits has nothing to prune: only the zero penalty
        return grid
    for a, b in zip(alphas, alphas[1:] + [alphas[-1] * 2], strict=True):
        grid.append(float(np.sqrt(a * b)) if a > 0 else b / 2)
    return sorted(set(grid))


def _score(
    group: np.ndarray, arm: np.ndarray, y: np.ndarray, spec: GrowSpec, n_groups: int
) -> float:
    """The honest criterion of a partition scored on held-out rows (AI 2016: the same expression
    on the cross-validation sample); leaves with fewer than two held-out units of an arm add 0."""
    J, K = spec.n_arms, y.shape[1]
    idx = group * J + arm
    size = n_groups * J
    n = np.bincount(idx, minlength=size).reshape(n_groups, J)
    s = np.stack([np.bincount(idx, y[:, k], size) for k in range(K)], axis=-1)
    q = np.stack([np.bincount(idx, y[:, k] ** 2, size) for k in range(K)], axis=-1)
    crit = leaf_criterion(n, s.reshape(n_groups, J, K), q.reshape(n_groups, J, K),
                          spec.weights, group.size, spec.n_est)  # fmt: skip
    return float(np.nansum(crit))


def cv_prune(
    tree: Tree,
    bins: FeatureBins,
    s_rows: np.ndarray,
    e_rows: np.ndarray,
    arm: np.ndarray,
    y: np.ndarray,
    spec: GrowSpec,
    folds: int,
    seed: int,
    one_se: bool = True,
    progress: Callable[[float], None] | None = None,
) -> tuple[float, list[float], list[float]]:
    """Choose the penalty per leaf by `folds`-fold cross-validation inside the structure rows.

    Returns (chosen lambda, grid, mean held-out criterion per grid value). With `one_se` the
    largest penalty whose mean score is within one standard error (across folds) of the best is
    chosen, the one-standard-error rule of Breiman et al. (1984, §3.4.3); otherwise the best, ties
    going to the larger penalty (the smaller tree)."""
    grid = penalty_grid(pruning_sequence(tree))
    rng = np.random.default_rng([seed, 1])  # folds stratified by arm, independent of the split
    fold = np.empty(s_rows.size, dtype=np.int64)
    a_s = arm[s_rows]
    for j in np.unique(a_s):
        r = np.flatnonzero(a_s == j)
        fold[r[rng.permutation(r.size)]] = np.arange(r.size) % folds
    scores = np.zeros((folds, len(grid)))
    for f in range(folds):
        tr, te = s_rows[fold != f], s_rows[fold == f]
        sub = replace(spec, n_tr=int(tr.size))
        t_f, _, _ = grow(bins, tr, e_rows, arm, y, sub)
        seq = pruning_sequence(t_f)
        leaf_te = t_f.route(bins.codes, te)
        for g, lam in enumerate(grid):
            _, old_to_new = t_f.pruned(collapsed_at(seq, lam))
            grp = old_to_new[leaf_te]
            scores[f, g] = _score(grp, arm[te], y[te], spec, int(grp.max()) + 1)
        if progress is not None:
            progress((f + 1) / folds)
    return grid[choose_penalty(scores, one_se)], grid, scores.mean(axis=0).tolist()


def choose_penalty(scores: np.ndarray, one_se: bool) -> int:
    """Index of the chosen penalty from held-out scores (folds, grid): the best mean, ties going to
    the larger penalty; with `one_se` the largest penalty within one standard error of it."""
    mean = scores.mean(axis=0)
    best: int = scores.shape[1] - 1 - int(np.argmax(mean[::-1]))
    if one_se:
        se = scores[:, best].std(ddof=1) / np.sqrt(scores.shape[0])
        best = int(np.flatnonzero(mean >= mean[best] - se).max())
    return best
