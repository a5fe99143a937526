"""Simulation designs for judging decision methods against a known truth (invented numbers only).

Two designs: "aligned", where one arm is best and safe for everyone (a good
pipeline returns that arm), and "opposed", where success and harm conflict for some members so a
personalized plan beats every single arm. Four arms with designed shares 1/4, metrics y0 (success,
higher is better), y1 (a harm, lower is better, allowed lift 0.03) and y2 (a binary guardrail,
allowed lift 0.01). Heterogeneity comes only from arm x feature interactions on x1..x4; x5 is
prognostic only and x6..x8 are decoys. `sigma` scales the outcome noise (0.5, 1, 2).

The truth is exposed: `effects` gives every unit's true lifts, `oracle` solves the LP on the true
expected lifts over a fine partition of the drivers (scipy.optimize.linprog), and `plan_true_lifts`
scores any plan (a partition plus an allocation matrix) on a truth sample.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from scipy.optimize import linprog

from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

DESIGNS = ("aligned", "opposed")
SIGMAS = (0.5, 1.0, 2.0)
J = 4
ARMS = ("control", "arm_1", "arm_2", "arm_3")
LIMITS = np.array([0.03, 0.01])  # allowed lift of y1 and y2
SUCCESS = "y0"
METRICS: tuple[MetricSpec, ...] = (
    MetricSpec("y0", "mean", "higher"),
    MetricSpec("y1", "mean", "lower"),
    MetricSpec("y2", "proportion", "lower"),
)
FEATURES: tuple[FeatureSpec, ...] = (
    FeatureSpec("x1", "numeric"),
    FeatureSpec("x2", "numeric"),
    FeatureSpec("x3", "categorical", ("0", "1")),
    FeatureSpec("x4", "categorical", ("0", "1", "2")),
    FeatureSpec("x5", "numeric"),
    FeatureSpec("x6", "numeric"),
    FeatureSpec("x7", "categorical", ("0", "1")),
    FeatureSpec("x8", "categorical", ("0", "1", "2", "3")),
)


def guardrails(confidence: float = 0.9) -> list[dict]:
    """The designs' guardrails as a plan body lists them."""
    return [
        {
            "metric": "y1",
            "threshold": float(LIMITS[0]),
            "unit": "absolute",
            "confidence": confidence,
        },
        {
            "metric": "y2",
            "threshold": float(LIMITS[1]),
            "unit": "absolute",
            "confidence": confidence,
        },
    ]


def features(n: int, rng: np.random.Generator) -> np.ndarray:
    """(n, 8) raw features; columns 3, 4, 7, 8 (x3, x4, x7, x8) are integer codes."""
    return np.c_[
        rng.uniform(0, 1, n), rng.uniform(0, 1, n), rng.binomial(1, 0.4, n),
        rng.choice(3, n, p=[0.5, 0.3, 0.2]), rng.normal(0, 1, n),
        rng.uniform(0, 1, n), rng.binomial(1, 0.5, n), rng.choice(4, n),
    ]  # fmt: skip


def effects(x: np.ndarray, design: str) -> np.ndarray:
    """(n, J, 3) true lift of arm j over control on metric k for every unit."""
    if design not in DESIGNS:
        raise ValueError(f"design must be one of {DESIGNS}, got {design!r}")
    s = 1 / (1 + np.exp(-10 * (x[:, 0] - 0.5)))
    x2, x3, c = x[:, 1], x[:, 2], x[:, 3]
    z0 = 0 * x2
    tau = np.zeros((len(x), J, 3))
    if design == "aligned":
        tau[:, 1] = np.c_[0.15 + 0.05 * x3, z0 - 0.01, z0]
        tau[:, 2] = np.c_[0.10 * s, z0 + 0.06, 0.01 * (c == 2)]
        tau[:, 3] = np.c_[z0 + 0.12, 0.08 + 0.02 * x2, 0.02 * x3]
    else:
        tau[:, 1] = np.c_[0.10 + 0.10 * x3, z0 + 0.02, z0]
        tau[:, 2] = np.c_[0.25 * s, 0.04 + 0.12 * (1 - s), 0.03 * (c == 2)]
        tau[:, 3] = np.c_[0.20 + 0.15 * x2, 0.10 * x2 + 0.05 * (c == 0), 0.04 * x3]
    return tau


