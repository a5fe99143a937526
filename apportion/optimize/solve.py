"""One entry point for the three plan methods and the summary of a plan.

deterministic: the LP/MILP on point estimates. chance: each guardrail holds with its confidence
under the estimates' normal sampling distribution (cone constraints, outer approximation).
stochastic: each guardrail's CVaR at level 1 - confidence, by cooperative stochastic
approximation (mixed) or, for pure plans, by the exactly equivalent cone MILP (see stochastic.py).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from typing import Any, Literal, NoReturn

import numpy as np
from scipy.stats import norm

from apportion.errors import Infeasible, InvalidInput
from apportion.optimize.chance import cone_values, constraint_scale, solve_cone
from apportion.optimize.linear import Linear, cvar_multiplier, linearize
from apportion.optimize.lp import LPModel, best_reachable
from apportion.optimize.problem import AllocationProblem, available_cells, validate_problem
from apportion.optimize.stochastic import csa
from apportion.optimize.values import lift_sd, metric_values

Method = Literal["deterministic", "chance", "stochastic"]
AllocationKind = Literal["mixed", "pure"]
METHODS: tuple[Method, ...] = ("deterministic", "chance", "stochastic")
ALLOCATIONS: tuple[AllocationKind, ...] = ("mixed", "pure")
FRACTIONAL_TOL = 1e-7


@dataclass(frozen=True)
class Solution:
    allocation: np.ndarray  # (C, J), rows sum to 1
    method: Method
    allocation_kind: AllocationKind
    objective: float  # projected lift of the success metric vs baseline (point estimates)
    guardrail_values: list[
        dict[str, Any]
    ]  # per guardrail: lift (threshold's unit), threshold, binding, sd
    fractional_cohorts: int
    binding: list[str]
    iterations: int
    seconds: float
    diagnostics: dict[str, Any]


def method_coefficients(lin: Linear, method: str, options: dict[str, Any]) -> np.ndarray:
    """(K,) multiplier of sd_k in each guardrail: 0 (deterministic), z_conf (chance) or the normal
    CVaR multiplier pdf(z)/(1 - conf) (stochastic; `tail` widens the tail, 1 = the mean)."""
    if method == "deterministic":
        return np.zeros(len(lin.keys))
    if method == "chance":
        return lin.z.copy()
    return cvar_multiplier(lin.conf, options.get("tail"))


def _raise_infeasible(
    problem: AllocationProblem, lin: Linear, method: str, allocation: str
) -> NoReturn:
    errors = []
    for k, g in enumerate(problem.guardrails):
        v, _ = best_reachable(lin, problem, k)
        v_unit = float(v * lin.unit_scale[k])
        errors.append(
            {
                "guardrail": g.metric,
                "threshold": float(g.threshold),
                "unit": g.unit,
                "best_reachable": v_unit,
                "reachable_alone": bool(lin.harm[k] * v_unit <= lin.harm[k] * g.threshold + 1e-12),
            }
        )
    parts = ", ".join(
        f"{e['guardrail']}: best {e['best_reachable']:.6g} vs {e['threshold']:g}" for e in errors
    )
    raise Infeasible(
        f"no {allocation} allocation satisfies every guardrail ({method}); {parts}", errors=errors
    )


def summarize(
    problem: AllocationProblem,
    lin: Linear,
    x: np.ndarray,
    *,
    method: Method,
    allocation: AllocationKind,
    coef: np.ndarray,
    iterations: int,
    seconds: float,
    diagnostics: dict[str, Any],
    bind_tol: float = 1e-6,
) -> Solution:
    mom = problem.moments
    p = lin.p
    mu = np.where(lin.avail[..., None], mom.mean, 0.0)
    values = metric_values(x, p, mu, problem.metrics, mom.components)
    objective = values[problem.success] - lin.base_values[problem.success]
    scale = constraint_scale(lin)
    f = cone_values(lin, x, coef)
    slack = (lin.rhs - f) / scale
    rows = []
    binding = []
    for k, g in enumerate(problem.guardrails):
        spec = problem.metric(g.metric)
        lift = (values[g.metric] - lin.base_values[g.metric]) * lin.unit_scale[k]
        sd = (
            lift_sd(x, lin.b, p, mom.mean, mom.cov, mom.n, spec, mom.components) * lin.unit_scale[k]
        )
        is_binding = bool(slack[k] <= bind_tol)
        if is_binding:
            binding.append(g.metric)
        rows.append(
            {
                "guardrail": g.metric,
                "lift": float(lift),
                "threshold": float(g.threshold),
                "unit": g.unit,
                "confidence": float(g.confidence),
                "binding": is_binding,
                "sd": float(sd),
                "slack": float(slack[k] * scale[k]),  # allowed harm left, threshold units
            }
        )
    fractional = int((x.max(axis=1) < 1.0 - FRACTIONAL_TOL).sum())
    return Solution(
        allocation=x,
        method=method,
        allocation_kind=allocation,
        objective=float(objective),
        guardrail_values=rows,
        fractional_cohorts=fractional,
        binding=binding,
        iterations=int(iterations),
        seconds=float(seconds),
        diagnostics=diagnostics,
    )


def exact_excess(problem: AllocationProblem, x: np.ndarray) -> np.ndarray:
    """(K,) how far each guardrail's exact chance condition is from holding at x, in absolute
    metric units: harm * (lift - t) + z_conf * sd, with the exact (ratio) lift and the delta-method
    standard error the impact report shows; <= 0 means it holds."""
    b = np.asarray(problem.baseline, dtype=np.float64)
    p = np.asarray(problem.shares, dtype=np.float64)
    mom = problem.moments
    mean = np.where(available_cells(mom)[..., None], mom.mean, 0.0)
    comps = mom.components
    base = metric_values(b, p, mean, problem.metrics, comps)
    vals = metric_values(x, p, mean, problem.metrics, comps)
    out = np.zeros(len(problem.guardrails))
    for k, g in enumerate(problem.guardrails):
        m = problem.metric(g.metric)
        t = g.threshold / 100.0 * abs(base[m.key]) if g.unit == "relative" else g.threshold
        harm = 1.0 if m.direction == "lower" else -1.0
        sd = lift_sd(x, b, p, mom.mean, mom.cov, mom.n, m, comps)
        out[k] = harm * (vals[m.key] - base[m.key] - t) + float(norm.ppf(g.confidence)) * sd
    return out


def exact_chance_refit(
    problem: AllocationProblem, lin: Linear, x: np.ndarray, opts: dict[str, Any], *, rounds: int = 6
) -> tuple[np.ndarray, Linear, int]:
    """Re-solve a chance plan until every guardrail holds by the exact delta-method check.

    The cone constraints live on a linear form in which a ratio guardrail's rate is fixed at
    R(b) + t and its denominators at the baseline's: first-order exact, so at a binding ratio
    guardrail the report's probability can fall a fraction of a point short of the confidence.
    Each round tightens the linear allowance of the guardrails still short by their exact excess
    (both are in absolute metric units) and re-solves; it converges in one or two rounds because
    the two forms differ at second order. Returns (x, the linear form used, rounds)."""
    for r in range(rounds):
        excess = exact_excess(problem, x)
        short = excess > 1e-4 * np.abs(lin.rhs) + 1e-15  # a ten-thousandth of the allowance
        if not short.any():
            return x, lin, r
        rhs = lin.rhs - np.where(
            short, excess * (1.0 + 1e-6) + 1e-15, 0.0
        )  # both in absolute units
        lin = replace(lin, rhs=np.maximum(rhs, 0.0))
        x_new, _, _ = solve_linear(problem, lin, "chance", "mixed", options=opts)
        if x_new is None:
            break
        x = x_new
    return x, lin, rounds


def solve_linear(
    problem: AllocationProblem,
    lin: Linear,
    method: str,
    allocation: str,
    *,
    seed: int = 0,
    options: dict[str, Any] | None = None,
    model: LPModel | None = None,
    warm_cuts: tuple[list[np.ndarray], list[float]] | None = None,
) -> tuple[np.ndarray | None, int, dict[str, Any]]:
    """Plan for a linear form: (x or None if infeasible, iterations, diagnostics). Used by `solve`
    and by the impact report's re-optimizations (which pass a reused model and warm cuts)."""
    opts = options or {}
    pure = allocation == "pure"
    model = model or LPModel(lin, presolve=bool(opts.get("presolve", False)))
    coef = method_coefficients(lin, method, opts)
    if method == "deterministic":
        res = model.solve(pure=pure)
        return (
            res.x,
            res.iterations,
            {"solver": "milp" if pure else "highs-ds", "status": res.status},
        )
    if method == "chance" or pure:
        cuts_a, cuts_b = warm_cuts if warm_cuts else ([], [])
        cone = solve_cone(
            model,
            lin,
            coef,
            pure=pure,
            tol=float(opts.get("tol", 1e-3)),
            max_iter=int(opts.get("max_iter", 60)),
            cuts_a=cuts_a,
            cuts_b=cuts_b,
        )
        diag = {
            "solver": "kelley-milp" if pure else "kelley-lp",
            "cone_multiplier": coef.tolist(),
            "cut_rounds": cone.iterations,
            "cuts": len(cone.cuts_a),
            "max_violation_before_scaling": cone.max_violation,
            "scaled_toward_baseline": cone.scaled_by,
            "cuts_state": (cone.cuts_a, cone.cuts_b),
        }
        if method == "stochastic":
            diag["note"] = (
                "pure stochastic plan: under normal estimates each guardrail's CVaR is "
                "mu + sd * pdf(z)/(1 - conf), so the pure CVaR plan is solved exactly as a cone "
                "MILP with tangent cuts instead of rounding stochastic-approximation iterates"
            )
        return cone.x, cone.lp_iterations, diag
    out = csa(lin, seed=seed, options=opts)
    return out.x, out.iterations, out.diagnostics


