"""The causal tree on the simulation designs of Athey and Imbens (2016, PNAS).

The design formulas are from memory; in particular epsilon ~ N(0, .01)
is read as variance 0.01. No published number is hard-coded: the checks are that the first splits
use the effect modifiers and that the honest tree's infeasible MSE against the known kappa(x) is
no worse than a transformed-outcome tree (the baseline Athey and Imbens 2016 compare against) fitted with scikit-learn on the same rows.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.model_selection import GridSearchCV
from sklearn.tree import DecisionTreeRegressor

from apportion.stats.models import fit_cohort_model
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

MIN_PER_ARM = 25
N_TRAIN = 4000  # halves of 2000; AI 2016 used 500-1000 per half [M]: at that size the variance
# term (next test) can let a mean-only covariate win the root split, so the samples are a bit larger
N_TEST = 8000  # AI 2016's test-sample size [M]


def eta_kappa(design: int, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and effect functions of AI 2016 designs 1 and 2 (from memory)."""
    if design == 1:
        return 0.5 * x[:, 0] + x[:, 1], 0.5 * x[:, 0]
    eta = 0.5 * (x[:, 0] + x[:, 1]) + x[:, 2:6].sum(axis=1)
    kappa = np.where(x[:, 0] > 0, x[:, 0], 0.0) + np.where(x[:, 1] > 0, x[:, 1], 0.0)
    return eta, kappa


def ai_table(design: int, n: int, seed: int) -> tuple[UnitTable, np.ndarray]:
    """A UnitTable from design 1 (2 features) or 2 (10 features); also returns X (n, d)."""
    d = 2 if design == 1 else 10
    rng = np.random.default_rng(seed)
    x = rng.standard_normal((n, d))
    w = (rng.random(n) < 0.5).astype(np.int64)  # p = 0.5
    eta, kappa = eta_kappa(design, x)
    y = eta + 0.5 * (2 * w - 1) * kappa + rng.normal(0.0, 0.1, n)
    table = UnitTable(
        unit_ids=np.array([str(i) for i in range(n)], dtype=object),
        arm=w,
        arm_keys=("control", "treated"),
        design_shares=np.array([0.5, 0.5]),
        features=tuple(FeatureSpec(f"x{i + 1}", "numeric") for i in range(d)),
        feature_values={f"x{i + 1}": x[:, i] for i in range(d)},
        metrics=(MetricSpec("y", "mean"),),
        columns={"y": y},
    )
    return table, x


def tot_tree_effects(table: UnitTable, x: np.ndarray, est: np.ndarray, x_te: np.ndarray, seed: int):
    """Transformed-outcome tree (the baseline Athey and Imbens 2016 compare against): scikit-learn's regression tree on
    Y* = Y (W - p) / (p (1 - p)) on the structure rows, pruned by 5-fold CV over its own
    cost-complexity path, leaves re-estimated by difference in means on the estimation rows."""
    p = 0.5
    y, w = table.columns["y"], table.arm
    ystar = y * (w - p) / (p * (1 - p))
    s = ~est
    base = DecisionTreeRegressor(min_samples_leaf=2 * MIN_PER_ARM, max_depth=6, random_state=seed)
    path = base.cost_complexity_pruning_path(x[s], ystar[s])
    search = GridSearchCV(base, {"ccp_alpha": np.unique(path.ccp_alphas)}, cv=5,
                          scoring="neg_mean_squared_error")  # fmt: skip
    tree = search.fit(x[s], ystar[s]).best_estimator_
    leaf_est, leaf_te = tree.apply(x[est]), tree.apply(x_te)
    out = tree.predict(x_te)
    for leaf in np.unique(leaf_te):
        rows = leaf_est == leaf
        t, c = rows & (w[est] == 1), rows & (w[est] == 0)
        if t.any() and c.any():
            out[leaf_te == leaf] = y[est][t].mean() - y[est][c].mean()
    return out


def our_effects(fit, table_te: UnitTable) -> np.ndarray:
    cohort, _ = fit.partition.route(table_te.feature_values, table_te.features)
    return fit.estimates.effect[cohort, 1, 0]


@pytest.mark.parametrize(
    "design, modifiers", [(1, {"x1"}), (2, {"x1", "x2"})], ids=["design1", "design2"]
)
def test_first_split_uses_an_effect_modifier(design, modifiers):
    # AI 2016 (from memory): only x1 (design 1) or x1, x2 (design 2) modify the
    # effect; the others move the mean only. The root split must be on a modifier and every
    # modifier must be used. Deeper splits on the mean-only covariates are not an error: the
    # honest criterion's variance term rewards leaves whose effect estimates are more precise
    # (a split on x2 in design 1 cuts the within-leaf variance of Y), so they are not asserted on.
    # With 2000 structure rows CV pruning sometimes keeps a single split, so "every modifier used"
    # is asked of 8 of 10 replications (the >90 % recalled from the paper is for larger samples).
    all_used = 0
    for rep in range(10):
        table, _ = ai_table(design, N_TRAIN, seed=100 + rep)
        fit = fit_cohort_model(
            table, "causal_tree", {"seed": rep, "min_units_per_arm": MIN_PER_ARM}
        )
        splits = fit.diagnostics["splits"]
        assert splits and splits[0]["depth"] == 0
        assert splits[0]["feature"] in modifiers, (rep, splits)
        all_used += modifiers <= set(fit.diagnostics["features_used"])
    assert all_used >= 8, all_used


@pytest.mark.parametrize("design", [1, 2], ids=["design1", "design2"])
def test_mse_no_worse_than_transformed_outcome_tree(design):
    # Infeasible MSE (1/N_te) sum (kappa(X) - tau_hat(X))^2 of AI 2016 on a test sample of 8000.
    # AI 2016 found the transformed-outcome tree worse than the honest causal tree [M]. Averaging
    # over 5 replications (fixed seeds) keeps the comparison from hinging on one draw; both trees
    # get the same rows, the same minimum leaf size, CV pruning and honest leaf estimates.
    ours, tot = [], []
    for rep in range(5):
        table, x = ai_table(design, N_TRAIN, seed=200 + rep)
        table_te, x_te = ai_table(design, N_TEST, seed=900 + rep)
        _, kappa_te = eta_kappa(design, x_te)
        fit = fit_cohort_model(
            table, "causal_tree", {"seed": rep, "min_units_per_arm": MIN_PER_ARM}
        )
        ours.append(np.mean((kappa_te - our_effects(fit, table_te)) ** 2))
        tot_hat = tot_tree_effects(table, x, fit.estimation_mask, x_te, seed=rep)
        tot.append(np.mean((kappa_te - tot_hat) ** 2))
    assert np.mean(ours) <= np.mean(tot), (ours, tot)
    # and the tree beats the constant effect when there is heterogeneity
    assert np.mean(ours) < np.var(kappa_te)
