"""Malformed problems raise InvalidInput naming the field; impossible ones raise Infeasible with,
per guardrail, the best value any allocation reaches."""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
from optimize.optimize_problems import random_problem

from apportion.errors import Infeasible, InvalidInput
from apportion.optimize.problem import AllocationProblem, Guardrail, build_problem
from apportion.optimize.solve import solve
from apportion.stats.estimates import CellMoments
from apportion.stats.table import MetricSpec


def with_guardrails(problem, *guardrails):
    return dataclasses.replace(problem, guardrails=tuple(guardrails))


@pytest.mark.parametrize(
    ("guardrail", "field"),
    [
        (Guardrail("nope", 0.1), "guardrails[0].metric"),
        (Guardrail("g_mean", 0.1, confidence=0.5), "guardrails[0].confidence"),
        (Guardrail("g_mean", 0.1, confidence=1.0), "guardrails[0].confidence"),
        (Guardrail("g_mean", -0.1), "guardrails[0].threshold"),  # lower-is-better needs >= 0
        (Guardrail("g_up", 0.1), "guardrails[0].threshold"),  # higher-is-better needs <= 0
    ],
    ids=["unknown-metric", "confidence-0.5", "confidence-1", "sign-lower", "sign-higher"],
)
def test_invalid_guardrails_raise_invalid_input_naming_the_field(guardrail, field):
    problem = with_guardrails(random_problem(0), guardrail)
    with pytest.raises(InvalidInput) as info:
        solve(problem)
    assert not isinstance(info.value, Infeasible)
    assert info.value.errors[0]["field"] == field


def test_other_invalid_fields():
    problem = random_problem(0)
    bad_shares = dataclasses.replace(problem, shares=problem.shares * 1.1)
    with pytest.raises(InvalidInput) as info:
        solve(bad_shares)
    assert info.value.errors[0]["field"] == "shares"
    with pytest.raises(InvalidInput) as info:
        solve(dataclasses.replace(problem, success="nope"))
    assert info.value.errors[0]["field"] == "success"
    bad_base = problem.baseline.copy()
    bad_base[0] = [0.5, 0.2, 0.2]
    with pytest.raises(InvalidInput) as info:
        solve(dataclasses.replace(problem, baseline=bad_base))
    assert info.value.errors[0]["field"] == "baseline"
    with pytest.raises(InvalidInput) as info:
        solve(problem, method="greedy")
    assert info.value.errors[0]["field"] == "method"


def conflicting_problem():
    """Two cohorts (shares 0.3, 0.7), two arms, a 50/50 live baseline; g_a rises with arm 1, g_b
    with arm 0. With y the traffic share on arm 1, lift(g_a) = y - 0.5 and lift(g_b) = 0.5 - y,
    both within 0.1 only for y in [0.4, 0.6]; pure plans reach y in {0, 0.3, 0.7, 1} only."""
    comps = ("s", "g_a", "g_b")
    mean = np.array(
        [
            [[1.0, 0.0, 1.0], [2.0, 1.0, 0.0]],
            [[1.0, 0.0, 1.0], [2.0, 1.0, 0.0]],
        ]
    )
    cov = np.broadcast_to(np.eye(3), (2, 2, 3, 3)).copy()
    moments = CellMoments(comps, np.full((2, 2), 1000), mean, cov)
    metrics = (
        MetricSpec("s", "mean", "higher"),
        MetricSpec("g_a", "mean", "lower"),
        MetricSpec("g_b", "mean", "lower"),
    )
    guard = (Guardrail("g_a", 0.1), Guardrail("g_b", 0.1))
    return build_problem(
        shares=np.array([0.3, 0.7]),
        moments=moments,
        metrics=metrics,
        success="s",
        guardrails=guard,
        baseline="live",
        live=np.full((2, 2), 0.5),
    )


def test_infeasible_pure_plan_reports_best_reachable_per_guardrail():
    problem = conflicting_problem()
    # the mixed plan exists: lift(s) = y - 0.5 is largest at y = 0.6 (worked out by hand above)
    assert solve(problem).objective == pytest.approx(0.1, abs=1e-9)
    with pytest.raises(Infeasible) as info:
        solve(problem, "deterministic", "pure")
    errors = {e["guardrail"]: e for e in info.value.errors}
    # reference: enumeration of the four pure plans; each guardrail alone can fall to -0.5
    # (everyone on the arm that lowers it), so both are reachable alone, not together.
    for key, col in (("g_a", 1), ("g_b", 2)):
        lifts = []
        for arms in itertools.product(range(2), repeat=2):
            x = np.zeros((2, 2))
            x[[0, 1], arms] = 1.0
            w = problem.shares[:, None] * x
            lifts.append(float((w * problem.moments.mean[..., col]).sum()) - 0.5)
        assert errors[key]["best_reachable"] == pytest.approx(min(lifts), abs=1e-12)
        assert errors[key]["threshold"] == 0.1
        assert errors[key]["reachable_alone"] is True
    with pytest.raises(Infeasible):
        solve(problem, "chance", "pure")


def test_best_reachable_of_a_ratio_guardrail_is_the_minimum_ratio():
    # reference: enumeration of the pure plans (a linear-fractional objective over a product of
    # simplices is minimized at a vertex; Charnes and Cooper 1962)
    problem = random_problem(4, n_cohorts=4, n_arms=3, n_guardrails=3)
    from apportion.optimize.linear import linearize
    from apportion.optimize.lp import best_reachable
    from apportion.optimize.values import metric_values

    lin = linearize(problem)
    k = lin.keys.index("g_ratio")
    val, _ = best_reachable(lin, problem, k)
    best = np.inf
    mom = problem.moments
    for arms in itertools.product(range(3), repeat=4):
        x = np.zeros((4, 3))
        x[np.arange(4), arms] = 1.0
        v = metric_values(x, problem.shares, mom.mean, problem.metrics, mom.components)["g_ratio"]
        best = min(best, v - lin.base_values["g_ratio"])
    assert val == pytest.approx(best, abs=1e-14)


def test_build_problem_best_arm_baseline():
    problem = random_problem(2, n_cohorts=5, n_arms=4, n_guardrails=2)
    built = build_problem(
        shares=problem.shares,
        moments=problem.moments,
        metrics=problem.metrics,
        success="s",
        guardrails=problem.guardrails,
        baseline="best_arm",
    )
    assert isinstance(built, AllocationProblem)
    arm = int(built.baseline[0].argmax())
    assert (built.baseline[:, arm] == 1).all()
    # reference: the definition; every single arm given to everyone, checked on point estimates
    from apportion.optimize.values import metric_values

    mom = problem.moments
    base = metric_values(
        problem.baseline, problem.shares, mom.mean, problem.metrics, mom.components
    )
    best_val, best_arm = 0.0, 0
    for j in range(1, 4):
        x = np.zeros((5, 4))
        x[:, j] = 1
        v = metric_values(x, problem.shares, mom.mean, problem.metrics, mom.components)
        ok = all(v[g.metric] - base[g.metric] <= g.threshold for g in problem.guardrails)
        if ok and v["s"] - base["s"] > best_val:
            best_val, best_arm = v["s"] - base["s"], j
    assert arm == best_arm
