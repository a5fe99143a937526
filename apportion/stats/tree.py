"""Histogram-based honest causal tree for J arms and K metrics (Athey and Imbens 2016).

The tree grows level by level on the structure rows. For every feature, one `np.bincount` per
statistic (count, sum and sum of squares of each metric, per arm) gathers the per-bin sufficient
statistics of all nodes of the level at once; cumulative sums over the bins then score every
threshold of every node at once. Estimation rows are only counted (every arm must keep
`min_units` rows on both halves), their outcomes are never looked at while growing.

Longer than most modules (about 400 lines) on purpose: the grower, its per-level histogram pass
and the tree type it returns are one algorithm, read together.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np

from apportion.stats.binning import FeatureBins
from apportion.stats.honest import leaf_criterion
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

# one feature's histograms for a level: (feature, counts (S, B, J), sums (S, B, J, K), sums of
# squares (S, B, J, K), estimation-half counts (S, B, J))
LevelHistogram = tuple[int, np.ndarray, np.ndarray, np.ndarray, np.ndarray]


@dataclass
class Tree:
    """A binary tree over binned features; nodes are appended, children after their parent.

    `lookup[node]` is a bool array over the codes of the node's feature: True sends the code left
    (missing and unseen codes hold the node's default direction)."""

    feature: list[int] = field(default_factory=list)
    lookup: list[np.ndarray | None] = field(default_factory=list)
    default_left: list[bool] = field(default_factory=list)
    threshold: list[float] = field(default_factory=list)
    left_levels: list[tuple[str, ...]] = field(default_factory=list)
    right_levels: list[tuple[str, ...]] = field(default_factory=list)
    left: list[int] = field(default_factory=list)
    right: list[int] = field(default_factory=list)
    parent: list[int] = field(default_factory=list)
    depth: list[int] = field(default_factory=list)
    gain: list[float] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.feature)

    def add_leaf(self, parent: int = -1) -> int:
        self.feature.append(-1)
        self.lookup.append(None)
        self.default_left.append(True)
        self.threshold.append(np.nan)
        self.left_levels.append(())
        self.right_levels.append(())
        self.left.append(-1)
        self.right.append(-1)
        self.parent.append(parent)
        self.depth.append(0 if parent < 0 else self.depth[parent] + 1)
        self.gain.append(np.nan)
        return len(self.feature) - 1

    def make_split(
        self,
        node: int,
        feature: int,
        lookup: np.ndarray,
        default_left: bool,
        threshold: float,
        left_levels: tuple[str, ...],
        right_levels: tuple[str, ...],
        gain: float,
    ) -> tuple[int, int]:
        """Turn leaf `node` into a split; returns the new (left, right) leaves."""
        self.feature[node] = feature
        self.lookup[node] = lookup
        self.default_left[node] = default_left
        self.threshold[node] = threshold
        self.left_levels[node] = left_levels
        self.right_levels[node] = right_levels
        self.gain[node] = gain
        lc, rc = self.add_leaf(node), self.add_leaf(node)
        self.left[node], self.right[node] = lc, rc
        return lc, rc

    def copy_split(self, node: int, other: Tree, onode: int) -> tuple[int, int]:
        """Copy `other`'s split at `onode` onto leaf `node` (used for grafting)."""
        lookup = other.lookup[onode]
        assert lookup is not None, f"node {onode} is a leaf, not a split"
        return self.make_split(
            node, other.feature[onode], lookup, other.default_left[onode],
            other.threshold[onode], other.left_levels[onode], other.right_levels[onode],
            other.gain[onode],
        )  # fmt: skip

    def leaves(self) -> list[int]:
        return [i for i, f in enumerate(self.feature) if f < 0]

    def _tables(self, width: int) -> tuple[np.ndarray, ...]:
        n = len(self)
        width = max([width] + [lk.size for lk in self.lookup if lk is not None])
        lut = np.zeros((n, width), dtype=bool)
        for i, lk in enumerate(self.lookup):
            if lk is not None:
                lut[i, : lk.size] = lk
        return (np.array(self.feature), lut, np.array(self.left), np.array(self.right))

    def route(self, codes: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
        """Node (leaf) per row for binned `codes` (F, n), restricted to `rows` if given."""
        n = codes.shape[1] if rows is None else rows.shape[0]
        rows = np.arange(n) if rows is None else rows
        feat, lut, left, right = self._tables(int(codes.max()) + 1 if codes.size else 1)
        node = np.zeros(n, dtype=np.int64)
        for _ in range(max(self.depth) + 1):
            r = np.flatnonzero(feat[node] >= 0)
            if r.size == 0:
                break
            nd = node[r]
            go_left = lut[nd, codes[feat[nd], rows[r]]]
            node[r] = np.where(go_left, left[nd], right[nd])
        return node

    def pruned(self, stop: set[int]) -> tuple[Tree, np.ndarray]:
        """Copy with every node in `stop` made a leaf; also returns old node -> new node (a removed
        node maps to the new node of its nearest kept ancestor)."""
        out = Tree()
        old_to_new = np.full(len(self), -1, dtype=np.int64)
        old_to_new[0] = out.add_leaf()
        for i in range(len(self)):  # parents come before children
            if old_to_new[i] < 0:
                old_to_new[i] = old_to_new[self.parent[i]]
                continue
            if self.feature[i] >= 0 and i not in stop:
                lc, rc = out.copy_split(int(old_to_new[i]), self, i)
                old_to_new[self.left[i]], old_to_new[self.right[i]] = lc, rc
        return out, old_to_new

    def to_partition(
        self, features: tuple[FeatureSpec, ...], cohort_of_node: np.ndarray, n_cohorts: int
    ) -> Partition:
        leaf = np.array(self.feature) < 0
        return Partition(
            features=features,
            feature=np.array(self.feature, dtype=np.int64),
            threshold=np.array(self.threshold, dtype=np.float64),
            left_levels=tuple(self.left_levels),
            right_levels=tuple(self.right_levels),
            left=np.array(self.left, dtype=np.int64),
            right=np.array(self.right, dtype=np.int64),
            default_left=np.array(self.default_left, dtype=bool),
            cohort=np.where(leaf, cohort_of_node, -1).astype(np.int64),
            n_cohorts=n_cohorts,
        )


@dataclass(frozen=True)
class GrowSpec:
    """What the grower needs beyond the rows: pair weights (J-1, K), limits, sample sizes."""

    weights: np.ndarray
    inv_sd: np.ndarray  # (J-1, K) 1/sqrt(root pair variance): standardizes effects for ordering
    n_arms: int
    max_depth: int
    min_units: int
    min_gain: float
    n_tr: int
    n_est: int
    order_metric: int  # categorical levels are ordered by the standardized effect on this metric


def grow(
    bins: FeatureBins,
    s_rows: np.ndarray,
    e_rows: np.ndarray,
    arm: np.ndarray,
    y: np.ndarray,
    spec: GrowSpec,
    progress: Callable[[float], None] | None = None,
) -> tuple[Tree, np.ndarray, np.ndarray]:
    """Grow on `s_rows` (outcomes `y` (n, K) used) checking counts on `e_rows`.

    Returns the tree and the leaf of every structure row and every estimation row."""
    rows = RowHistograms(bins, s_rows, e_rows, arm, y, spec.n_arms)
    tree = grow_on(rows, bins, spec, progress)
    node_s, node_e = rows.leaves(tree)
    return tree, node_s, node_e


class LevelHistograms(Protocol):
    """Where the rows live. For the frontier nodes of `tree` (every row routed by the tree as it
    stands) yields, per feature f with at least two non-missing bins, `(f, cnt, sums, sqs, cnt_e)`:
    structure-row counts (S, nb, J), sums and sums of squares of the criterion outcomes
    (S, nb, J, K) and estimation-row counts (S, nb, J), indexed (frontier slot, bin, arm).
    `RowHistograms` holds the rows in memory; `apportion.engines` pushes the same aggregation down
    to a SQL engine, so only these small arrays come back."""

    def level(self, tree: Tree, frontier: list[int]) -> Iterator[LevelHistogram]: ...


def grow_on(
    hist: LevelHistograms,
    bins: FeatureBins,
    spec: GrowSpec,
    progress: Callable[[float], None] | None = None,
) -> Tree:
    """Grow level by level from the histograms `hist` gives; `bins` supplies the bin layout only
    (its `codes` are not read here)."""
    tree = Tree()
    tree.add_leaf()
    frontier = [0]
    for depth in range(spec.max_depth):
        if not frontier:
            break
        S = len(frontier)
        best = _Best(S)
        raw: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        for f, cnt, sums, sqs, cnt_e in hist.level(tree, frontier):
            raw[f] = (cnt, cnt_e)
            perm = seen = None
            if bins.features[f].kind == "categorical":
                cnt, sums, sqs, cnt_e, perm, seen = _order_levels(cnt, sums, sqs, cnt_e, spec)
            gain, left_big = _split_scores(cnt, sums, sqs, cnt_e, spec)
            best.offer(f, gain, left_big, perm, seen)
        splits = [s for s in range(S) if best.gain[s] > spec.min_gain]
        if not splits:
            break
        new_frontier: list[int] = []
        for s in splits:
            f = best.feature[s]
            lk, thr, lv, rv = _rule(bins, f, best, s)
            lc, rc = tree.make_split(frontier[s], f, lk, best.left_big[s], thr, lv, rv,
                                     float(best.gain[s]))  # fmt: skip
            # children's counts per arm on both halves, from the chosen feature's histogram
            cnt, cnt_e = raw[f]
            for child, side in ((lc, lk), (rc, ~lk)):
                n_s, n_e = cnt[s][side].sum(axis=0), cnt_e[s][side].sum(axis=0)
                if n_s.min() >= 2 * spec.min_units and n_e.min() >= 2 * spec.min_units:
                    new_frontier.append(child)
        frontier = new_frontier
        if progress is not None:
            progress((depth + 1) / spec.max_depth)
    return tree


class RowHistograms:
    """The in-memory histograms: rows as numpy arrays, one `np.bincount` per statistic for all
    nodes of a level at once. Keeps each row's node, moving rows down as the tree splits."""

    def __init__(
        self,
        bins: FeatureBins,
        s_rows: np.ndarray,
        e_rows: np.ndarray,
        arm: np.ndarray,
        y: np.ndarray,
        n_arms: int,
    ) -> None:
        self.bins, self.J = bins, n_arms
        self.codes_s, self.codes_e = bins.codes[:, s_rows], bins.codes[:, e_rows]
        self.arm_s = arm[s_rows].astype(np.int64)
        self.arm_e = arm[e_rows].astype(np.int64)
        self.ys = y[s_rows]
        self.node_s = np.zeros(s_rows.size, dtype=np.int64)
        self.node_e = np.zeros(e_rows.size, dtype=np.int64)

    def leaves(self, tree: Tree) -> tuple[np.ndarray, np.ndarray]:
        """The leaf of every structure row and every estimation row."""
        self._advance(tree)
        return self.node_s, self.node_e

    def _advance(self, tree: Tree) -> None:
        """Move rows whose node has been split since the last call one level down (the grower
        splits only leaves, so one step reaches the new leaves)."""
        feat, lut, left, right = tree._tables(self.bins.max_bins)
        for node, codes in ((self.node_s, self.codes_s), (self.node_e, self.codes_e)):
            rows = np.flatnonzero(feat[node] >= 0)
            if rows.size:
                nd = node[rows]
                go_left = lut[nd, codes[feat[nd], rows]]
                node[rows] = np.where(go_left, left[nd], right[nd])

    def level(self, tree: Tree, frontier: list[int]) -> Iterator[LevelHistogram]:
        self._advance(tree)
        bins, J, K = self.bins, self.J, self.ys.shape[1]
        S = len(frontier)
        slot_of = np.full(len(tree), -1, dtype=np.int64)
        slot_of[frontier] = np.arange(S)
        act_s, act_e = _active(slot_of[self.node_s]), _active(slot_of[self.node_e])
        sl = slot_of[self.node_s if act_s is None else self.node_s[act_s]]
        sle = slot_of[self.node_e if act_e is None else self.node_e[act_e]]
        y_act = self.ys if act_s is None else self.ys[act_s]
        y_sq = y_act * y_act
        a_s = self.arm_s if act_s is None else self.arm_s[act_s]
        a_e = self.arm_e if act_e is None else self.arm_e[act_e]
        for f in range(self.codes_s.shape[0]):
            nb = int(bins.n_bins[f])
            if nb < 3:  # fewer than two non-missing bins: nothing to split
                continue
            # one bincount per statistic for all nodes of this level: index (slot, bin, arm)
            idx = (sl * nb + _take(self.codes_s[f], act_s)) * J + a_s
            idx_e = (sle * nb + _take(self.codes_e[f], act_e)) * J + a_e
            size = S * nb * J
            cnt = np.bincount(idx, minlength=size).reshape(S, nb, J)
            sums = np.empty((S, nb, J, K))
            sqs = np.empty((S, nb, J, K))
            for k in range(K):
                sums[..., k] = np.bincount(idx, y_act[:, k], size).reshape(S, nb, J)
                sqs[..., k] = np.bincount(idx, y_sq[:, k], size).reshape(S, nb, J)
            cnt_e = np.bincount(idx_e, minlength=size).reshape(S, nb, J)
            yield f, cnt, sums, sqs, cnt_e


def _active(slot: np.ndarray) -> np.ndarray | None:
    """Rows whose node is on the frontier; None means all rows (saves a gather at the root)."""
    act = slot >= 0
    return None if act.all() else np.flatnonzero(act)


def _take(codes_f: np.ndarray, act: np.ndarray | None) -> np.ndarray:
    return (codes_f if act is None else codes_f[act]).astype(np.int64)


class _Best:
    """Best split found so far per frontier slot (features are offered in order; the first of
    equal gains wins, which keeps fits deterministic)."""

    def __init__(self, n_slots: int) -> None:
        self.gain = np.full(n_slots, -np.inf)
        self.feature = [-1] * n_slots
        self.pos = [0] * n_slots
        self.left_big = [True] * n_slots
        self.perm: list[np.ndarray | None] = [None] * n_slots
        self.seen: list[np.ndarray | None] = [None] * n_slots

    def offer(
        self,
        f: int,
        gain: np.ndarray,
        left_big: np.ndarray,
        perm: np.ndarray | None,
        seen: np.ndarray | None,
    ) -> None:
        arg = gain.argmax(axis=1)
        g = gain[np.arange(gain.shape[0]), arg]
        for s in np.flatnonzero(g > self.gain):
            self.gain[s], self.feature[s], self.pos[s] = g[s], f, int(arg[s]) + 1
            self.left_big[s] = bool(left_big[s, arg[s]])
            self.perm[s] = None if perm is None else perm[s]
            self.seen[s] = None if seen is None else seen[s]


def _split_scores(
    cnt: np.ndarray, sums: np.ndarray, sqs: np.ndarray, cnt_e: np.ndarray, spec: GrowSpec
) -> tuple[np.ndarray, np.ndarray]:
    """Gain (S, B-1) of the threshold `code < b`, b = 1..B-1, and whether the left child is the
    larger one (it then takes the missing rows). Inadmissible thresholds score -inf.

    cnt, cnt_e: (S, nb, J); sums, sqs: (S, nb, J, K); the last bin holds the missing rows."""
    B = cnt.shape[1] - 1

    def parts(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        c = np.cumsum(a[:, :B], axis=1)
        return c[:, : B - 1], c[:, B - 1 :] - c[:, : B - 1], a[:, B:]

    nl, nr, nm = parts(cnt)
    left_big = nl.sum(axis=-1) >= nr.sum(axis=-1)  # (S, B-1): the larger child takes the missing
    lb3, lb4 = left_big[..., None], left_big[..., None, None]

    def children(a: np.ndarray, lb: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        left, right, miss = parts(a)
        return (
            left + np.where(lb, miss, 0),
            right + np.where(lb, 0, miss),
            left[:, :1] + right[:, :1] + miss,
        )

    nL, nR, nP = children(cnt, lb3)
    sL, sR, sP = children(sums, lb4)
    qL, qR, qP = children(sqs, lb4)
    eL, eR, _ = children(cnt_e, lb3)
    crit = leaf_criterion
    gain = (crit(nL, sL, qL, spec.weights, spec.n_tr, spec.n_est)
            + crit(nR, sR, qR, spec.weights, spec.n_tr, spec.n_est)
            - crit(nP, sP, qP, spec.weights, spec.n_tr, spec.n_est))  # fmt: skip
    m = spec.min_units
    ok = (nL.min(-1) >= m) & (nR.min(-1) >= m) & (eL.min(-1) >= m) & (eR.min(-1) >= m)
    return np.where(ok & np.isfinite(gain), gain, -np.inf), left_big


def _order_levels(
    cnt: np.ndarray, sums: np.ndarray, sqs: np.ndarray, cnt_e: np.ndarray, spec: GrowSpec
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Order each node's levels by their standardized effect on the ordering metric (summed over
    treated arms), then treat them as ordered bins. Levels without structure rows at the node go
    last and their estimation rows are counted as missing (they will follow the default)."""
    B = cnt.shape[1] - 1
    k0 = spec.order_metric
    n_lv = cnt[:, :B]  # (S, B, J)
    seen = n_lv.sum(axis=-1) > 0  # (S, B)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = sums[:, :B, :, k0] / n_lv
        key = ((mean[..., 1:] - mean[..., :1]) * spec.inv_sd[:, k0]).sum(axis=-1)
        tot = sums[:, :, :, k0].sum(axis=1) / cnt.sum(axis=1)
        node_key = ((tot[:, 1:] - tot[:, :1]) * spec.inv_sd[:, k0]).sum(axis=-1)
    key = np.where(np.isfinite(key), key, node_key[:, None])
    key = np.where(seen, key, np.inf)
    perm = np.argsort(key, axis=1, kind="stable")
    cnt_e = cnt_e.copy()
    unseen_e = np.where(seen[..., None], 0, cnt_e[:, :B])
    cnt_e[:, B] += unseen_e.sum(axis=1)
    cnt_e[:, :B] -= unseen_e

    def reorder(a: np.ndarray) -> np.ndarray:
        p = perm.reshape(perm.shape + (1,) * (a.ndim - 2))
        return np.concatenate([np.take_along_axis(a[:, :B], p, axis=1), a[:, B:]], axis=1)

    return reorder(cnt), reorder(sums), reorder(sqs), reorder(cnt_e), perm, seen


def _rule(
    bins: FeatureBins, f: int, best: _Best, s: int
) -> tuple[np.ndarray, float, tuple[str, ...], tuple[str, ...]]:
    """Lookup over the feature's codes, numeric threshold, and the levels sent each way."""
    nb = int(bins.n_bins[f])
    B, b, dl = nb - 1, best.pos[s], best.left_big[s]
    lk = np.empty(nb, dtype=bool)
    lk[B] = dl
    spec = bins.features[f]
    if spec.kind == "numeric":
        lk[:B] = np.arange(B) < b
        return lk, float(bins.thresholds[f][b - 1]), (), ()  # type: ignore[index]
    perm, seen = best.perm[s], best.seen[s]
    assert perm is not None and seen is not None  # a categorical split keeps its level order
    rank = np.empty(B, dtype=np.int64)
    rank[perm] = np.arange(B)
    go_left = rank < b
    lk[:B] = np.where(seen, go_left, dl)
    lv = tuple(spec.levels[i] for i in range(B) if seen[i] and go_left[i])
    rv = tuple(spec.levels[i] for i in range(B) if seen[i] and not go_left[i])
    return lk, np.nan, lv, rv
