"""Guardrail prices and the lift at five thresholds (apportion/optimize/sensitivity.py)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from optimize.optimize_problems import random_problem
from optimize.test_lp import independent_lp

from apportion.optimize.sensitivity import guardrail_sensitivity
from apportion.optimize.solve import solve


@pytest.mark.parametrize("seed", range(4))
def test_deterministic_points_match_scipy_at_the_same_thresholds(seed):
    # Reference: scipy.optimize.linprog (HiGHS) on matrices built independently in test_lp, at
    # each of the five thresholds; the price is their central difference over one step.
    problem = random_problem(seed, n_guardrails=3)
    sol = solve(problem, "deterministic")
    rows = guardrail_sensitivity(problem, sol)
    assert [r["metric"] for r in rows] == [g.metric for g in problem.guardrails]
    for k, row in enumerate(rows):
        assert [p["offset"] for p in row["points"]] == [-2, -1, 0, 1, 2]
        ref = {}
        for p in row["points"]:
            if "lift" not in p:
                continue
            guards = list(problem.guardrails)
            guards[k] = replace(guards[k], threshold=p["threshold"])
            ref[p["offset"]] = independent_lp(replace(problem, guardrails=tuple(guards)))
            assert p["lift"] == pytest.approx(ref[p["offset"]], rel=1e-6, abs=1e-9)
        if row["price_basis"].startswith("central"):
            assert row["price"] == pytest.approx((ref[1] - ref[-1]) / (2 * row["step"]), rel=1e-5,
                                                 abs=1e-9)  # fmt: skip
        # more allowed harm never lowers the optimum of an LP: lifts rise along the offsets
        lifts = [p["lift"] for p in row["points"] if "lift" in p]
        assert all(b >= a - 1e-9 for a, b in zip(lifts, lifts[1:], strict=False))


def test_binding_guardrail_has_a_positive_price_and_a_slack_one_none():
    problem = random_problem(1, n_guardrails=2, tight=0.3)
    sol = solve(problem, "deterministic")
    rows = {r["metric"]: r for r in guardrail_sensitivity(problem, sol)}
    for g in sol.guardrail_values:
        price = rows[g["guardrail"]]["price"]
        if g["binding"]:
            assert price > 0
        elif g["slack"] > rows[g["guardrail"]]["step"]:  # slack beyond a step: the LP does not move
            assert price == pytest.approx(0.0, abs=1e-9)


def test_stochastic_plans_are_priced_as_their_equivalent_chance_cone():
    problem = random_problem(2, n_guardrails=2)
    chance = solve(problem, "chance")
    rows = guardrail_sensitivity(problem, chance)
    assert all(r["points"][2]["lift"] == chance.objective for r in rows)
    stoch = replace(chance, method="stochastic")  # priced without running approximation
    srows = guardrail_sensitivity(problem, stoch)
    # CVaR multipliers exceed the chance quantiles, so the re-solved points are more careful
    for r, s in zip(rows, srows, strict=True):
        for p, q in zip(r["points"], s["points"], strict=True):
            if "lift" in p and "lift" in q and p["offset"] != 0:
                assert q["lift"] <= p["lift"] + 1e-6
    assert np.isfinite([s["step"] for s in srows]).all()
