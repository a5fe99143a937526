"""The `segments` cohort model: cohorts named by the caller, the cross product of categorical levels
and quantile bins of numeric features, with cells below the minimum merged into the neighbour whose
effects are closest. Returned as a `Partition` like every other cohort model.
"""

from __future__ import annotations

import numpy as np

from apportion.stats.binning import FeatureBins
from apportion.stats.cells import cell_stats, graft, merge_small
from apportion.stats.tree import Tree


def chain_tree(bins: FeatureBins, f: int) -> Tree:
    """One feature's groups as a chain of splits: group g_0 left, then g_1 left, ...

    Groups are the non-missing codes that hold rows. Missing values and unseen levels go to the
    largest group (the same rule as the causal tree's default direction)."""
    nb = int(bins.n_bins[f])
    B = nb - 1
    counts = np.bincount(bins.codes[f].astype(np.int64), minlength=nb)[:B]
    groups = [int(g) for g in np.flatnonzero(counts > 0)]
    tree = Tree()
    node = tree.add_leaf()
    if len(groups) < 2:
        return tree
    largest = groups[int(np.argmax(counts[groups]))]
    spec = bins.features[f]
    lv: tuple[str, ...]
    rv: tuple[str, ...]
    for i, g in enumerate(groups[:-1]):
        rest = groups[i + 1 :]
        default_left = largest == g
        lk = np.full(nb, default_left)
        if spec.kind == "numeric":
            lk[:B] = np.arange(B) < g + 1  # rows here have codes >= g, so left is exactly group g
            thr, lv, rv = float(bins.thresholds[f][g]), (), ()  # type: ignore[index]
        else:
            lk[groups] = False
            lk[g] = True
            thr, lv, rv = np.nan, (spec.levels[g],), tuple(spec.levels[r] for r in rest)
        _, node = tree.make_split(node, f, lk, default_left, thr, lv, rv, np.nan)
    return tree


def fit_segments(
    bins: FeatureBins,
    arm: np.ndarray,
    n_arms: int,
    y: np.ndarray,
    weights: np.ndarray,
    min_units: int,
) -> tuple[Tree, np.ndarray, np.ndarray, int]:
    """Returns (tree, leaf of every row, cohort of every node (-1 internal), number of cohorts).
    All rows are both the structure and the estimation rows (there is no search to be honest about).
    """
    trees = [chain_tree(bins, f) for f in range(len(bins.features))]
    tree, leaf_of_row, cell = graft(trees, bins.codes)
    leaves = sorted(cell)
    pos = np.full(len(tree), -1, dtype=np.int64)
    pos[leaves] = np.arange(len(leaves))
    cell_of_row = pos[leaf_of_row]
    n, s, _ = cell_stats(cell_of_row, len(leaves), arm, n_arms, y)
    tuples = np.array([cell[lf] for lf in leaves], dtype=np.int64).reshape(len(leaves), -1)
    group = merge_small(tuples, n, n, s, weights, min_units)
    cohort_of_node = np.full(len(tree), -1, dtype=np.int64)
    cohort_of_node[leaves] = group
    return tree, leaf_of_row, cohort_of_node, int(group.max()) + 1
