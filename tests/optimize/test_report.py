"""Impact report: the optimizer's-curse correction against the known expected maximum of normals,
normal holding probabilities, comparison rows, and the restricted re-optimization LP."""

from __future__ import annotations

import json

import numpy as np
import pytest
from optimize.optimize_problems import random_problem
from scipy.stats import norm

from apportion.optimize.linear import linearize
from apportion.optimize.lp import LPModel
from apportion.optimize.problem import AllocationProblem, control_allocation
from apportion.optimize.report import impact_report
from apportion.optimize.solve import solve
from apportion.stats.estimates import CellMoments
from apportion.stats.table import MetricSpec


def test_optimism_equals_expected_maximum_of_three_normals():
    # Smith and Winkler (2006): three arms with equal estimates, independent errors
    # of sd sigma; the re-optimized plan picks the arm with the largest draw, so its optimism
    # against the original estimates is E[max of 3 N(0, 1)] sigma - E[control error] =
    # 3 / (2 sqrt(pi)) sigma = 0.8463 sigma (the n = 3 order statistic, a textbook closed form).
    sigma = 0.01
    n = 10_000
    sd = sigma * np.sqrt(n)
    mom = CellMoments(
        ("s",), np.full((1, 3), n), np.full((1, 3, 1), 2.0), np.full((1, 3, 1, 1), sd**2)
    )
    problem = AllocationProblem(
        np.ones(1), mom, (MetricSpec("s", "mean", "higher"),), "s", (), control_allocation(1, 3)
    )
    sol = solve(problem)
    rep = impact_report(problem, sol, draws=1000, seed=3)
    row = rep["metrics"][0]
    # 1,000 draws: sd of one optimism draw ~1.1 sigma, so se ~0.035 sigma; 0.12 sigma is 3.4 se
    assert row["optimism"] == pytest.approx(3 / (2 * np.sqrt(np.pi)) * sigma, abs=0.12 * sigma)
    assert row["lift"] == 0.0
    assert row["corrected_lift"] == pytest.approx(-row["optimism"])
    lo, hi = row["interval"]
    assert hi - lo == pytest.approx(2 * norm.ppf(0.975) * row["se"])


def test_report_fields_probabilities_and_comparison_rows():
    problem = random_problem(2, n_cohorts=6, n_arms=3, n_guardrails=3)
    sol = solve(problem, "chance")
    progress = []
    rep = impact_report(problem, sol, draws=30, seed=1, progress=lambda d, t: progress.append(d))
    json.dumps(rep)  # JSON-serializable
    assert progress[-1] == 30
    rows = {r["metric"]: r for r in rep["metrics"]}
    assert set(rows) == {"s"} | {g.metric for g in problem.guardrails}
    # the plan's point lifts are the solution's
    assert rows["s"]["lift"] == pytest.approx(sol.objective)
    for g, gv in zip(problem.guardrails, sol.guardrail_values, strict=True):
        r = rows[g.metric]
        assert r["lift"] == pytest.approx(gv["lift"])
        # reference: the normal probability P(N(lift, se^2) within the threshold) (scipy.stats)
        harm = 1.0 if problem.metric(g.metric).direction == "lower" else -1.0
        expected = norm.cdf(harm * (g.threshold - r["lift"]) / r["se"])
        assert r["probability_holds"] == pytest.approx(expected)
        # a chance plan holds each guardrail with at least its confidence (linearization aside)
        assert r["probability_holds"] >= g.confidence - 1e-3
    plans = [r["plan"] for r in rep["comparison"]]
    assert plans[:3] == ["arm 0 for everyone", "arm 1 for everyone", "arm 2 for everyone"]
    assert plans[-1] == "this plan"
    single = rep["comparison"][:3]
    assert single[0]["lifts"]["s"] == 0.0 and all(single[0]["holds"].values())
    safe = [r for r in single if all(r["holds"].values())]
    best = max(safe, key=lambda r: r["lifts"]["s"])
    named = next(r for r in rep["comparison"] if r["plan"].startswith("best single arm"))
    assert named["arm"] == best["arm"]
    assert rep["comparison"][-1]["lifts"]["s"] >= best["lifts"]["s"] - 1e-12


@pytest.mark.parametrize("seed", range(3))
def test_restricted_lp_with_warm_multipliers_equals_the_full_lp(seed):
    # reference: the full HiGHS LP; the restricted solve must reach the same optimum (LP duality)
    problem = random_problem(seed, n_cohorts=300, n_arms=4, n_guardrails=5, units=400)
    lin = linearize(problem)
    model = LPModel(lin)
    full = model.solve()
    rng = np.random.default_rng(seed)
    mean = problem.moments.mean * (1 + 0.01 * rng.standard_normal(problem.moments.mean.shape))
    lin2 = linearize(problem, mean)
    m2 = LPModel(lin2)
    ref = m2.solve()
    warm = m2.solve(duals=full.duals)
    assert warm.restricted >= 1  # the restricted path was taken
    assert float(m2.cost @ warm.x.ravel()) == pytest.approx(
        float(m2.cost @ ref.x.ravel()), abs=1e-9
    )
    assert (m2.a_ub @ warm.x.ravel() <= m2.b_ub + 1e-9).all()
