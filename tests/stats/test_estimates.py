"""Shared per-cell estimates against outside references (scipy, numpy, Deng et al. 2018)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from apportion.stats.estimates import cell_moments, metric_estimates, pool_cohorts
from apportion.stats.table import MetricSpec

METRICS = (
    MetricSpec("spend", "mean"),
    MetricSpec("converted", "proportion"),
    MetricSpec("spend_per_visit", "ratio", numerator="spend", denominator="visits"),
)
COMPONENTS = ("spend", "converted", "visits")
C, J = 3, 3


def _simulate(seed: int, n: int = 6000):
    """Rows with cohort- and arm-dependent components; spend and visits correlated."""
    rng = np.random.default_rng(seed)
    cohort = rng.choice(C, size=n, p=[0.5, 0.3, 0.2])
    arm = rng.choice(J, size=n, p=[0.4, 0.3, 0.3])
    visits = rng.poisson(2.0 + cohort + 0.5 * arm) + 1.0
    spend = visits * rng.gamma(2.0, 3.0 + arm, size=n) + rng.normal(0, 1, size=n)
    converted = (rng.random(n) < 0.1 + 0.05 * arm + 0.05 * cohort).astype(float)
    values = np.column_stack([spend, converted, visits])
    return cohort, arm, values


@pytest.fixture(scope="module")
def data():
    return _simulate(7)


def test_effect_and_se_match_scipy_welch_t_test(data):
    # scipy.stats.ttest_ind(equal_var=False) is Welch's test; its statistic is diff / se, so the
    # implied SE is diff / statistic. Checked per cohort and arm for the mean and the
    # proportion metric (a proportion is a mean of 0/1 values).
    cohort, arm, values = data
    est = metric_estimates(cell_moments(cohort, C, arm, J, values, COMPONENTS), METRICS)
    for c in range(C):
        for j in range(1, J):
            for k, col in ((0, 0), (1, 1)):
                x = values[(cohort == c) & (arm == j), col]
                y = values[(cohort == c) & (arm == 0), col]
                ref = stats.ttest_ind(x, y, equal_var=False)
                diff = x.mean() - y.mean()
                assert est.effect[c, j, k] == pytest.approx(diff, rel=1e-10, abs=1e-12)
                assert est.effect_se[c, j, k] == pytest.approx(diff / ref.statistic, rel=1e-9)
    assert np.all(est.effect_se[:, 0, :] == 0.0)


def test_within_cell_covariance_equals_numpy_cov(data):
    # numpy.cov (ddof=1) of the rows of each (cohort, arm) cell
    cohort, arm, values = data
    mom = cell_moments(cohort, C, arm, J, values, COMPONENTS)
    for c in range(C):
        for j in range(J):
            rows = values[(cohort == c) & (arm == j)]
            assert mom.n[c, j] == len(rows)
            np.testing.assert_allclose(mom.mean[c, j], rows.mean(axis=0), rtol=1e-12)
            np.testing.assert_allclose(mom.cov[c, j], np.cov(rows, rowvar=False), rtol=1e-10)


def test_mean_cov_between_metrics_is_numpy_cov_over_n(data):
    # covariance of two mean estimates in a cell = unit covariance / n (numpy.cov)
    cohort, arm, values = data
    est = metric_estimates(cell_moments(cohort, C, arm, J, values, COMPONENTS), METRICS)
    rows = values[(cohort == 1) & (arm == 2)]
    ref = np.cov(rows[:, 0], rows[:, 1])[0, 1] / len(rows)
    assert est.mean_cov[1, 2, 0, 1] == pytest.approx(ref, rel=1e-10)


def test_pool_cohorts_equals_moments_on_all_rows(data):
    # pooled moments must equal numpy's mean and cov computed directly on all rows of each arm
    cohort, arm, values = data
    pooled = pool_cohorts(cell_moments(cohort, C, arm, J, values, COMPONENTS))
    assert pooled.n.shape == (1, J)
    for j in range(J):
        rows = values[arm == j]
        assert pooled.n[0, j] == len(rows)
        np.testing.assert_allclose(pooled.mean[0, j], rows.mean(axis=0), rtol=1e-12)
        np.testing.assert_allclose(pooled.cov[0, j], np.cov(rows, rowvar=False), rtol=1e-10)


def test_pool_cohorts_handles_empty_and_single_unit_cells():
    # a cohort with no units of one arm and one with a single unit must not poison the pool
    cohort = np.array([0, 0, 0, 1, 1, 1, 2])
    arm = np.array([0, 1, 1, 0, 0, 1, 0])
    values = np.array([[1.0], [2.0], [4.0], [3.0], [5.0], [7.0], [9.0]])
    pooled = pool_cohorts(cell_moments(cohort, 3, arm, 2, values, ("y",)))
    for j in range(2):
        rows = values[arm == j, 0]
        assert pooled.mean[0, j, 0] == pytest.approx(rows.mean(), rel=1e-12)
        assert pooled.cov[0, j, 0, 0] == pytest.approx(np.var(rows, ddof=1), rel=1e-12)


def _deng_ratio_var(num: np.ndarray, den: np.ndarray) -> float:
    # Deng, Knoblich and Lu, "Applying the Delta Method in Metric Analytics" (KDD 2018), eq. for
    # the ratio of means: Var(X/Y) ~ (1/n) (s_x^2 / mu_y^2 - 2 mu_x s_xy / mu_y^3
    #                                        + mu_x^2 s_y^2 / mu_y^4)
    n = len(num)
    mx, my = num.mean(), den.mean()
    s = np.cov(num, den)
    return float((s[0, 0] / my**2 - 2 * mx * s[0, 1] / my**3 + mx**2 * s[1, 1] / my**4) / n)


def test_ratio_variance_follows_deng_knoblich_lu(data):
    cohort, arm, values = data
    est = metric_estimates(cell_moments(cohort, C, arm, J, values, COMPONENTS), METRICS)
    for c in range(C):
        for j in range(J):
            rows = values[(cohort == c) & (arm == j)]
            r = rows[:, 0].sum() / rows[:, 2].sum()
            assert est.mean[c, j, 2] == pytest.approx(r, rel=1e-12)
            ref = _deng_ratio_var(rows[:, 0], rows[:, 2])
            assert est.se[c, j, 2] ** 2 == pytest.approx(ref, rel=1e-10)
    # the lift of a ratio against control: independent arms, variances add
    np.testing.assert_allclose(
        est.effect_se[:, 1:, 2] ** 2, est.se[:, 1:, 2] ** 2 + est.se[:, :1, 2] ** 2, rtol=1e-12
    )


def test_ratio_se_agrees_with_nonparametric_bootstrap():
    # Nonparametric bootstrap of the ratio of sums (Efron and Tibshirani 1993) on one cell of
    # n = 3000 units, B = 2000 resamples. Tolerance: the bootstrap SE is itself an estimate; with
    # B draws of a near-normal statistic its relative Monte Carlo error is ~ 1/sqrt(2(B-1)) = 1.6 %;
    # the delta method's own error at this n is O(1/n) and the plug-in vs ddof=1 gap is 0.02 %.
    # 6 % is ~ 3.7 Monte Carlo SEs, so this fails only if the delta-method SE is really off.
    rng = np.random.default_rng(11)
    n, b = 3000, 2000
    visits = rng.poisson(3.0, size=n) + 1.0
    spend = visits * rng.gamma(8.0, 1.5, size=n) + rng.normal(0, 2, size=n)
    values = np.column_stack([spend, visits])
    zeros = np.zeros(n, dtype=np.int64)
    metric = (MetricSpec("spv", "ratio", numerator="spend", denominator="visits"),)
    est = metric_estimates(cell_moments(zeros, 1, zeros, 1, values, ("spend", "visits")), metric)
    draws = np.empty(b)
    for start in range(0, b, 500):
        idx = rng.integers(0, n, size=(500, n))
        draws[start : start + 500] = spend[idx].sum(axis=1) / visits[idx].sum(axis=1)
    boot_se = draws.std(ddof=1)
    assert est.se[0, 0, 0] == pytest.approx(boot_se, rel=0.06)
    # and the naive SE that ignores the denominator's noise is clearly different from both
    naive = np.std(spend / visits.mean(), ddof=1) / np.sqrt(n)
    assert abs(naive - boot_se) / boot_se > 0.2


def test_cells_with_fewer_than_two_units_have_nan_variance():
    cohort = np.array([0, 0, 0, 1])
    arm = np.array([0, 0, 1, 0])
    values = np.array([[1.0], [3.0], [5.0], [2.0]])
    mom = cell_moments(cohort, 2, arm, 2, values, ("y",))
    assert mom.n.tolist() == [[2, 1], [1, 0]]
    assert mom.cov[0, 0, 0, 0] == pytest.approx(2.0)
    assert np.isnan(mom.cov[0, 1, 0, 0]) and np.isnan(mom.cov[1, 0, 0, 0])
    assert np.isnan(mom.mean[1, 1, 0])