def solve(
    problem: AllocationProblem,
    method: Method = "deterministic",
    allocation: AllocationKind = "mixed",
    *,
    seed: int = 0,
    options: dict[str, Any] | None = None,
) -> Solution:
    """Optimize the plan; raise Infeasible (with per-guardrail best reachable values) when no
    allocation satisfies the guardrails, InvalidInput for a malformed problem."""
    if method not in METHODS:
        raise InvalidInput(
            f"method must be one of {METHODS}, got {method!r}",
            errors=[{"field": "method", "value": method}],
        )
    if allocation not in ALLOCATIONS:
        raise InvalidInput(
            f"allocation must be one of {ALLOCATIONS}, got {allocation!r}",
            errors=[{"field": "allocation", "value": allocation}],
        )
    validate_problem(problem)
    opts = dict(options or {})
    t0 = time.perf_counter()
    lin = linearize(problem)
    x, iterations, diag = solve_linear(problem, lin, method, allocation, seed=seed, options=opts)
    if x is None:
        _raise_infeasible(problem, lin, method, allocation)
    if method == "chance" and allocation == "mixed":
        x, lin_used, rounds = exact_chance_refit(problem, lin, x, opts)
        diag = {**diag, "exact_rounds": rounds}
    seconds = time.perf_counter() - t0
    diag = dict(diag)
    diag.pop("cuts_state", None)
    if problem.metric(problem.success).kind == "ratio":
        diag["success_linearized"] = (
            "ratio success metric: optimized as (N(x) - R(b) D(x)) / D(b), its first-order lift "
            "around the baseline; the reported objective is the exact ratio lift"
        )
    coef = method_coefficients(lin, method, opts)
    default_tol = (
        1e-2
        if (method == "stochastic" and allocation == "mixed")
        else 1e-3
        if method == "chance"
        else 1e-6
    )
    return summarize(
        problem,
        lin,
        x,
        method=method,
        allocation=allocation,
        coef=coef,
        iterations=iterations,
        seconds=seconds,
        diagnostics=diag,
        bind_tol=float(opts.get("bind_tol", default_tol)),
    )
