"""A policy tree: a partition grown to maximize the summed reward of each leaf's best arm
(Athey and Wager 2021, Zhou, Athey and Wager 2023 learn tree
policies from doubly robust rewards).

    value(S) = max_j sum_{i in S} r_ij,    gain(split of S into L, R) = value(L) + value(R) - value(S)

Growth is greedy and level by level on the structure rows, like the honest causal tree: per
feature one `np.bincount` per arm gathers the reward sums of every (node, bin), cumulative sums
score every threshold at once in O(J). Estimation rows are only counted: every arm keeps
`min_units` rows on both sides in both halves, so the leaves can be estimated honestly. A split is
kept only if its gain exceeds `split_z` standard errors of the gain (the per-unit reward
differences it buys, d_i = r_i,arm(child) - r_i,arm(parent)): the max over arms is optimistic per
leaf, and without this rule the criterion rewards splits that separate noise.

The result is a `apportion.stats.tree.Tree`, so it becomes a `Partition` like every other model.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

from apportion.stats.binning import FeatureBins
from apportion.stats.tree import Tree


def grow_policy_tree(
    bins: FeatureBins,
    s_rows: np.ndarray,
    e_rows: np.ndarray,
    arm: np.ndarray,
    reward: np.ndarray,
    *,
    max_depth: int,
    min_units: int,
    split_z: float = 0.0,
    progress: Callable[[float], None] | None = None,
) -> tuple[Tree, np.ndarray, np.ndarray]:
    """Grow on the rewards `reward` (len(s_rows), J) of the structure rows.

    Returns the tree and the node of every structure row and every estimation row."""
    J = reward.shape[1]
    codes_s, codes_e = bins.codes[:, s_rows], bins.codes[:, e_rows]
    arm_s, arm_e = arm[s_rows].astype(np.int64), arm[e_rows].astype(np.int64)
    node_s = np.zeros(s_rows.size, dtype=np.int64)
    node_e = np.zeros(e_rows.size, dtype=np.int64)
    tree = Tree()
    tree.add_leaf()
    frontier = [0]
    for depth in range(max_depth):
        if not frontier:
            break
        S = len(frontier)
        slot_of = np.full(len(tree), -1, dtype=np.int64)
        slot_of[frontier] = np.arange(S)
        sl_all, sle_all = slot_of[node_s], slot_of[node_e]
        act, act_e = np.flatnonzero(sl_all >= 0), np.flatnonzero(sle_all >= 0)
        sl, sle = sl_all[act], sle_all[act_e]
        r_act, a_s, a_e = reward[act], arm_s[act], arm_e[act_e]
        parent = np.stack([np.bincount(sl, r_act[:, j], S) for j in range(J)], axis=1)  # (S, J)
        best: dict[str, Any] = {"gain": np.full(S, -np.inf), "f": [-1] * S, "lookup": [None] * S,
                "thr": [math.nan] * S, "lv": [()] * S, "rv": [()] * S, "dl": [True] * S}  # fmt: skip
        for f in range(codes_s.shape[0]):
            nb = int(bins.n_bins[f])
            if nb < 3:
                continue
            cs = codes_s[f, act].astype(np.int64)
            idx = sl * nb + cs
            R = np.stack([np.bincount(idx, r_act[:, j], S * nb) for j in range(J)], axis=1)
            R = R.reshape(S, nb, J)  # bincount stacks (S*nb, J) -> (S, nb, J)
            cnt = np.bincount(idx * J + a_s, minlength=S * nb * J).reshape(S, nb, J)
            idx_e = sle * nb + codes_e[f, act_e].astype(np.int64)
            cnt_e = np.bincount(idx_e * J + a_e, minlength=S * nb * J).reshape(S, nb, J)
            perm = None
            if bins.features[f].kind == "categorical":
                R, cnt, cnt_e, perm = _order_levels(R, cnt, cnt_e, parent)
            gain, left_big = _gains(R, cnt, cnt_e, parent, min_units)
            arg = gain.argmax(axis=1)
            g = gain[np.arange(S), arg]
            for s in np.flatnonzero(g > best["gain"]).tolist():
                lk, thr, lv, rv = _rule(bins, f, int(arg[s]) + 1, bool(left_big[s, arg[s]]),
                                        None if perm is None else perm[s], cnt[s])  # fmt: skip
                best["gain"][s], best["f"][s], best["lookup"][s] = g[s], f, lk
                best["thr"][s], best["lv"][s], best["rv"][s] = thr, lv, rv
                best["dl"][s] = bool(left_big[s, arg[s]])
        new_frontier: list[int] = []
        moved = False
        for s in range(S):
            # a split whose sides keep the parent's arm gains exactly 0; rounding of the cumulative
            # sums can make that a tiny positive number, which must not count as a gain
            if not best["gain"][s] > 1e-9 * (1.0 + np.abs(parent[s]).max()):
                continue
            f, lk = best["f"][s], best["lookup"][s]
            rows = act[sl == s]
            go_left = lk[codes_s[f, rows]]
            if split_z > 0 and not _significant(reward[rows], go_left, best["gain"][s], split_z):
                continue
            lc, rc = tree.make_split(frontier[s], f, lk, best["dl"][s], best["thr"][s],
                                     best["lv"][s], best["rv"][s], float(best["gain"][s]))  # fmt: skip
            node_s[rows] = np.where(go_left, lc, rc)
            rows_e = act_e[sle == s]
            node_e[rows_e] = np.where(lk[codes_e[f, rows_e]], lc, rc)
            new_frontier += [lc, rc]
            moved = True
        if not moved:
            break
        frontier = _splittable(new_frontier, node_s, arm_s, node_e, arm_e, len(tree), J, min_units)
        if progress is not None:
            progress((depth + 1) / max_depth)
    return tree, node_s, node_e


def _gains(
    R: np.ndarray, cnt: np.ndarray, cnt_e: np.ndarray, parent: np.ndarray, m: int
) -> tuple[np.ndarray, np.ndarray]:
    """(S, B-1) gain of `code < b`, b = 1..B-1 (the last code holds the missing rows, which go
    with the larger child), and whether the left child is the larger one."""
    B = R.shape[1] - 1

    def parts(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        c = np.cumsum(a[:, :B], axis=1)
        return c[:, : B - 1], c[:, B - 1 :] - c[:, : B - 1], a[:, B:]

    nl, nr, nm = parts(cnt)
    left_big = nl.sum(-1) >= nr.sum(-1)
    lb = left_big[..., None]

    def children(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        left, right, miss = parts(a)
        return left + np.where(lb, miss, 0), right + np.where(lb, 0, miss)

    rl, rr = children(R)
    nL, nR = children(cnt)
    eL, eR = children(cnt_e)
    gain = rl.max(-1) + rr.max(-1) - parent.max(-1)[:, None]
    ok = (nL.min(-1) >= m) & (nR.min(-1) >= m) & (eL.min(-1) >= m) & (eR.min(-1) >= m)
    return np.where(ok, gain, -np.inf), left_big


def _order_levels(
    R: np.ndarray, cnt: np.ndarray, cnt_e: np.ndarray, parent: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Order each node's levels by the per-unit reward margin of the node's best arm over its
    second best (a one-dimensional ordering; with two arms it is the exact optimal order), then
    treat them as ordered bins; levels without structure rows go last."""
    B = R.shape[1] - 1
    top = np.argsort(-parent, axis=1)[:, :2]  # (S, 2)
    n_lv = cnt[:, :B].sum(-1)
    r1 = np.take_along_axis(R[:, :B], top[:, None, :1], axis=2)[..., 0]
    r2 = np.take_along_axis(R[:, :B], top[:, None, 1:2], axis=2)[..., 0] if R.shape[2] > 1 else 0
    with np.errstate(invalid="ignore", divide="ignore"):
        key = (r1 - r2) / n_lv
    key = np.where(n_lv > 0, key, np.inf)
    perm = np.argsort(key, axis=1, kind="stable")

    def reorder(a: np.ndarray) -> np.ndarray:
        p = perm[..., None]
        return np.concatenate([np.take_along_axis(a[:, :B], p, axis=1), a[:, B:]], axis=1)

    return reorder(R), reorder(cnt), reorder(cnt_e), perm


