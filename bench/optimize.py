"""Optimizer benchmark: 1,000 cohorts x 5 arms x 5 guardrails (synthetic numbers).

Prints ONE JSON line: the time of a single HiGHS LP solve of the deterministic problem (the
reference, same process) and the times of the deterministic, chance and stochastic plans and a
200-draw impact report, each also as a ratio to the single LP. Targets: chance within 5x of one LP;
the 200-draw report under 10 s.

    .venv/bin/python bench/optimize.py
"""

from __future__ import annotations

import json
import time

import numpy as np
from scipy.optimize import linprog

from apportion.optimize.linear import linearize
from apportion.optimize.lp import LPModel
from apportion.optimize.problem import AllocationProblem, Guardrail, control_allocation
from apportion.optimize.report import impact_report
from apportion.optimize.solve import solve
from apportion.stats.estimates import CellMoments
from apportion.stats.table import MetricSpec


def synthetic(seed: int = 0, c: int = 1000, j: int = 5) -> AllocationProblem:
    rng = np.random.default_rng(seed)
    comps = ("s", "g1", "g2", "num", "den", "g4", "g5")
    q = len(comps)
    base = np.array([3.0, 1.0, 0.1, 0.6, 5.0, 2.0, 0.5])
    spread = np.array([0.2, 0.1, 0.02, 0.06, 0.3, 0.1, 0.05])
    mean = np.broadcast_to(base, (c, j, q)).copy()
    mean[:, 1:, :] += rng.normal(0.0, 1.0, (c, j - 1, q)) * spread
    sd = np.array([1.5, 1.0, 0.3, 0.8, 2.0, 1.0, 0.7])
    corr = np.eye(q)
    corr[3, 4] = corr[4, 3] = 0.6
    cov = np.broadcast_to(corr * np.outer(sd, sd), (c, j, q, q)).copy()
    n = rng.integers(200, 800, size=(c, j)).astype(np.int64)
    metrics = (
        MetricSpec("s", "mean", "higher"),
        MetricSpec("g1", "mean", "lower"),
        MetricSpec("g2", "proportion", "lower"),
        MetricSpec("g3", "ratio", "lower", "num", "den"),
        MetricSpec("g4", "mean", "higher"),
        MetricSpec("g5", "mean", "lower"),
    )
    guardrails = (
        Guardrail("g1", 0.01),
        Guardrail("g2", 0.002),
        Guardrail("g3", 0.002),
        Guardrail("g4", -0.01),
        Guardrail("g5", 1.0, "relative", 0.9),
    )
    shares = rng.dirichlet(np.full(c, 3.0))
    return AllocationProblem(
        shares, CellMoments(comps, n, mean, cov), metrics, "s", guardrails, control_allocation(c, j)
    )


def timed(fn, repeat: int = 1) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def main() -> None:
    problem = synthetic()
    model = LPModel(linearize(problem))
    c = problem.n_cohorts
    a_ub = model.a_ub if model.a_ub.shape[0] else None

    def one_lp():
        return linprog(
            model.cost,
            A_ub=a_ub,
            b_ub=model.b_ub,
            A_eq=model.a_eq,
            b_eq=np.ones(c),
            bounds=np.column_stack([np.zeros(model.cost.size), model.upper]),
            method="highs-ds",
        )

    t_lp, _ = timed(one_lp, repeat=5)
    t_det, det = timed(lambda: solve(problem, "deterministic"), repeat=3)
    t_cc, cc = timed(lambda: solve(problem, "chance"), repeat=3)
    t_st, st = timed(lambda: solve(problem, "stochastic", seed=0))
    t_rep, _ = timed(lambda: impact_report(problem, det, draws=200, seed=0))
    t_rep_cc, _ = timed(lambda: impact_report(problem, cc, draws=200, seed=0))
    out = {
        "bench": "optimize",
        "shape": {"cohorts": c, "arms": problem.n_arms, "guardrails": len(problem.guardrails)},
        "lp_seconds": round(t_lp, 4),
        "deterministic_seconds": round(t_det, 4),
        "chance_seconds": round(t_cc, 4),
        "stochastic_seconds": round(t_st, 3),
        "report_deterministic_200_seconds": round(t_rep, 3),
        "report_chance_200_seconds": round(t_rep_cc, 3),
        "deterministic_ratio": round(t_det / t_lp, 2),
        "chance_ratio": round(t_cc / t_lp, 2),
        "stochastic_ratio": round(t_st / t_lp, 1),
        "report_deterministic_ratio": round(t_rep / t_lp, 1),
        "report_chance_ratio": round(t_rep_cc / t_lp, 1),
        "chance_cut_rounds": cc.diagnostics.get("cut_rounds"),
        "objective": {
            "deterministic": det.objective,
            "chance": cc.objective,
            "stochastic": st.objective,
        },
        "targets": {"chance_ratio_max": 5.0, "report_seconds_max": 10.0},
    }
    print(json.dumps(out))


if __name__ == "__main__":
    main()
