"""Common refinements of several trees, and the merging of cells that are too small.

`graft` builds the intersection of trees as ONE tree: every leaf of tree t carries a copy of tree
t+1, and a copied split whose one side holds no rows is skipped (its rows all go the other way),
so the result has only non-empty cells and still routes every possible unit to exactly one leaf.
`merge_small` then joins cells below the minimum with the neighbouring cell whose effects are
closest (methods §1.3 [S]); several leaves then map to one cohort.
"""

from __future__ import annotations

import numpy as np

from service.stats.tree import Tree


def graft(
    trees: list[Tree], codes: np.ndarray
) -> tuple[Tree, np.ndarray, dict[int, tuple[int, ...]]]:
    """Intersect `trees` (over the same binned `codes` (F, n)).

    Returns the grafted tree, the leaf of every row, and the cell tuple of every leaf: the leaf of
    each input tree that the leaf's rows reach."""
    out = Tree()
    out.add_leaf()
    n = codes.shape[1]
    leaf_of_row = np.empty(n, dtype=np.int64)
    cell: dict[int, tuple[int, ...]] = {}

    def build(onode: int, t: int, tnode: int, rows: np.ndarray, tup: tuple[int, ...]) -> None:
        while True:
            if t == len(trees):
                leaf_of_row[rows] = onode
                cell[onode] = tup
                return
            tr = trees[t]
            if tr.feature[tnode] < 0:
                tup, t, tnode = tup + (tnode,), t + 1, 0
                continue
            go_left = tr.lookup[tnode][codes[tr.feature[tnode], rows]]  # type: ignore[index]
            lr, rr = rows[go_left], rows[~go_left]
            if lr.size == 0 or rr.size == 0:  # an empty side: skip the split
                tnode = tr.left[tnode] if rr.size == 0 else tr.right[tnode]
                continue
            lc, rc = out.copy_split(onode, tr, tnode)
            build(lc, t, tr.left[tnode], lr, tup)
            build(rc, t, tr.right[tnode], rr, tup)
            return

    build(0, 0, 0, np.arange(n), ())
    return out, leaf_of_row, cell


def cell_stats(
    cell_of_row: np.ndarray, n_cells: int, arm: np.ndarray, n_arms: int, y: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts (L, J), sums and sums of squares (L, J, K) of `y` (n, K) per (cell, arm)."""
    J, K = n_arms, y.shape[1]
    idx = cell_of_row * J + arm
    size = n_cells * J
    n = np.bincount(idx, minlength=size).reshape(n_cells, J)
    s = np.stack([np.bincount(idx, y[:, k], size) for k in range(K)], axis=-1)
    q = np.stack([np.bincount(idx, y[:, k] ** 2, size) for k in range(K)], axis=-1)
    return n, s.reshape(n_cells, J, K), q.reshape(n_cells, J, K)


def merge_small(
    tuples: np.ndarray,
    n_s: np.ndarray,
    n_e: np.ndarray,
    sums: np.ndarray,
    weights: np.ndarray,
    min_units: int,
) -> np.ndarray:
    """Group per cell (L,) after greedy merging, groups numbered 0.. in order of first cell.

    tuples: (L, T) cell coordinates; two cells are neighbours when they differ in one coordinate.
    n_s, n_e: (L, J) counts on the structure / estimation rows; sums: (L, J, K) structure sums
    (effects compare standardized lifts with the pair weights (J-1, K)). The smallest violating
    group (fewest units) joins the neighbouring group with the closest effects, until every group
    has `min_units` of every arm on both halves or only one group is left."""
    L = tuples.shape[0]
    group = np.arange(L)
    gn_s, gn_e, gs = n_s.astype(np.float64), n_e.astype(np.float64), sums.copy()
    alive = np.ones(L, dtype=bool)
    while alive.sum() > 1:
        low = np.minimum(gn_s.min(axis=1), gn_e.min(axis=1))
        viol = np.flatnonzero(alive & (low < min_units))
        if viol.size == 0:
            break
        size = gn_s.sum(axis=1) + gn_e.sum(axis=1)
        g = int(viol[np.argmin(size[viol])])
        members = tuples[group == g]
        one_off = ((members[:, None, :] != tuples[None, :, :]).sum(axis=-1) == 1).any(axis=0)
        cand = np.unique(group[one_off])
        cand = cand[cand != g]
        if cand.size == 0:
            cand = np.flatnonzero(alive & (np.arange(L) != g))
        with np.errstate(divide="ignore", invalid="ignore"):
            mean = gs[cand] / gn_s[cand][..., None]
            tau = mean[:, 1:] - mean[:, :1]
            mg = gs[g] / gn_s[g][:, None]
            tau_g = mg[1:] - mg[:1]
            d = np.einsum("cjk,jk->c", (tau - tau_g) ** 2, weights)
        d = np.where(np.isfinite(d), d, np.inf)
        h = int(cand[np.argmin(d)]) if np.isfinite(d).any() else int(cand[np.argmax(size[cand])])
        group[group == g] = h
        gn_s[h] += gn_s[g]
        gn_e[h] += gn_e[g]
        gs[h] += gs[g]
        alive[g] = False
    _, first = np.unique(group, return_index=True)
    order = np.argsort(first)  # renumber by first cell
    renum = np.empty(L, dtype=np.int64)
    renum[np.unique(group)[order]] = np.arange(order.size)
    return renum[group]
