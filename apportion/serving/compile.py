"""Compiling a partition for the batch lookup: every node's fields as flat, read-only numpy arrays
(a `FlatTree`), and, when small enough, one (node, code) -> next node table, so the batch walk
(`serving/batch.py`) is a few gathers per tree level for all members at once."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from apportion.stats.partition import Partition

# The batch walk's (node, code) -> next node table is kept while it has at most this many cells
# (8 bytes each, 16 MiB); beyond, the walk compares numeric codes instead (`compile_tree`).
TABLE_CELLS = 1 << 21


def frozen(a: np.ndarray) -> np.ndarray:
    """A read-only copy."""
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, slots=True)
class FlatTree:
    """One compiled tree, node i's fields at index i of each `node_*` array (n nodes).

    A value becomes a small integer code before the walk: a categorical level its index in
    `level_codes[feature]`, a number the count of `cuts[feature]` (the feature's distinct split
    thresholds, ascending) at or below it; `missing_code` stands for missing, NaN or an unknown
    level. `node_rank[i]` is the code at and below which a numeric node sends a value left;
    `node_directions[i, code]` a categorical node's direction (1 left, 0 right, -1 default; the
    last column for every code past the levels). Leaves point at themselves, so a walk of
    `depth` steps ends on a leaf whatever the path's length. `next_node` / `defaulted` (flat
    (n * width,), or None when larger than `TABLE_CELLS`): the next node of (node, code) at
    `node * width + code`, and whether that step took the node's default."""

    depth: int
    level_codes: tuple[dict[str, int], ...]
    cuts: tuple[np.ndarray, ...]
    missing_code: int
    width: int
    next_node: np.ndarray | None
    defaulted: np.ndarray | None
    is_leaf: np.ndarray
    node_feature: np.ndarray
    node_is_numeric: np.ndarray
    node_threshold: np.ndarray
    node_rank: np.ndarray
    node_directions: np.ndarray
    node_left: np.ndarray
    node_right: np.ndarray
    node_default_left: np.ndarray
    node_cohort: np.ndarray
    children: np.ndarray  # children[2 * node + go_left]


def compile_tree(p: Partition, depth: int) -> FlatTree:
    """Flat arrays for the vectorised walk. Every value becomes a small integer code first:
    a categorical level its index in the feature's level table, a number the count of the
    feature's distinct split thresholds at or below it (so x < threshold k, the k-th
    smallest, is code <= k, `node_rank`), and `missing_code` (one past the largest code of
    any feature) stands for missing, NaN or an unknown level. When the table is small
    (nodes x codes at most `TABLE_CELLS`), every node, numeric or categorical, is one row of
    a (node, code) -> next node table, and a step of the walk is a few gathers for all
    members at once; a larger tree (many thresholds on one feature) walks with a comparison
    per numeric node instead, in memory linear in the nodes. Leaves send every code to
    themselves, so the walk runs a fixed `depth` steps."""
    n = p.n_nodes
    codes: list[dict[str, int]] = []
    for fi, f in enumerate(p.features):
        lut: dict[str, int] = {}
        if f.kind == "categorical":
            for lv in f.levels:
                lut.setdefault(lv, len(lut))
            for nd in range(n):
                if int(p.feature[nd]) == fi:
                    for lv in (*p.left_levels[nd], *p.right_levels[nd]):
                        lut.setdefault(lv, len(lut))
        codes.append(lut)
    is_leaf = np.asarray(p.feature) < 0
    cuts = [
        np.unique(np.asarray(p.threshold, dtype=np.float64)[np.asarray(p.feature) == fi])
        if f.kind == "numeric"
        else np.zeros(0)
        for fi, f in enumerate(p.features)
    ]
    levels_width = max((len(c) for c in codes), default=0)  # codes of categorical levels
    missing = max([levels_width] + [len(c) + 1 for c in cuts])
    feat = np.where(is_leaf, 0, p.feature).astype(np.intp)
    is_num = np.zeros(n, dtype=bool)
    thr = np.full(n, np.nan)
    rank = np.zeros(n, dtype=np.intp)
    # categorical directions by level code (1 left, 0 right, -1 default); the last column
    # stands for every code past the levels (missing); leaves send every code left (self)
    dirs = np.full((n, levels_width + 1), -1, dtype=np.int8)
    for nd in range(n):
        if is_leaf[nd]:
            dirs[nd] = 1
            continue
        f = p.features[int(feat[nd])]
        if f.kind == "numeric":
            is_num[nd] = True
            thr[nd] = float(p.threshold[nd])
            rank[nd] = int(np.searchsorted(cuts[int(feat[nd])], thr[nd]))  # cuts[k] == thr
        else:
            lut = codes[int(feat[nd])]
            for lv in p.right_levels[nd]:
                dirs[nd, lut[lv]] = 0
            for lv in p.left_levels[nd]:
                dirs[nd, lut[lv]] = 1
    self_idx = np.arange(n, dtype=np.intp)
    left = np.where(is_leaf, self_idx, p.left).astype(np.intp)
    right = np.where(is_leaf, self_idx, p.right).astype(np.intp)
    default_left = np.asarray(p.default_left, dtype=bool).copy()
    width = missing + 1
    nxt_flat: np.ndarray | None = None
    defaulted: np.ndarray | None = None
    if n * width <= TABLE_CELLS:
        code = np.arange(width)[None, :]
        side = np.where(  # (n, width): 1 left, 0 right, -1 default
            is_num[:, None],
            np.where(code == missing, -1, (code <= rank[:, None]).astype(np.int8)),
            dirs[:, np.minimum(code[0], levels_width)],
        )
        default = np.where(default_left, left, right)
        nxt = np.where(
            side == 1, left[:, None], np.where(side == 0, right[:, None], default[:, None])
        )
        nxt_flat = frozen(nxt.astype(np.intp).reshape(-1))
        defaulted = frozen((side == -1).reshape(-1))
    return FlatTree(
        depth=depth,
        level_codes=tuple(codes),
        cuts=tuple(frozen(c) for c in cuts),
        missing_code=missing,
        width=width,
        next_node=nxt_flat,
        defaulted=defaulted,
        is_leaf=frozen(is_leaf),
        node_feature=frozen(feat),
        node_is_numeric=frozen(is_num),
        node_threshold=frozen(thr),
        node_rank=frozen(rank),
        node_directions=frozen(dirs),
        node_left=frozen(left),
        node_right=frozen(right),
        node_default_left=frozen(default_left),
        node_cohort=frozen(np.asarray(p.cohort, dtype=np.intp).copy()),
        # children[2 * node + go_left]: right child at even, left child at odd positions
        children=frozen(np.stack([right, left], axis=1).reshape(-1)),
    )
