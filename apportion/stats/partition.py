"""The partition every cohort model returns: a binary tree whose leaves map to cohorts.

Several leaves may map to one cohort (the `intersect` method merges cells; `segments` builds
chains), so the same structure serves every method and compiles to one serving index.
Numeric nodes send `x < threshold` left; categorical nodes send `left_levels` left and
`right_levels` right. Missing values, and levels the node did not see at fit time, follow the
node's default direction (`default_left`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from apportion.stats.table import FeatureSpec


@dataclass(frozen=True)
class Partition:
    features: tuple[FeatureSpec, ...]  # the features nodes refer to, by index
    feature: np.ndarray  # (nodes,) int, -1 for a leaf
    threshold: np.ndarray  # (nodes,) float, NaN unless a numeric split
    left_levels: tuple[tuple[str, ...], ...]  # (nodes,) categorical split: levels sent left
    right_levels: tuple[tuple[str, ...], ...]
    left: np.ndarray  # (nodes,) int child index, -1 for a leaf
    right: np.ndarray
    default_left: np.ndarray  # (nodes,) bool: where missing and unseen values go
    cohort: np.ndarray  # (nodes,) int cohort of a leaf, -1 for an internal node
    n_cohorts: int

    # ---- construction -------------------------------------------------------------------
    @staticmethod
    def single(features: tuple[FeatureSpec, ...] = ()) -> Partition:
        """One cohort for everyone."""
        return Partition(
            features=features,
            feature=np.array([-1]),
            threshold=np.array([np.nan]),
            left_levels=((),),
            right_levels=((),),
            left=np.array([-1]),
            right=np.array([-1]),
            default_left=np.array([True]),
            cohort=np.array([0]),
            n_cohorts=1,
        )

    @property
    def n_nodes(self) -> int:
        return int(self.feature.shape[0])

    def is_leaf(self, node: int) -> bool:
        return bool(self.feature[node] < 0)

    def depth(self) -> int:
        def d(node: int) -> int:
            if self.is_leaf(node):
                return 0
            return 1 + max(d(int(self.left[node])), d(int(self.right[node])))

        return d(0)

    def leaves(self) -> list[int]:
        return [i for i in range(self.n_nodes) if self.feature[i] < 0]

    def used_features(self) -> list[str]:
        used = sorted({int(f) for f in self.feature if f >= 0})
        return [self.features[i].key for i in used]

    # ---- the reference walk (serving has its own compiled copy) --------------------------
    def route(
        self, feature_values: dict[str, np.ndarray], features: tuple[FeatureSpec, ...]
    ) -> tuple[np.ndarray, np.ndarray]:
        """Cohort per row and the leaf per row, for features coded as in `UnitTable`
        (categorical codes index `features[...].levels`, which may differ from the fit's)."""
        spec = {f.key: f for f in features}
        n = len(next(iter(feature_values.values()))) if feature_values else 0
        node = np.zeros(n, dtype=np.int64)
        for _ in range(self.n_nodes):
            active = self.feature[node] >= 0
            if not active.any():
                break
            for nd in np.unique(node[active]):
                rows = np.flatnonzero(node == nd)
                f = self.features[int(self.feature[nd])]
                x = feature_values[f.key][rows]
                go_left, known = self._decide(int(nd), f, x, spec[f.key])
                go_left = np.where(known, go_left, bool(self.default_left[nd]))
                node[rows] = np.where(go_left, self.left[nd], self.right[nd])
        return self.cohort[node], node

    def _decide(
        self, nd: int, f: FeatureSpec, x: np.ndarray, spec: FeatureSpec
    ) -> tuple[np.ndarray, np.ndarray]:
        if f.kind == "numeric":
            x = x.astype(np.float64)
            known = ~np.isnan(x)
            return np.where(known, x < self.threshold[nd], False), known
        levels = np.array(spec.levels + ("",), dtype=object)
        codes = np.where(x < 0, len(spec.levels), x).astype(np.int64)
        names = levels[codes]
        left = np.isin(names, np.array(self.left_levels[nd], dtype=object))
        right = np.isin(names, np.array(self.right_levels[nd], dtype=object))
        return left, left | right

    # ---- readable rules ------------------------------------------------------------------
    def leaf_rules(self) -> dict[int, str]:
        """A readable rule per leaf, e.g. `level in {beginner} and tenure_days < 30`."""
        out: dict[int, str] = {}

        def walk(
            node: int, lo: dict[str, float], hi: dict[str, float], sets: dict[str, set[str]]
        ) -> None:
            if self.is_leaf(node):
                out[node] = _format_rule(self.features, lo, hi, sets)
                return
            f = self.features[int(self.feature[node])]
            if f.kind == "numeric":
                t = float(self.threshold[node])
                walk(int(self.left[node]), lo, {**hi, f.key: min(hi.get(f.key, math.inf), t)}, sets)
                walk(
                    int(self.right[node]), {**lo, f.key: max(lo.get(f.key, -math.inf), t)}, hi, sets
                )
            else:
                for child, lv in (
                    (self.left[node], self.left_levels[node]),
                    (self.right[node], self.right_levels[node]),
                ):
                    cur = sets.get(f.key)
                    new = set(lv) if cur is None else cur & set(lv)
                    walk(int(child), lo, hi, {**sets, f.key: new})

        walk(0, {}, {}, {})
        return out

    def cohort_rules(self) -> list[str]:
        """A readable rule per cohort; a cohort made of several leaves joins them with `or`."""
        by_leaf = self.leaf_rules()
        rules: list[list[str]] = [[] for _ in range(self.n_cohorts)]
        for leaf, rule in by_leaf.items():
            rules[int(self.cohort[leaf])].append(rule)
        return [r[0] if len(r) == 1 else " or ".join(f"({x})" for x in r) for r in rules]

    # ---- storage -------------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        return {
            "features": [
                {"key": f.key, "kind": f.kind, "levels": list(f.levels)} for f in self.features
            ],
            "nodes": [
                {
                    "feature": int(self.feature[i]),
                    "threshold": None if np.isnan(self.threshold[i]) else float(self.threshold[i]),
                    "left_levels": list(self.left_levels[i]),
                    "right_levels": list(self.right_levels[i]),
                    "left": int(self.left[i]),
                    "right": int(self.right[i]),
                    "default_left": bool(self.default_left[i]),
                    "cohort": int(self.cohort[i]),
                }
                for i in range(self.n_nodes)
            ],
            "n_cohorts": self.n_cohorts,
        }

    @staticmethod
    def from_dict(d: dict[str, Any]) -> Partition:
        nodes = d["nodes"]
        return Partition(
            features=tuple(
                FeatureSpec(f["key"], f["kind"], tuple(f["levels"])) for f in d["features"]
            ),
            feature=np.array([n["feature"] for n in nodes], dtype=np.int64),
            threshold=np.array(
                [np.nan if n["threshold"] is None else n["threshold"] for n in nodes]
            ),
            left_levels=tuple(tuple(n["left_levels"]) for n in nodes),
            right_levels=tuple(tuple(n["right_levels"]) for n in nodes),
            left=np.array([n["left"] for n in nodes], dtype=np.int64),
            right=np.array([n["right"] for n in nodes], dtype=np.int64),
            default_left=np.array([n["default_left"] for n in nodes], dtype=bool),
            cohort=np.array([n["cohort"] for n in nodes], dtype=np.int64),
            n_cohorts=int(d["n_cohorts"]),
        )


def _num(x: float) -> str:
    return f"{x:.6g}"


def _format_rule(
    features: tuple[FeatureSpec, ...],
    lo: dict[str, float],
    hi: dict[str, float],
    sets: dict[str, set[str]],
) -> str:
    parts: list[str] = []
    for f in features:
        if f.key in sets:
            levels = sorted(
                sets[f.key], key=lambda v: f.levels.index(v) if v in f.levels else len(f.levels)
            )
            parts.append(f"{f.key} in {{{', '.join(levels)}}}")
        a, b = lo.get(f.key), hi.get(f.key)
        if a is not None and b is not None:
            parts.append(f"{_num(a)} <= {f.key} < {_num(b)}")
        elif a is not None:
            parts.append(f"{f.key} >= {_num(a)}")
        elif b is not None:
            parts.append(f"{f.key} < {_num(b)}")
    return " and ".join(parts) if parts else "everyone"
