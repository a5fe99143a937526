"""Decision-focused partitions: the model methods `two_model`,
`forest` and `policy_tree`.

All three grow a policy tree (`apportion.stats.policytree`) on the structure half of an honest split,
with per-unit Lagrangian rewards built from doubly robust scores (`apportion.stats.dr`):

    score_ij = Delta_ij0 - sum_k lambda_k Delta_ijk           (guardrails oriented "larger harms")

where lambda_k are the guardrail prices of the allocation LP solved on the current partition. By LP
duality the constrained optimum on a partition is min over lambda >= 0 of
sum_c p_c max_j (mu_cj0 - sum_k lambda_k mu_cjk) + sum_k lambda_k t_k, so for fixed prices the
partition-dependent part is exactly the policy tree's criterion. A few rounds alternate:
grow on the current prices, estimate the cells of the new partition on the structure half,
re-solve the LP, average the old and new prices; stop when a partition repeats. The prices can
cycle between partitions (a split changes which guardrail binds), so the kept partition is the
round's whose LP optimum on the structure half is largest: that optimum is the constrained value
the partition offers, the quantity the rounds try to raise.

The methods differ only in the outcome model inside the scores: `two_model` uses cross-fitted
gradient boosting per arm and component, `forest` the out-of-bag honest causal forest, and
`policy_tree` cross-fitted arm means by default (plain AIPW). Everything that shapes the partition,
the prices included, uses structure rows only; estimation rows are only counted (every arm keeps
`min_units_per_arm` rows in every leaf on both halves), so the cohort estimates the plans use,
computed on the estimation half as for every model, are honest.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import linprog

from apportion.errors import InvalidInput
from apportion.stats.binning import bin_features
from apportion.stats.dr import dr_scores, folds_by_arm
from apportion.stats.honest import criterion_outcomes, honest_split
from apportion.stats.member import (
    BoostSettings,
    ForestSettings,
    arm_mean_outcomes,
    boosted_outcomes,
    feature_matrix,
    forest_outcomes,
)
from apportion.stats.policytree import grow_policy_tree
from apportion.stats.table import MetricSpec, UnitTable
from apportion.stats.tree import Tree

DECISION_METHODS = ("two_model", "forest", "policy_tree")


@dataclass(frozen=True)
class Targets:
    """The optimizer's linear form on unit level: per-unit metric values = components @ W.

    W: (Q, 1 + K), column 0 the success metric oriented larger-is-better, columns 1..K the
    guardrails oriented larger-is-harmful, ratio metrics linearized around the control arm
    (as `apportion.optimize.linear` does around the baseline); rhs: (K,) allowed harm >= 0;
    keys: the metric of every column."""

    W: np.ndarray
    rhs: np.ndarray
    keys: tuple[str, ...]


def targets(
    metrics: tuple[MetricSpec, ...],
    components: tuple[str, ...],
    control_means: np.ndarray,
    success: str,
    guardrails: list[dict[str, Any]],
) -> Targets:
    """`control_means` (Q,): the control arm's component means (the baseline of the prices)."""
    pos = {c: i for i, c in enumerate(components)}
    spec = {m.key: m for m in metrics}
    q = len(components)

    def value(m: MetricSpec) -> float:
        if m.kind == "ratio":
            return float(
                control_means[pos[m.ratio_columns[0]]] / control_means[pos[m.ratio_columns[1]]]
            )
        return float(control_means[pos[m.key]])

    def weights(m: MetricSpec, t_abs: float) -> np.ndarray:
        w = np.zeros(q)
        if m.kind == "ratio":
            a, d = pos[m.ratio_columns[0]], pos[m.ratio_columns[1]]
            den = control_means[d]
            w[a], w[d] = 1.0 / den, -(value(m) + t_abs) / den
        else:
            w[pos[m.key]] = 1.0
        return w

    s = spec[success]
    cols = [(1.0 if s.direction == "higher" else -1.0) * weights(s, 0.0)]
    rhs = []
    for g in guardrails:
        m = spec[g["metric"]]
        t = float(g["threshold"])
        t_abs = t / 100.0 * abs(value(m)) if g.get("unit", "absolute") == "relative" else t
        harm = 1.0 if m.direction == "lower" else -1.0
        cols.append(harm * weights(m, t_abs))
        rhs.append(max(harm * t_abs, 0.0))
    return Targets(
        np.column_stack(cols), np.array(rhs), (success, *[g["metric"] for g in guardrails])
    )


