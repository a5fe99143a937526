"""The invented demo scenario: plans fitted on 200,000 simulated learners
against the truth the simulator exposes (true effect functions, the oracle plan on them)."""

from __future__ import annotations

import pytest
from scenario_fits import LEARNERS, scenario_fits

from apportion.demo import scenario as sc
from apportion.optimize.problem import Guardrail, build_problem
from apportion.optimize.solve import solve

SEEDS = range(10)
GUARDRAILS = tuple(
    Guardrail(g["metric"], float(g["threshold"]), g["unit"], g["confidence"]) for g in sc.GUARDRAILS
)


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory):
    """Per seed: true lifts of the chance and deterministic plans, the oracle and the limits.
    The fits (200,000 learners, causal tree, seeds 0..9) are shared with
    tests/stats/test_tree_scenario.py (tests/scenario_fits.py)."""
    out = []
    for seed, fit in scenario_fits(tmp_path_factory, SEEDS).items():
        table = sc.simulate(LEARNERS, seed)
        cohort, _ = fit.partition.route(table.feature_values, table.features)
        problem = build_problem(
            shares=fit.shares,
            moments=fit.moments,
            metrics=table.metrics,
            success=sc.SUCCESS,
            guardrails=GUARDRAILS,
        )
        oracle = sc.oracle_plan(table.feature_values)
        row = {"oracle": oracle}
        for method in ("chance", "deterministic"):
            sol = solve(problem, method)
            row[method] = sc.true_lifts(table.feature_values, sol.allocation[cohort])
            row[f"{method}_objective"] = sol.objective
        out.append(row)
    return out


def _safe(lifts, limits):
    return all(lifts[k] <= lim + 1e-12 for k, lim in limits.items())


@pytest.mark.slow
def test_chance_plan_breaks_no_true_guardrail_and_beats_the_best_safe_single_arm(outcomes):
    # truth: the scenario's effect functions (apportion.demo.scenario.true_lifts, oracle_plan)
    good = 0
    for row in outcomes:
        o, lifts = row["oracle"], row["chance"]
        beats = lifts[sc.SUCCESS] > o["best_single_lifts"][sc.SUCCESS]
        good += _safe(lifts, o["limits"]) and beats
    assert good >= 9, good


@pytest.mark.slow
def test_chance_plan_is_more_cautious_than_the_point_estimate_plan(outcomes):
    # the chance plan's feasible set lies inside the point-estimate plan's (z * sd >= 0), so its
    # projected objective can never be higher; on the truth it is never less safe.
    for row in outcomes:
        assert row["chance_objective"] <= row["deterministic_objective"] + 1e-9
    unsafe_det = sum(not _safe(r["deterministic"], r["oracle"]["limits"]) for r in outcomes)
    unsafe_cc = sum(not _safe(r["chance"], r["oracle"]["limits"]) for r in outcomes)
    assert unsafe_cc <= unsafe_det


@pytest.mark.slow
def test_chance_plan_reaches_80_percent_of_the_oracle(outcomes):
    # the target: >= 80 % of the oracle's true lift, above the best safe single arm, no true guardrail
    # broken, in at least 9 of 10 seeds, at the scenario's guardrails (confidence 0.8 each; see
    # scenario.GUARDRAILS for why not 0.95, which reached 80 % in 3 of 10 seeds). Truth: the
    # scenario's effect functions and its oracle LP (scipy linprog), independent of the optimizer.
    good = 0
    for row in outcomes:
        o, lifts = row["oracle"], row["chance"]
        good += (
            lifts[sc.SUCCESS] >= 0.8 * o["lifts"][sc.SUCCESS]
            and _safe(lifts, o["limits"])
            and lifts[sc.SUCCESS] > o["best_single_lifts"][sc.SUCCESS]
        )
    assert good >= 9, good
