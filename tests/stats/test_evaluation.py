"""Held-out policy evaluation: IPW (Horvitz and Thompson, 1952) and AIPW (Robins, Rotnitzky and
Zhao, 1994) as published, checked by simulation with known values, by direct
computation of the published formulas, and by the post-stratification identity.

Wager and Athey (2018) setting A has a non-constant propensity; ours are the design
shares, so that case does not apply and is not tested.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from apportion.errors import InvalidInput
from apportion.stats.evaluation import evaluate_policy
from apportion.stats.table import MetricSpec

P = np.array([0.5, 0.3, 0.2])  # cohort shares in the population
E = np.array([0.5, 0.25, 0.25])  # design shares
MU = np.array([[0.0, 1.0, 0.5], [10.0, 10.5, 12.0], [20.0, 19.0, 21.0]])  # E[y | c, j]
SIGMA = 1.0  # sd of y within a cell
LAM = np.array([[1.0, 1.5, 2.0], [2.0, 2.0, 3.0], [3.0, 4.0, 3.0]])  # den - 1 ~ Poisson(LAM)
RHO = np.array([[5.0, 6.0, 5.5], [4.0, 4.0, 5.0], [3.0, 3.5, 2.0]])  # E[num | den, c, j] / den
COMPONENTS = ("y", "num", "den")
METRICS = (
    MetricSpec("y", "mean"),
    MetricSpec("r", "ratio", numerator="num", denominator="den"),
)
PLAN = np.array([[0.0, 1.0, 0.0], [0.0, 0.0, 1.0], [0.2, 0.3, 0.5]])
BASE = np.array([[1.0, 0.0, 0.0]] * 3)


def _simulate(seed: int, n: int):
    rng = np.random.default_rng(seed)
    c = rng.choice(3, size=n, p=P)
    a = rng.choice(3, size=n, p=E)
    y = MU[c, a] + rng.normal(0.0, SIGMA, n)
    den = rng.poisson(LAM[c, a]) + 1.0
    num = den * (RHO[c, a] + rng.normal(0.0, 1.0, n))
    return c, a, np.column_stack([y, num, den])


def _truth(policy: np.ndarray) -> dict[str, float]:
    """Population values: sum_c p_c sum_j pi_cj m_cj; the ratio is E[num] / E[den]."""
    e_den = LAM + 1.0
    return {
        "y": float(np.sum(P[:, None] * policy * MU)),
        "r": float(np.sum(P[:, None] * policy * RHO * e_den) / np.sum(P[:, None] * policy * e_den)),
    }


def _run(c, a, v, **kw):
    return evaluate_policy(
        cohort=c,
        arm=a,
        design_shares=E,
        values=v,
        components=COMPONENTS,
        metrics=METRICS,
        plan=kw.pop("plan", PLAN),
        baseline=kw.pop("baseline", BASE),
        **kw,
    )


@pytest.fixture(scope="module")
def monte_carlo():
    reps, n = 300, 2000
    return [_run(*_simulate(1000 + s, n)) for s in range(reps)]


@pytest.mark.parametrize("metric", ["y", "r"])
@pytest.mark.parametrize("est", ["ipw", "dr"])
@pytest.mark.parametrize("target", ["plan", "baseline", "lift"])
def test_unbiased_for_the_known_policy_value(monte_carlo, metric, est, target):
    # Known values from the simulation's own parameters. Over R = 300 seeded replications the
    # mean of the estimates must be within 4 Monte Carlo SEs (sd / sqrt(R)) of the truth; the
    # ratio's O(1/n) bias at n = 2000 is ~1 % of its SE, far inside that.
    tp, tb = _truth(PLAN)[metric], _truth(BASE)[metric]
    truth = {"plan": tp, "baseline": tb, "lift": tp - tb}[target]
    vals = np.array([r[metric][target][est] for r in monte_carlo])
    ses = np.array([r[metric][target][f"{est}_se"] for r in monte_carlo])
    mc_se = vals.std(ddof=1) / np.sqrt(len(vals))
    assert abs(vals.mean() - truth) < 4 * mc_se
    # and the reported SE is calibrated: mean SE vs the sd across replications. The sd of R = 300
    # draws has relative error ~ 1/sqrt(2R) = 4 %; 15 % is ~ 3.7 of those.
    assert ses.mean() == pytest.approx(vals.std(ddof=1), rel=0.15)


def _population_sd(score_var: float, n: int) -> float:
    return float(np.sqrt(score_var / n))


def test_dr_has_smaller_se_than_ipw_when_outcomes_depend_on_cohort():
    # Outcomes differ by cohort (0, 10, 20): IPW's score w Y carries that spread, AIPW's residual
    # term does not. Population variances of the scores (with the true mu; cross-fitting
    # adds O(1/n)):
    #   IPW  Var(w Y) = sum_c p_c sum_j e_j (pi_cj / e_j)^2 (mu_cj^2 + sigma^2) - V^2
    #   DR   Var(Gamma) = Var_c(sum_j pi_cj mu_cj) + sum_c p_c sum_j pi_cj^2 / e_j sigma^2
    # and likewise for the paired lift with pi - pi0. The estimated SEs must match these within
    # 10 % (sampling error of an SE at n = 5000 is a few per cent) and DR must be the smaller.
    n = 5000
    out = _run(*_simulate(5, n))["y"]
    w2 = lambda d: d**2 / E[None, :]  # noqa: E731  sum over j of e_j (d / e_j)^2 per cohort
    for target, d in (("plan", PLAN), ("lift", PLAN - BASE)):
        v = float(np.sum(P[:, None] * d * MU))
        ipw_var = float(np.sum(P[:, None] * w2(d) * (MU**2 + SIGMA**2))) - v**2
        direct = np.sum(d * MU, axis=1)
        dr_var = float(np.sum(P * (direct - v) ** 2) + np.sum(P[:, None] * w2(d)) * SIGMA**2)
        assert out[target]["ipw_se"] == pytest.approx(_population_sd(ipw_var, n), rel=0.10)
        assert out[target]["dr_se"] == pytest.approx(_population_sd(dr_var, n), rel=0.10)
        assert out[target]["dr_se"] < out[target]["ipw_se"]
    # the paired lift gains most: the cohort spread cancels between plan and baseline
    assert out["lift"]["dr_se"] < 0.25 * out["lift"]["ipw_se"]


def test_ipw_and_dr_match_a_direct_computation():
    # Direct, unit-by-unit evaluation of the published formulas (Horvitz-Thompson; AIPW with a
    # fixed outcome model; paired lift; delta method for the ratio, Deng, Knoblich and Lu 2018).
    c, a, v = _simulate(3, 60)
    rng = np.random.default_rng(4)
    mu = rng.normal(5.0, 2.0, size=(3, 3, 3))  # any outcome model: fixed, not fitted
    out = _run(c, a, v, outcome_means=mu)
    n = len(c)

    def scores(policy):
        ipw, dr = np.empty((n, 3)), np.empty((n, 3))
        for i in range(n):
            w = policy[c[i], a[i]] / E[a[i]]
            for q in range(3):
                ipw[i, q] = w * v[i, q]
                direct = sum(policy[c[i], j] * mu[c[i], j, q] for j in range(3))
                dr[i, q] = direct + w * (v[i, q] - mu[c[i], a[i], q])
        return {"ipw": ipw, "dr": dr}

    sp, sb = scores(PLAN), scores(BASE)
    for est in ("ipw", "dr"):
        for name, s in (("plan", sp), ("baseline", sb)):
            y = s[est][:, 0]
            assert out["y"][name][est] == pytest.approx(y.mean(), rel=1e-12)
            assert out["y"][name][f"{est}_se"] == pytest.approx(
                np.sqrt(np.var(y, ddof=1) / n), rel=1e-12
            )
            # ratio: R = mean(num score)/mean(den score), var = g' Cov g / n
            mn, md = s[est][:, 1].mean(), s[est][:, 2].mean()
            g = np.array([1 / md, -mn / md**2])
            cov = np.cov(s[est][:, 1], s[est][:, 2])
            assert out["r"][name][est] == pytest.approx(mn / md, rel=1e-12)
            assert out["r"][name][f"{est}_se"] == pytest.approx(np.sqrt(g @ cov @ g / n), rel=1e-10)
        delta = sp[est][:, 0] - sb[est][:, 0]
        assert out["y"]["lift"][est] == pytest.approx(delta.mean(), rel=1e-12)
        assert out["y"]["lift"][f"{est}_se"] == pytest.approx(
            np.sqrt(np.var(delta, ddof=1) / n), rel=1e-12
        )
        # paired ratio lift: delta method on the four means (num, den under plan and baseline)
        m = np.column_stack([sp[est][:, 1], sp[est][:, 2], sb[est][:, 1], sb[est][:, 2]])
        mm = m.mean(axis=0)
        g4 = np.array([1 / mm[1], -mm[0] / mm[1] ** 2, -1 / mm[3], mm[2] / mm[3] ** 2])
        ref = np.sqrt(g4 @ np.cov(m, rowvar=False) @ g4 / n)
        assert out["r"]["lift"][f"{est}_se"] == pytest.approx(ref, rel=1e-10)


def test_dr_with_in_sample_cell_means_equals_post_stratified():
    # a special case, derived here: with mu = in-sample cohort-arm means and a cohort-constant
    # policy, the residual term sums to zero in each cell, and AIPW equals the post-stratified
    # estimator sum_c (n_c / n) sum_j pi_cj ybar_cj exactly.
    c, a, v = _simulate(9, 3000)
    n = len(c)
    ybar = np.empty((3, 3, 3))
    for cc in range(3):
        for j in range(3):
            ybar[cc, j] = v[(c == cc) & (a == j)].mean(axis=0)
    share = np.bincount(c, minlength=3) / n
    out = _run(c, a, v, outcome_means=ybar)
    for name, policy in (("plan", PLAN), ("baseline", BASE)):
        ps = np.einsum("c,cj,cjq->q", share, policy, ybar)
        assert out["y"][name]["dr"] == pytest.approx(ps[0], rel=1e-12)
        assert out["r"][name]["dr"] == pytest.approx(ps[1] / ps[2], rel=1e-12)


def test_cross_fitting_is_seeded_and_differs_from_in_sample():
    c, a, v = _simulate(2, 800)
    first, again, other = _run(c, a, v, seed=1), _run(c, a, v, seed=1), _run(c, a, v, seed=2)
    assert first == again
    assert first["y"]["plan"]["dr"] != other["y"]["plan"]["dr"]
    # IPW does not depend on the outcome model or the folds
    assert first["y"]["plan"]["ipw"] == other["y"]["plan"]["ipw"]
    assert _run(c, a, v, folds=5)["y"]["plan"]["dr"] != first["y"]["plan"]["dr"]


def test_cell_empty_in_the_other_folds_falls_back_without_nan():
    # one unit alone in cohort 2: its own cell is empty in the other fold
    c, a, v = _simulate(6, 400)
    c = np.where(c == 2, 1, c)
    c[0] = 2
    out = _run(c, a, v)
    json.dumps(out, allow_nan=False)
    assert all(x is not None for m in out.values() for t in m.values() for x in t.values())


def test_identical_plan_and_baseline_have_zero_lift():
    c, a, v = _simulate(8, 500)
    out = _run(c, a, v, baseline=PLAN)
    for metric in ("y", "r"):
        for est in ("ipw", "dr"):
            assert out[metric]["lift"][est] == 0.0
            assert out[metric]["lift"][f"{est}_se"] == 0.0


def test_result_is_plain_json():
    out = _run(*_simulate(3, 300))
    back = json.loads(json.dumps(out, allow_nan=False))
    assert set(back) == {"y", "r"}
    assert set(back["y"]) == {"plan", "baseline", "lift"}
    assert set(back["y"]["lift"]) == {"ipw", "ipw_se", "dr", "dr_se"}
    assert all(type(x) is float for x in back["r"]["plan"].values())


@pytest.mark.parametrize(
    "change, fragment",
    [
        ({"plan": np.array([[0.0, 0.0, 1.0]] * 3), "shares": [0.5, 0.5, 0.0]}, "design share is 0"),
        ({"plan": np.array([[0.5, 0.4, 0.0]] * 3)}, "sum to 1"),
        ({"plan": np.array([[0.0, 1.0, 0.0]] * 2)}, "shapes differ"),
        ({"arm_shift": 3}, "arm codes"),
        ({"outcome_means": np.zeros((3, 3, 2))}, "outcome_means must have shape"),
        ({"folds": 1}, "folds"),
    ],
    ids=["positivity", "row-sum", "cohort-count", "arm-code", "outcome-shape", "folds"],
)
def test_invalid_input_names_the_problem(change, fragment):
    c, a, v = _simulate(1, 100)
    if "arm_shift" in change:
        a = a.copy()
        a[5] = change.pop("arm_shift")
    shares = change.pop("shares", E)
    with pytest.raises(InvalidInput, match=fragment):
        evaluate_policy(
            cohort=c,
            arm=a,
            design_shares=shares,
            values=v,
            components=COMPONENTS,
            metrics=METRICS,
            plan=change.pop("plan", PLAN),
            baseline=BASE,
            **change,
        )