def lagrange_lp(
    p: np.ndarray, m: np.ndarray, rhs: np.ndarray
) -> tuple[np.ndarray, np.ndarray, float]:
    """max sum_c p_c sum_j x_cj m_cj0 s.t. sum_c p_c sum_j x_cj m_cjk <= rhs_k, x_c on the simplex.

    p: (C,); m: (C, J, 1 + K) cell lifts (arm 0 = control, lift 0); rhs: (K,) >= 0, so all-control
    is feasible. Returns x (C, J), the prices lambda (K,) = d(optimum)/d(rhs) >= 0, and the
    optimum. Prices are scipy's HiGHS marginals of the minimization, negated (sign checked
    numerically in the tests against a re-solve at a larger threshold)."""
    c, j, mk = m.shape
    k = mk - 1
    a_eq = np.kron(np.eye(c), np.ones(j))
    kw: dict[str, Any] = {}
    if k:
        kw = {
            "A_ub": np.stack([(p[:, None] * m[..., i]).ravel() for i in range(1, mk)]),
            "b_ub": rhs,
        }
    res = linprog(-(p[:, None] * m[..., 0]).ravel(), A_eq=a_eq, b_eq=np.ones(c),
                  bounds=(0, None), method="highs", **kw)  # fmt: skip
    if res.status != 0:  # cannot happen with rhs >= 0 (all-control is feasible); say so if it does
        raise InvalidInput(f"the price LP failed: {res.message}")
    lam = -np.asarray(res.ineqlin.marginals) if k else np.zeros(0)
    return res.x.reshape(c, j), np.maximum(lam, 0.0), float(-res.fun)


