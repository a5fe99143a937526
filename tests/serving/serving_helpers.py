"""Helpers shared by the serving tests (imported as serving.serving_helpers): hand-built and random partitions, raw feature rows."""

from __future__ import annotations

from typing import Any

import numpy as np

from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

LEVELS = ("north", "south", "east", "west", "centre")
FEATURES = (
    FeatureSpec("tenure_days", "numeric"),
    FeatureSpec("level", "categorical", ("beginner", "intermediate", "advanced")),
    FeatureSpec("sessions", "numeric"),
    FeatureSpec("region", "categorical", LEVELS),
)


def build(
    nodes: list[dict[str, Any]], features=FEATURES, n_cohorts: int | None = None
) -> Partition:
    """A Partition from a readable node list (keys as in Partition.to_dict)."""
    full = []
    for nd in nodes:
        full.append(
            {
                "feature": nd.get("feature", -1),
                "threshold": nd.get("threshold"),
                "left_levels": list(nd.get("left_levels", ())),
                "right_levels": list(nd.get("right_levels", ())),
                "left": nd.get("left", -1),
                "right": nd.get("right", -1),
                "default_left": nd.get("default_left", True),
                "cohort": nd.get("cohort", -1),
            }
        )
    if n_cohorts is None:
        n_cohorts = max(nd["cohort"] for nd in full) + 1
    return Partition.from_dict(
        {
            "features": [
                {"key": f.key, "kind": f.kind, "levels": list(f.levels)} for f in features
            ],
            "nodes": full,
            "n_cohorts": n_cohorts,
        }
    )


def hand_partition() -> Partition:
    """tenure_days < 30 ? (level in {beginner} | {intermediate, advanced}; default right)
    : (region in {north, south} | {east}; 'west'/'centre' unseen, default left)
    Cohorts: 0 new beginners, 1 new others and east veterans (two leaves), 2 north/south veterans.
    """
    return build(
        [
            {"feature": 0, "threshold": 30.0, "left": 1, "right": 2, "default_left": True},
            {
                "feature": 1,
                "left_levels": ["beginner"],
                "right_levels": ["intermediate", "advanced"],
                "left": 3,
                "right": 4,
                "default_left": False,
            },
            {
                "feature": 3,
                "left_levels": ["north", "south"],
                "right_levels": ["east"],
                "left": 5,
                "right": 6,
                "default_left": True,
            },
            {"cohort": 0},
            {"cohort": 1},
            {"cohort": 2},
            {"cohort": 1},
        ]
    )


def random_partition(
    rng: np.random.Generator,
    features=FEATURES,
    depth: int = 5,
    n_cohorts: int = 6,
    p_split: float = 0.8,
) -> Partition:
    """A random tree: numeric thresholds in N(0, 30) (plus 30 for tenure), categorical nodes send a
    random subset left and part of the rest right, leaving some levels unseen at that node."""
    nodes: list[dict[str, Any]] = []

    def grow(d: int) -> int:
        idx = len(nodes)
        nodes.append({})
        if d >= depth or (d > 0 and rng.random() > p_split):
            nodes[idx] = {"cohort": int(rng.integers(n_cohorts))}
            return idx
        fi = int(rng.integers(len(features)))
        f = features[fi]
        nd: dict[str, Any] = {"feature": fi, "default_left": bool(rng.random() < 0.5)}
        if f.kind == "numeric":
            nd["threshold"] = float(np.round(rng.normal(30.0, 30.0), 2))
        else:
            levels = list(f.levels)
            rng.shuffle(levels)
            k = int(rng.integers(1, len(levels)))
            nd["left_levels"] = levels[:k]
            rest = levels[k:]
            nd["right_levels"] = rest[: max(1, len(rest) - int(rng.integers(0, 2)))]
        nd["left"] = grow(d + 1)
        nd["right"] = grow(d + 1)
        nodes[idx] = nd
        return idx

    grow(0)
    return build(nodes, features, n_cohorts=n_cohorts)


def random_rows(rng: np.random.Generator, n: int, features=FEATURES) -> list[dict[str, Any]]:
    """Raw rows as a client would send them: numbers, strings, missing keys, None, NaN, unseen levels."""
    rows: list[dict[str, Any]] = []
    for _ in range(n):
        row: dict[str, Any] = {}
        for f in features:
            r = rng.random()
            if r < 0.06:
                continue  # key absent
            if r < 0.10:
                row[f.key] = None
                continue
            if f.kind == "numeric":
                row[f.key] = (
                    float("nan")
                    if r < 0.13
                    else (
                        int(rng.integers(0, 120))
                        if r < 0.5
                        else float(np.round(rng.normal(30, 30), 2))
                    )
                )
            else:
                row[f.key] = "unheard-of" if r < 0.15 else str(rng.choice(f.levels))
        rows.append(row)
    return rows


def coded(rows: list[dict[str, Any]], features=FEATURES) -> dict[str, np.ndarray]:
    """The same rows coded as UnitTable codes them (NaN / -1 missing); unseen levels are appended
    to a copy of the levels so `Partition.route` sees them as levels its nodes did not see."""
    out: dict[str, np.ndarray] = {}
    for f in features:
        vals = [r.get(f.key) for r in rows]
        if f.kind == "numeric":
            out[f.key] = np.array([np.nan if v is None else float(v) for v in vals])
        else:
            out[f.key] = np.array(
                [
                    -1 if v is None else list(f.levels).index(v) if v in f.levels else len(f.levels)
                    for v in vals
                ],
                dtype=np.int32,
            )
    return out


def route_features(features=FEATURES) -> tuple[FeatureSpec, ...]:
    """Feature specs for `coded`: categorical levels extended by the unseen level."""
    return tuple(
        FeatureSpec(f.key, f.kind, f.levels + ("unheard-of",)) if f.kind == "categorical" else f
        for f in features
    )
