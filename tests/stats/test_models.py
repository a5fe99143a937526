"""Every cohort model's result: estimates against direct numpy, shares, honest split, segments,
intersect, parameter validation and progress."""

from __future__ import annotations

import numpy as np
import pytest

from apportion.demo.scenario import simulate
from apportion.errors import InvalidInput
from apportion.stats.models import METHODS, fit_cohort_model, honest_split, validate_params

FAST = {
    "global": {},
    "segments": {"features": ["level", "device", "tenure_days"], "bins": {"tenure_days": 3}},
    "causal_tree": {"cv_folds": 2, "max_depth": 3},
    "intersect": {"max_depth": 1},
    "two_model": {"max_iter": 30, "folds": 2, "min_samples_leaf": 50, "max_depth": 2},
    "forest": {"n_trees": 5, "max_tree_units": 5000, "max_depth": 2},
    "policy_tree": {
        "max_depth": 2,
        "guardrails": [{"metric": "cancelled", "threshold": 0.003}],
    },
}


@pytest.fixture(scope="module")
def table():
    return simulate(30_000, seed=5)


@pytest.fixture(scope="module")
def fits(table):
    return {m: fit_cohort_model(table, m, FAST[m]) for m in METHODS}


@pytest.mark.parametrize("method", METHODS)
def test_estimates_equal_direct_numpy_per_cohort(table, fits, method):
    # Reference: plain numpy means and ddof=1 variances on each cohort's estimation rows, Welch's
    # standard error for the lift, and the delta-method variance of a ratio of Deng, Knoblich and
    # Lu (2018): (1/(n mu_d^2)) (s_nn - 2 R s_nd + R^2 s_dd).
    fit = fits[method]
    cohort, _ = fit.partition.route(table.feature_values, table.features)
    e = fit.estimation_mask
    keys = fit.estimates.metric_keys
    for c in range(fit.partition.n_cohorts):
        se2 = {}
        for j in range(table.n_arms):
            rows = e & (cohort == c) & (table.arm == j)
            assert fit.estimates.n[c, j] == rows.sum()
            for k, m in enumerate(table.metrics):
                if m.kind == "ratio":
                    num, den = table.columns[m.numerator][rows], table.columns[m.denominator][rows]
                    r = num.sum() / den.sum()
                    cov = np.cov(num, den, ddof=1)
                    var = (cov[0, 0] - 2 * r * cov[0, 1] + r * r * cov[1, 1]) / den.mean() ** 2
                    value = r
                else:
                    x = table.columns[m.key][rows]
                    value, var = x.mean(), np.var(x, ddof=1)
                se2[j, k] = var / rows.sum()
                assert fit.estimates.mean[c, j, k] == pytest.approx(value, rel=1e-10), (
                    keys[k],
                    c,
                    j,
                )
                assert fit.estimates.se[c, j, k] == pytest.approx(np.sqrt(se2[j, k]), rel=1e-8)
        for j in range(1, table.n_arms):
            for k in range(len(keys)):
                lift = fit.estimates.mean[c, j, k] - fit.estimates.mean[c, 0, k]
                assert fit.estimates.effect[c, j, k] == pytest.approx(lift, rel=1e-12, abs=1e-15)
                welch = np.sqrt(se2[j, k] + se2[0, k])
                assert fit.estimates.effect_se[c, j, k] == pytest.approx(welch, rel=1e-8)


@pytest.mark.parametrize("method", METHODS)
def test_shares_and_masks(table, fits, method):
    fit = fits[method]
    cohort, _ = fit.partition.route(table.feature_values, table.features)
    assert np.array_equal(
        np.bincount(cohort, minlength=fit.partition.n_cohorts) / table.n, fit.shares
    )
    honest = method not in ("global", "segments")
    if not honest:  # no search to be honest about: every row estimates
        assert fit.estimation_mask.all()
    else:  # half of every arm, within rounding
        for j in range(table.n_arms):
            n_j = (table.arm == j).sum()
            assert fit.estimation_mask[table.arm == j].sum() == round(0.5 * n_j)
    assert fit.diagnostics["n_cohorts"] == fit.partition.n_cohorts == fit.shares.size


@pytest.mark.parametrize("method", ["segments", "intersect"])
def test_merged_cells_meet_the_minimum(table, fits, method):
    fit = fits[method]
    cohort, _ = fit.partition.route(table.feature_values, table.features)
    C, J = fit.partition.n_cohorts, table.n_arms
    for half in {True, False} if method == "intersect" else {True}:
        rows = fit.estimation_mask == half if method == "intersect" else np.ones(table.n, bool)
        n = np.bincount(cohort[rows] * J + table.arm[rows], minlength=C * J).reshape(C, J)
        assert n.min() >= 50


def test_segments_are_the_cross_product_when_cells_are_large(table):
    fit = fit_cohort_model(table, "segments", {"features": ["level", "device"]})
    # 3 levels x 3 devices, each cell holds thousands of learners: no merging
    assert fit.partition.n_cohorts == 9
    cohort, _ = fit.partition.route(table.feature_values, table.features)
    lv, dv = table.feature_values["level"], table.feature_values["device"]
    for c in range(9):
        assert len(set(zip(lv[cohort == c], dv[cohort == c], strict=True))) == 1