def _feature_values(x: np.ndarray) -> dict[str, np.ndarray]:
    out = {}
    for i, f in enumerate(FEATURES):
        col = x[:, i]
        out[f.key] = col.astype(np.int32) if f.kind == "categorical" else col.astype(np.float64)
    return out


def simulate(n: int, design: str, sigma: float, seed: int) -> UnitTable:
    """A readout of n units under `design` with noise scale `sigma` (reproducible per seed)."""
    rng = np.random.default_rng(seed)
    x = features(n, rng)
    w = rng.choice(J, n)
    t = effects(x, design)[np.arange(n), w]
    e = rng.multivariate_normal([0, 0], [[1, 0.3], [0.3, 1]], n) * sigma  # within-unit corr 0.3
    y0 = 1 + 0.5 * x[:, 0] + 0.3 * x[:, 4] + t[:, 0] + e[:, 0]
    y1 = 0.5 + 0.2 * x[:, 4] + t[:, 1] + e[:, 1]
    y2 = rng.binomial(1, np.clip(0.05 + 0.02 * x[:, 2] + t[:, 2], 0, 1)).astype(np.float64)
    return UnitTable(
        unit_ids=np.array([f"u{i}" for i in range(n)], dtype=object),
        arm=w.astype(np.int64),
        arm_keys=ARMS,
        design_shares=np.full(J, 1 / J),
        features=FEATURES,
        feature_values=_feature_values(x),
        metrics=METRICS,
        columns={"y0": y0, "y1": y1, "y2": y2},
    )


def _fine_cell(x: np.ndarray, b: int = 20) -> np.ndarray:
    q = lambda v: np.minimum((v * b).astype(int), b - 1)  # noqa: E731
    return ((q(x[:, 0]) * b + q(x[:, 1])) * 2 + x[:, 2].astype(int)) * 3 + x[:, 3].astype(int)


@dataclass(frozen=True)
class Truth:
    """A truth sample of one design: features, true lifts, the oracle's and single arms' lifts."""

    design: str
    feature_values: dict[str, np.ndarray]
    tau: np.ndarray  # (n, J, 3)
    oracle: np.ndarray  # (3,) true lifts of the oracle plan
    single: np.ndarray  # (J, 3) true lifts of each arm for everyone
    best_single_arm: int  # the best arm for everyone that meets both limits (0 = control)


@lru_cache(maxsize=4)
def truth(design: str, n_truth: int = 400_000, seed: int = 12345) -> Truth:
    """The truth sample of `design` and its oracle: the LP on the true expected lifts over the
    2,400-cell grid of the drivers (scipy linprog, HiGHS dual simplex)."""
    rng = np.random.default_rng(seed)
    xt = features(n_truth, rng)
    tau = effects(xt, design)
    _, inv = np.unique(_fine_cell(xt), return_inverse=True)
    cnt = np.bincount(inv)
    c = len(cnt)
    m = np.stack(
        [np.bincount(inv, tau[:, j, k]) / cnt for j in range(J) for k in range(3)], 1
    ).reshape(c, J, 3)
    p = cnt / n_truth
    r = linprog(
        -(p[:, None] * m[:, :, 0]).ravel(),
        A_ub=np.stack([(p[:, None] * m[:, :, k]).ravel() for k in (1, 2)]),
        b_ub=LIMITS,
        A_eq=np.kron(np.eye(c), np.ones(J)),
        b_eq=np.ones(c),
        bounds=(0, None),
        method="highs-ds",
    )
    assert r.status == 0, r.message
    oracle = np.einsum("c,cj,cjk->k", p, r.x.reshape(c, J), m)
    single = tau.mean(axis=0)
    ok = [j for j in range(J) if np.all(single[j, 1:] <= LIMITS + 1e-12)]
    best = max(ok, key=lambda j: single[j, 0])
    return Truth(design, _feature_values(xt), tau, oracle, single, best)


def plan_true_lifts(tr: Truth, partition: Any, allocation: np.ndarray) -> np.ndarray:
    """(3,) true lifts (y0, y1, y2) of serving `allocation` (C, J) on `partition` to the truth
    sample; a fractional row is valued by its expectation."""
    cohort, _ = partition.route(tr.feature_values, FEATURES)
    probs = np.asarray(allocation)[cohort]
    return np.einsum("ij,ijk->k", probs, tr.tau) / len(tr.tau)
