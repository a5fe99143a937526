"""Doubly robust scores (apportion/stats/dr.py) against statsmodels, a hand-checked worked example and
the Horvitz-Thompson estimator."""

from __future__ import annotations

import numpy as np
import pytest

from apportion.errors import InvalidInput
from apportion.stats.dr import dr_scores, folds_by_arm, policy_value


def test_matches_statsmodels_aipw_with_regression_outcome_models():
    # Reference: statsmodels.treatment.TreatmentEffect.aipw (statsmodels 0.14+). With a
    # constant-only logit the estimated propensity is the treated share, so passing that share
    # as e and the same per-arm OLS predictions as mu must give the same potential-outcome means
    # and the same average effect, to rounding.
    sm = pytest.importorskip("statsmodels.api")
    from statsmodels.treatment.treatment_effects import TreatmentEffect

    rng = np.random.default_rng(0)
    n = 2000
    x = rng.normal(size=(n, 2))
    w = (rng.random(n) < 0.4).astype(np.int64)
    y = 1 + x[:, 0] + w * (0.5 + 0.3 * x[:, 1]) + rng.normal(size=n)
    exog = sm.add_constant(x)
    select = sm.Logit(w, np.ones((n, 1))).fit(disp=0)
    ate, pom0, pom1 = TreatmentEffect(sm.OLS(y, exog), w, results_select=select).aipw(
        return_results=False
    )
    mu = np.empty((n, 2, 1))
    for j in (0, 1):
        mu[:, j, 0] = sm.OLS(y[w == j], exog[w == j]).fit().predict(exog)
    gamma = dr_scores(y[:, None], w, np.array([1 - w.mean(), w.mean()]), mu)
    assert gamma[:, 0, 0].mean() == pytest.approx(pom0, rel=1e-10)
    assert gamma[:, 1, 0].mean() == pytest.approx(pom1, rel=1e-10)
    assert (gamma[:, 1, 0] - gamma[:, 0, 0]).mean() == pytest.approx(ate, rel=1e-10)


def test_worked_example_by_hand():
    # Four units, arms (0, 1, 1, 0), shares (0.5, 0.5), outcomes (2, 5, 3, 4), outcome model
    # mu_0 = 3 and mu_1 = 4 for everyone. By hand, Gamma_i1 = 4 + 1{W=1}(Y - 4)/0.5:
    #   unit 0: 4; unit 1: 4 + 2 = 6; unit 2: 4 - 2 = 2; unit 3: 4
    # and Gamma_i0 = 3 + 1{W=0}(Y - 3)/0.5: unit 0: 3 - 2 = 1; 1: 3; 2: 3; 3: 3 + 2 = 5.
    # Means: 4 and 3, effect 1 (the difference of arm means, 4 - 3, as it must be here).
    y = np.array([[2.0], [5.0], [3.0], [4.0]])
    arm = np.array([0, 1, 1, 0])
    mu = np.empty((4, 2, 1))
    mu[:, 0], mu[:, 1] = 3.0, 4.0
    g = dr_scores(y, arm, np.array([0.5, 0.5]), mu)
    assert g[:, 1, 0].tolist() == [4.0, 6.0, 2.0, 4.0]
    assert g[:, 0, 0].tolist() == [1.0, 3.0, 3.0, 5.0]
    value, se = policy_value(g - g[:, :1], np.tile([0.0, 1.0], (4, 1)))
    assert value[0] == 1.0
    # sd of the per-unit differences (3, 3, -1, -1) with ddof 1 is sqrt(16/3), over sqrt(4)
    assert se[0] == pytest.approx(np.sqrt(16 / 3) / 2)


def test_zero_outcome_model_gives_horvitz_thompson():
    # With mu = 0 the score of arm j is 1{W=j} Y / e_j: its mean is the Horvitz-Thompson (1952)
    # estimator of the arm's mean outcome.
    rng = np.random.default_rng(3)
    n, e = 500, np.array([0.5, 0.3, 0.2])
    arm = rng.choice(3, n, p=e)
    y = rng.normal(size=(n, 2))
    g = dr_scores(y, arm, e, np.zeros((n, 3, 2)))
    for j in range(3):
        assert g[:, j].mean(0) == pytest.approx(y[arm == j].sum(0) / (n * e[j]))


def test_fractional_policy_value_is_linear_in_the_shares():
    rng = np.random.default_rng(4)
    s = rng.normal(size=(300, 3, 2))
    a, b = np.tile([1.0, 0, 0], (300, 1)), np.tile([0, 0.5, 0.5], (300, 1))
    va, vb = policy_value(s, a)[0], policy_value(s, b)[0]
    assert policy_value(s, 0.25 * a + 0.75 * b)[0] == pytest.approx(0.25 * va + 0.75 * vb)


def test_folds_are_stratified_by_arm_and_reproducible():
    arm = np.repeat([0, 1, 2], [103, 50, 7])
    f = folds_by_arm(arm, 5, 1)
    assert np.array_equal(f, folds_by_arm(arm, 5, 1))
    for j, n_j in ((0, 103), (1, 50), (2, 7)):
        counts = np.bincount(f[arm == j], minlength=5)
        assert counts.max() - counts.min() <= 1 and counts.sum() == n_j
    with pytest.raises(InvalidInput):
        folds_by_arm(arm, 1, 0)


def test_shape_and_zero_share_are_refused():
    with pytest.raises(InvalidInput, match="shape"):
        dr_scores(np.zeros((3, 1)), np.array([0, 1, 0]), np.array([0.5, 0.5]), np.zeros((3, 3, 1)))
    with pytest.raises(InvalidInput, match="design share is 0"):
        dr_scores(np.zeros((2, 1)), np.array([0, 1]), np.array([1.0, 0.0]), np.zeros((2, 2, 1)))
