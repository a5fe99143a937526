"""Common refinements of several trees, and the merging of cells that are too small.

`graft` builds the intersection of trees as ONE tree: every leaf of tree t carries a copy of tree
t+1, and a copied split whose one side holds no rows is skipped (its rows all go the other way),
so the result has only non-empty cells and still routes every possible unit to exactly one leaf.
`merge_small` then joins cells below the minimum with the neighbouring cell whose effects are
closest; several leaves then map to one cohort.
"""

from __future__ import annotations

import heapq

import numpy as np

from apportion.stats.tree import Tree


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
    adj = _neighbours(tuples)
    gn_s, gn_e, gs = n_s.astype(np.float64), n_e.astype(np.float64), sums.astype(np.float64)
    low = np.minimum(gn_s.min(axis=1), gn_e.min(axis=1))
    size = gn_s.sum(axis=1) + gn_e.sum(axis=1)
    owner = np.arange(L)  # the group each cell belongs to, kept up to date for merged groups
    members: dict[int, list[int]] = {c: [c] for c in range(L)}
    alive = np.ones(L, dtype=bool)
    heap = [(float(size[c]), c) for c in range(L) if low[c] < min_units]
    heapq.heapify(heap)
    n_alive = L
    while heap and n_alive > 1:
        sz, g = heapq.heappop(heap)
        if not alive[g] or sz != size[g] or low[g] >= min_units:
            continue  # a stale entry
        cand = np.array(sorted(adj[g]), dtype=np.int64)
        if cand.size == 0:
            cand = np.flatnonzero(alive & (np.arange(L) != g))
        h = _closest(g, cand, gn_s, gs, weights, size)
        for x in adj[g]:
            adj[x].discard(g)
            if x != h:
                adj[x].add(h)
                adj[h].add(x)
        adj[h].discard(g)
        adj[g] = set()
        owner[members[g]] = h
        members[h] += members.pop(g)
        gn_s[h] += gn_s[g]
        gn_e[h] += gn_e[g]
        gs[h] += gs[g]
        low[h] = min(gn_s[h].min(), gn_e[h].min())
        size[h] += size[g]
        alive[g] = False
        n_alive -= 1
        if low[h] < min_units:
            heapq.heappush(heap, (float(size[h]), h))
    _, first, inv = np.unique(owner, return_index=True, return_inverse=True)
    rank = np.empty(first.size, dtype=np.int64)
    rank[np.argsort(first)] = np.arange(first.size)  # renumber groups by their first cell
    return rank[inv]


def _neighbours(tuples: np.ndarray) -> list[set[int]]:
    """Cells that share all coordinates but one, as sets per cell."""
    L, T = tuples.shape
    adj: list[set[int]] = [set() for _ in range(L)]
    for t in range(T):
        key = np.delete(tuples, t, axis=1)
        if key.shape[1] == 0:
            key = np.zeros((L, 1), dtype=np.int64)
        _, inv = np.unique(key, axis=0, return_inverse=True)
        order = np.argsort(inv.ravel(), kind="stable")
        bounds = np.flatnonzero(np.diff(inv.ravel()[order])) + 1
        for bucket in np.split(order, bounds):
            if bucket.size > 1:
                b = set(bucket.tolist())
                for c in bucket.tolist():
                    adj[c] |= b - {c}
    return adj


def _closest(
    g: int,
    cand: np.ndarray,
    gn_s: np.ndarray,
    gs: np.ndarray,
    weights: np.ndarray,
    size: np.ndarray,
) -> int:
    """The candidate group whose standardized lifts are closest to group g's (weighted squared
    distance); when no distance is defined, the largest candidate."""
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = gs[cand] / gn_s[cand][..., None]
        tau = mean[:, 1:] - mean[:, :1]
        mg = gs[g] / gn_s[g][:, None]
        tau_g = mg[1:] - mg[:1]
        d = np.einsum("cjk,jk->c", (tau - tau_g) ** 2, weights)
    d = np.where(np.isfinite(d), d, np.inf)
    if np.isfinite(d).any():
        return int(cand[np.argmin(d)])
    return int(cand[np.argmax(size[cand])])
