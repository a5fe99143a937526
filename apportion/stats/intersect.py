"""The `intersect` cohort model: one honest tree per (treated arm, metric) pair
with that pair's binary Athey-Imbens criterion, their leaves intersected into one exhaustive
partition (grafted into one tree), cells below the minimum merged into the neighbour with the
closest effects. Every tree also keeps `min_units` of every arm per leaf, which the final cells
need anyway.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace

import numpy as np

from apportion.stats.binning import FeatureBins
from apportion.stats.cells import cell_stats, graft, merge_small
from apportion.stats.tree import GrowSpec, Tree, grow


def fit_intersect(
    bins: FeatureBins,
    s_rows: np.ndarray,
    e_rows: np.ndarray,
    arm: np.ndarray,
    y: np.ndarray,
    spec: GrowSpec,
    progress: Callable[[float], None] | None = None,
) -> tuple[Tree, np.ndarray, np.ndarray, int, list[Tree]]:
    """Returns (grafted tree, leaf of every row, cohort of every node, n_cohorts, the pair trees).

    `spec.weights` (J-1, K) are the combined pair weights; each pair tree keeps only its own."""
    pairs = [(j, k) for j in range(spec.weights.shape[0]) for k in range(spec.weights.shape[1])]
    trees: list[Tree] = []
    for i, (j, k) in enumerate(pairs):
        w = np.zeros_like(spec.weights)
        w[j, k] = spec.weights[j, k]
        t, _, _ = grow(bins, s_rows, e_rows, arm, y, replace(spec, weights=w, order_metric=k))
        trees.append(t)
        if progress is not None:
            progress((i + 1) / len(pairs))
    tree, leaf_of_row, cell = graft(trees, bins.codes)
    leaves = sorted(cell)
    pos = np.full(len(tree), -1, dtype=np.int64)
    pos[leaves] = np.arange(len(leaves))
    cell_of_row = pos[leaf_of_row]
    L, J = len(leaves), spec.n_arms
    n_s, s, _ = cell_stats(cell_of_row[s_rows], L, arm[s_rows], J, y[s_rows])
    n_e = np.bincount(cell_of_row[e_rows] * J + arm[e_rows], minlength=L * J).reshape(L, J)
    tuples = np.array([cell[lf] for lf in leaves], dtype=np.int64).reshape(L, -1)
    group = merge_small(tuples, n_s, n_e, s, spec.weights, spec.min_units)
    cohort_of_node = np.full(len(tree), -1, dtype=np.int64)
    cohort_of_node[leaves] = group
    return tree, leaf_of_row, cohort_of_node, int(group.max()) + 1, trees