def test_segments_merge_small_cells(table):
    big = fit_cohort_model(
        table, "segments", {"features": ["level", "device"], "min_units_per_arm": 600}
    )
    assert big.partition.n_cohorts < 9
    assert big.moments.n.min() >= 600
    assert len(big.partition.leaves()) == 9  # several leaves share a cohort


def test_global_is_one_cohort_of_everyone(table, fits):
    fit = fits["global"]
    assert fit.partition.n_cohorts == 1 and fit.shares.tolist() == [1.0]
    assert fit.moments.n[0].sum() == table.n


def test_honest_split_is_stratified_and_reproducible():
    arm = np.repeat([0, 1, 2], [101, 50, 7])
    a, b = honest_split(arm, 1), honest_split(arm, 1)
    assert np.array_equal(a, b)
    assert [int(a[arm == j].sum()) for j in range(3)] == [round(0.5 * 101), 25, round(3.5)]
    assert not np.array_equal(a, honest_split(arm, 2))
    assert honest_split(arm, 1, 0.25)[arm == 0].sum() == 25


def test_params_are_resolved_and_a_refit_repeats(table, fits):
    fit = fits["causal_tree"]
    assert fit.params == validate_params("causal_tree", FAST["causal_tree"], table)
    assert fit.params["seed"] == 0 and fit.params["max_bins"] == 64
    assert fit.params["metric_weights"] == {m.key: 1.0 for m in table.metrics}
    again = fit_cohort_model(table, "causal_tree", fit.params)
    assert again.partition.to_dict() == fit.partition.to_dict()
    assert np.array_equal(again.moments.mean, fit.moments.mean, equal_nan=True)


@pytest.mark.parametrize(
    "method, params, name",
    [
        ("causal_tree", {"max_depth": 0}, "max_depth"),
        ("causal_tree", {"max_depth": 2.5}, "max_depth"),
        ("causal_tree", {"max_bins": 65}, "max_bins"),
        ("causal_tree", {"estimation_fraction": 1.0}, "estimation_fraction"),
        ("causal_tree", {"cv_folds": 1}, "cv_folds"),
        ("causal_tree", {"metric_weights": {"nope": 1}}, "metric_weights"),
        ("causal_tree", {"metric_weights": {"active_days": -1}}, "metric_weights"),
        ("causal_tree", {"min_units_per_arm": True}, "min_units_per_arm"),
        ("causal_tree", {"features": ["level", "shoe_size"]}, "features"),
        ("causal_tree", {"bins": {"tenure_days": 3}}, "bins"),
        ("segments", {}, "features"),
        ("segments", {"features": ["level"], "bins": {"level": 3}}, "bins"),
        ("segments", {"features": ["tenure_days"], "bins": {"tenure_days": 1}}, "bins"),
        ("intersect", {"max_depth": 5}, "max_depth"),
        ("global", {"seed": -1}, "seed"),
        ("global", {"success_metric": "revenue"}, "success_metric"),
        ("lottery", {}, "method"),
        ("policy_tree", {"guardrails": {"metric": "cancelled"}}, "guardrails"),
        ("policy_tree", {"guardrails": [{"metric": "nope", "threshold": 0}]}, "guardrails"),
        ("policy_tree", {"guardrails": [{"metric": "cancelled", "threshold": -0.1}]}, "guardrails"),
        ("policy_tree", {"guardrails": [{"metric": "active_days", "threshold": 0}]}, "guardrails"),
        (
            "policy_tree",
            {"guardrails": [{"metric": "cancelled", "threshold": 0, "confidence": 0.9}]},
            "guardrails",
        ),  # fmt: skip
        (
            "policy_tree",
            {"guardrails": [{"metric": "cancelled", "threshold": 0, "unit": "pct"}]},
            "guardrails",
        ),  # fmt: skip
        ("policy_tree", {"outcome_model": "oracle"}, "outcome_model"),
        ("two_model", {"learning_rate": 0}, "learning_rate"),
        ("forest", {"n_trees": 0}, "n_trees"),
        ("forest", {"sample_fraction": 1.5}, "sample_fraction"),
    ],
)
def test_bad_parameters_name_the_parameter(table, method, params, name):
    with pytest.raises(InvalidInput) as err:
        fit_cohort_model(table, method, params)
    assert f"'{name}'" in err.value.detail
    assert err.value.errors[0]["parameter"] == name


def test_validate_params_accepts_specs():
    from apportion.demo.scenario import FEATURES, METRICS

    p = validate_params("segments", {"features": ["tenure_days", "level"]}, (FEATURES, METRICS))
    assert p["bins"] == {"tenure_days": 4} and p["min_units_per_arm"] == 50


@pytest.mark.parametrize("method", METHODS)
def test_progress_runs_from_zero_to_one(table, method):
    seen: list[float] = []
    fit_cohort_model(table, method, FAST[method], progress=seen.append)
    assert seen[0] == 0.0 and seen[-1] == 1.0
    assert all(0.0 <= a <= b <= 1.0 for a, b in zip(seen, seen[1:], strict=False))