def cell_means(leaf: np.ndarray, n_cells: int, delta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shares (C,) and per-cell means (C, J, M) of the per-unit scores `delta` (n, J, M)."""
    n, j, mk = delta.shape
    cnt = np.bincount(leaf, minlength=n_cells).astype(np.float64)
    flat = delta.reshape(n, j * mk)
    sums = np.stack([np.bincount(leaf, flat[:, i], n_cells) for i in range(j * mk)], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = np.nan_to_num(sums / cnt[:, None]).reshape(n_cells, j, mk)
    return cnt / max(n, 1), means


def _leaf_codes(tree: Tree, node: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    leaves = tree.leaves()
    cnode = np.full(len(tree), -1, dtype=np.int64)
    cnode[leaves] = np.arange(len(leaves))
    return cnode, cnode[node], len(leaves)


def _signature(tree: Tree) -> tuple[Any, ...]:
    return tuple(
        (f, None if lk is None else lk.tobytes())
        for f, lk in zip(tree.feature, tree.lookup, strict=True)
    )


def fit_decision(
    table: UnitTable,
    method: str,
    p: dict[str, Any],
    progress: Callable[[float], None],
) -> tuple[Tree, np.ndarray, int, np.ndarray, np.ndarray, Any, dict[str, Any]]:
    """Fit `method` (one of DECISION_METHODS) with resolved parameters `p`.

    Returns the tree, the cohort of every tree node (-1 inside), the cohort count, each row's
    cohort (n,), the estimation mask (n,), the feature bins and diagnostics."""
    est = honest_split(table.arm, p["seed"], p["estimation_fraction"])
    s_rows, e_rows = np.flatnonzero(~est), np.flatnonzero(est)
    if s_rows.size == 0 or e_rows.size == 0:
        raise InvalidInput(
            f"parameter 'estimation_fraction' leaves one half of the rows empty, got "
            f"{p['estimation_fraction']!r}",
            errors=[{"parameter": "estimation_fraction", "message": "leaves a half empty"}],
        )
    J = table.n_arms
    arm = table.arm.astype(np.int64)
    values = table.component_matrix()
    comps = table.component_names()
    control = s_rows[arm[s_rows] == 0]
    tg = targets(table.metrics, comps, values[control].mean(axis=0),
                 p["success_metric"] or table.metrics[0].key, p["guardrails"])  # fmt: skip
    bins = bin_features(table, p["features"], p["max_bins"])
    folds = folds_by_arm(arm[s_rows], p["folds"], p["seed"])
    diag: dict[str, Any] = {}
    model_share = 0.6 if method in ("two_model", "forest") else 0.1

    def model_progress(f: float) -> None:
        progress(model_share * f)

    outcome = p.get("outcome_model", method)
    if outcome in ("two_model", "boosted"):
        x, cat = feature_matrix(table, p["features"])
        settings = BoostSettings(**{k: p[k] for k in ("learning_rate", "max_iter", "max_leaf_nodes",
                                                       "min_samples_leaf", "l2_regularization",
                                                       "max_train_rows") if k in p})  # fmt: skip
        mu, mdiag = boosted_outcomes(x[s_rows], cat, values[s_rows], arm[s_rows], J, folds,
                                     settings, p["seed"], model_progress)  # fmt: skip
    elif outcome == "forest":
        y = criterion_outcomes(table, s_rows)
        fs = ForestSettings(
            n_trees=p["n_trees"], sample_fraction=p["sample_fraction"],
            max_tree_units=p["max_tree_units"], max_depth=p["forest_max_depth"],
            min_units=p["forest_min_units"], mtry=p["mtry"] or None,
        )  # fmt: skip
        mu, mdiag = forest_outcomes(bins, s_rows, arm, y, values, J, fs, p["seed"], model_progress)
    else:
        mu, mdiag = arm_mean_outcomes(values[s_rows], arm[s_rows], J, folds), {}
    diag["outcome_model"] = {"kind": "arm_means" if outcome in ("policy_tree", "arm_means") else
                             ("boosted" if outcome in ("two_model", "boosted") else "forest"),
                             "folds": p["folds"], **mdiag}  # fmt: skip
    gamma = dr_scores(values[s_rows], arm[s_rows], table.design_shares, mu)
    del mu
    delta = np.einsum("njq,qm->njm", gamma - gamma[:, :1], tg.W)  # (n_s, J, 1 + K)
    del gamma
    n_e = max(e_rows.size, 1)

    def effective_rhs(leaf: np.ndarray, x: np.ndarray) -> np.ndarray:
        # the optimizer will hold each guardrail's estimate (on the n_e estimation rows) price_z
        # of its sd below the threshold, so price the guardrails at that tighter threshold: the
        # sd of the plan's estimate is the sd of its per-unit DR guardrail scores over sqrt(n_e)
        if not p["price_z"] or not tg.rhs.size:
            return tg.rhs
        psi = np.einsum("nj,njk->nk", x[leaf], delta[..., 1:])
        lowered: np.ndarray = np.maximum(
            tg.rhs - p["price_z"] * psi.std(axis=0) / np.sqrt(n_e), 0.0
        )
        return lowered

    root = np.zeros(delta.shape[0], dtype=np.int64)
    x0, lam, _ = lagrange_lp(np.ones(1), delta.mean(axis=0)[None], tg.rhs)
    rhs = effective_rhs(root, x0)
    if p["price_z"] and tg.rhs.size:
        _, lam, _ = lagrange_lp(np.ones(1), delta.mean(axis=0)[None], rhs)
    rounds_out = []
    n_rounds = p["rounds"] if tg.rhs.size else 1
    seen: set[tuple[Any, ...]] = set()
    kept: tuple[Any, ...] | None = None  # (value, round, tree, node_s, node_e)
    for r in range(n_rounds):
        reward = delta[..., 0] - delta[..., 1:] @ lam

        def grow_progress(f: float, r: int = r) -> None:
            progress(model_share + (1 - model_share) * (r + f) / n_rounds)

        cand, cs, ce = grow_policy_tree(bins, s_rows, e_rows, arm, reward,
                                        max_depth=p["max_depth"], min_units=p["min_units_per_arm"],
                                        split_z=p["split_z"], progress=grow_progress)  # fmt: skip
        sig = _signature(cand)
        _, leaf_s, n_leaves = _leaf_codes(cand, cs)
        shares, m = cell_means(leaf_s, n_leaves, delta)
        priced = rhs
        x_r, lam_new, value = lagrange_lp(shares, m, rhs)
        rhs = effective_rhs(leaf_s, x_r)
        rounds_out.append({
            "prices_used": dict(zip(tg.keys[1:], np.round(lam, 6).tolist(), strict=True)),
            "thresholds_priced": dict(zip(tg.keys[1:], np.round(priced, 8).tolist(), strict=True)),
            "leaves": n_leaves,
            "structure_value": round(value, 8),
            "prices_after": dict(zip(tg.keys[1:], np.round(lam_new, 6).tolist(), strict=True)),
        })  # fmt: skip
        if kept is None or value > kept[0]:
            kept = (value, r, cand, cs, ce)
        if sig in seen:
            break
        seen.add(sig)
        lam = 0.5 * (lam + lam_new)
    assert kept is not None
    _, chosen, tree, node_s, node_e = kept
    cnode, _, n_coh = _leaf_codes(tree, node_s)
    cohort = np.empty(table.n, dtype=np.int64)
    cohort[s_rows], cohort[e_rows] = cnode[node_s], cnode[node_e]
    diag.update(
        rounds=rounds_out,
        chosen_round=chosen,
        guardrail_prices=rounds_out[chosen]["prices_after"],
        price_units="success-metric lift (larger-is-better orientation) per unit of the guardrail's threshold",
    )
    return tree, cnode, n_coh, cohort, est, bins, diag
