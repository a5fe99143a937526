"""Guardrail prices and the lift at nearby thresholds.

For each guardrail, the plan is re-solved with that guardrail's threshold moved by -2, -1, +1, +2
steps (the others fixed), in its harmful direction: a positive step allows more harm. The step is
a quarter of the threshold, or, for a zero threshold, the plan's own sd of that guardrail's lift
(the report's delta-method sd), so the five points span a range the estimates can tell apart.

The price is the success-metric lift one more unit of the threshold buys: the central difference
of the re-solved lifts over the +-1 steps (one-sided where a neighbour is infeasible or would
flip the threshold's sign), oriented so that a positive price means a better success metric. For
a deterministic LP it is the dual price wherever the basis does not change within a step (LP
sensitivity analysis); for chance plans it also carries the margin's change.

Stochastic plans are re-solved as chance plans at the confidence whose normal quantile equals
their CVaR multiplier pdf(z)/(1 - conf): under normal estimates the CVaR guardrail and that chance
constraint are the same cone (Rockafellar and Uryasev 2000), and cooperative stochastic
approximation would take seconds per point.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import numpy as np
from scipy.stats import norm

from apportion.errors import Infeasible
from apportion.optimize.linear import cvar_multiplier
from apportion.optimize.problem import AllocationProblem
from apportion.optimize.solve import Solution, solve

STEPS = (-2, -1, 0, 1, 2)
STEP_SHARE = 0.25


def _as_chance(problem: AllocationProblem, options: dict[str, Any]) -> AllocationProblem:
    conf = np.array([g.confidence for g in problem.guardrails])
    tail = options.get("tail")
    mult = cvar_multiplier(conf, tail)
    # conf' = Phi(multiplier): a chance constraint with that quantile is the CVaR cone
    conf2 = np.clip(norm.cdf(mult), 0.5 + 1e-9, 1 - 1e-12)
    guards = tuple(
        replace(g, confidence=float(c)) for g, c in zip(problem.guardrails, conf2, strict=True)
    )
    return replace(problem, guardrails=guards)


def guardrail_sensitivity(
    problem: AllocationProblem,
    solution: Solution,
    *,
    seed: int = 0,
    options: dict[str, Any] | None = None,
) -> list[dict[str, Any]]:
    """Per guardrail: step, price and the success lift at the five thresholds (JSON-ready)."""
    opts = dict(options or {})
    method, allocation = solution.method, solution.allocation_kind
    base = problem
    if method == "stochastic":
        base, method = _as_chance(problem, opts), "chance"
        opts = {k: v for k, v in opts.items() if k != "tail"}
    sign = 1.0 if problem.metric(problem.success).direction == "higher" else -1.0
    out = []
    for k, g in enumerate(problem.guardrails):
        harm = 1.0 if problem.metric(g.metric).direction == "lower" else -1.0
        sd = float(solution.guardrail_values[k].get("sd") or 0.0)
        step = STEP_SHARE * abs(g.threshold) if g.threshold != 0 else sd
        if not step > 0:
            step = 1e-3
        points = []
        lifts: dict[int, float] = {}
        for s in STEPS:
            t = float(g.threshold + harm * s * step)
            point: dict[str, Any] = {"offset": s, "threshold": t}
            if harm * t < 0:
                point["status"] = "not allowed (the threshold would change sign)"
            elif s == 0:
                point.update(status="chosen", lift=solution.objective)
                lifts[s] = solution.objective
            else:
                guards = list(base.guardrails)
                guards[k] = replace(guards[k], threshold=t)
                try:
                    sol = solve(replace(base, guardrails=tuple(guards)), method, allocation,
                                seed=seed, options=opts)  # fmt: skip
                except Infeasible:
                    point["status"] = "infeasible"
                else:
                    point.update(status="solved", lift=sol.objective)
                    lifts[s] = sol.objective
            points.append(point)
        lo = -1 if -1 in lifts else 0
        hi = 1 if 1 in lifts else 0
        price = sign * (lifts[hi] - lifts[lo]) / ((hi - lo) * step) if hi != lo else None
        out.append(
            {
                "metric": g.metric,
                "unit": g.unit,
                "threshold": float(g.threshold),
                "step": float(step),
                "price": None if price is None else float(price),
                "price_basis": {
                    (-1, 1): "central difference over one step each way",
                    (0, 1): "one step more allowed harm",
                    (-1, 0): "one step less allowed harm",
                }.get((lo, hi), "none"),  # fmt: skip
                "points": points,
            }
        )
    return out