def _rule(
    bins: FeatureBins, f: int, b: int, dl: bool, perm: np.ndarray | None, cnt_node: np.ndarray
) -> tuple[np.ndarray, float, tuple[str, ...], tuple[str, ...]]:
    """Lookup over the feature's codes, numeric threshold and the levels sent each way."""
    nb = int(bins.n_bins[f])
    B = nb - 1
    lk = np.empty(nb, dtype=bool)
    lk[B] = dl
    spec = bins.features[f]
    if spec.kind == "numeric":
        lk[:B] = np.arange(B) < b
        return lk, float(bins.thresholds[f][b - 1]), (), ()  # type: ignore[index]
    rank = np.empty(B, dtype=np.int64)
    rank[perm] = np.arange(B)
    seen = np.empty(B, dtype=bool)
    seen[perm] = cnt_node[:B].sum(-1) > 0  # cnt_node is in ranked order
    go_left = rank < b
    lk[:B] = np.where(seen, go_left, dl)
    lv = tuple(spec.levels[i] for i in range(B) if seen[i] and go_left[i])
    rv = tuple(spec.levels[i] for i in range(B) if seen[i] and not go_left[i])
    return lk, math.nan, lv, rv


def _significant(r: np.ndarray, go_left: np.ndarray, gain: float, z: float) -> bool:
    """gain > z * sd of its per-unit terms * sqrt(n): the split's arms taken as fixed."""
    jp = int(r.sum(0).argmax())
    jl = int(r[go_left].sum(0).argmax()) if go_left.any() else jp
    jr = int(r[~go_left].sum(0).argmax()) if (~go_left).any() else jp
    d = np.where(go_left, r[:, jl], r[:, jr]) - r[:, jp]
    se = float(d.std(ddof=1)) * math.sqrt(d.size) if d.size > 1 else math.inf
    return gain > z * se


def _splittable(
    nodes: list[int],
    node_s: np.ndarray,
    arm_s: np.ndarray,
    node_e: np.ndarray,
    arm_e: np.ndarray,
    n_nodes: int,
    J: int,
    m: int,
) -> list[int]:
    cs = np.bincount(node_s * J + arm_s, minlength=n_nodes * J).reshape(n_nodes, J)
    ce = np.bincount(node_e * J + arm_e, minlength=n_nodes * J).reshape(n_nodes, J)
    ok = (cs.min(axis=1) >= 2 * m) & (ce.min(axis=1) >= 2 * m)
    return [nd for nd in nodes if ok[nd]]


def leaf_values(reward: np.ndarray, leaf: np.ndarray) -> float:
    """sum over leaves of max_j sum_{i in leaf} reward_ij (the criterion of a partition)."""
    J = reward.shape[1]
    nodes = int(leaf.max()) + 1 if leaf.size else 0
    sums = np.stack([np.bincount(leaf, reward[:, j], nodes) for j in range(J)], axis=1)
    return float(sums.max(axis=1).sum())
