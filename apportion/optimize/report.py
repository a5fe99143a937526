"""Impact report of a plan: projected lifts with standard
errors, a bootstrap correction for the optimizer's curse, intervals, the probability each
guardrail holds, and comparison rows (every single arm for everyone, the best single arm that
meets the guardrails, the plan).

Optimizer's curse (Smith and Winkler 2006): the plan was chosen because its estimated lifts look
good, so they flatter it. Bias estimate (Efron and Tibshirani 1993, ch. 10, applied to a plug-in
value): draw cell means from their normal sampling distribution around the estimates,
re-optimize with the same method on each draw, and average how much each re-optimized plan
flatters itself on its own draw against the original estimates; subtract that mean.
Re-optimization: deterministic and chance plans are re-solved by the same LP/MILP (chance: the
cone cuts are warm-started at the reported plan); stochastic plans by the cone LP with the normal
CVaR multiplier, the exact equivalent of the CVaR guardrails under normal estimates, because 200
runs of stochastic approximation would take minutes. Interval: bias-corrected value +/- z_0.975 se
(normal, se from the delta method). Cohort discovery is not re-run in the draws, so the
correction misses the optimism of choosing the cohorts; the held-out
evaluation (apportion/stats/evaluation.py) is the honest number and is merged in elsewhere.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
from scipy.stats import norm

from apportion.optimize.chance import solve_cone
from apportion.optimize.linear import Linear, cvar_multiplier, linearize
from apportion.optimize.lp import LPModel, cut_row, simplex_rows
from apportion.optimize.problem import AllocationProblem, available_cells, validate_problem
from apportion.optimize.solve import Solution
from apportion.optimize.values import lift_sd, metric_values

Z95 = float(norm.ppf(0.975))
# Cut tolerance of the draws' re-optimizations: each re-optimized plan is made exactly feasible by
# scaling toward the baseline, which scales its optimism by the same factor (>= 1/(1 + tol)), so
# 1% moves the estimated optimism by at most 1% of itself.
REOPT_TOL = 1e-2


def _num(v: float | np.floating[Any]) -> float | None:
    return float(v) if np.isfinite(v) else None


def _draw_means(rng: np.random.Generator, mean: np.ndarray, chol: np.ndarray) -> np.ndarray:
    z = rng.standard_normal(mean.shape)
    out: np.ndarray = mean + np.einsum("cjqr,cjr->cjq", chol, z)
    return out


def _mean_chol(problem: AllocationProblem, avail: np.ndarray) -> np.ndarray:
    """(C, J, Q, Q) Cholesky factors of each cell mean's covariance cov / n (0 for empty cells)."""
    mom = problem.moments
    q = mom.mean.shape[-1]
    cov = np.where(avail[..., None, None], np.nan_to_num(mom.cov), 0.0)
    cov = cov / np.maximum(mom.n, 1)[..., None, None]
    jitter = 1e-12 * np.maximum(np.diagonal(cov, axis1=2, axis2=3).max(axis=-1), 1e-300)
    try:
        return np.linalg.cholesky(cov + jitter[..., None, None] * np.eye(q))
    except np.linalg.LinAlgError:
        vals, vecs = np.linalg.eigh(cov)
        out: np.ndarray = vecs * np.sqrt(np.clip(vals, 0.0, None))[..., None, :]
        return out


def _lifts(problem: Any, x: np.ndarray, mean: np.ndarray, base_x: np.ndarray) -> dict[str, float]:
    p = np.asarray(problem.shares, dtype=np.float64)
    comps = problem.moments.components
    vx = metric_values(x, p, mean, problem.metrics, comps)
    vb = metric_values(base_x, p, mean, problem.metrics, comps)
    return {k: vx[k] - vb[k] for k in vx}


def impact_report(
    problem: AllocationProblem,
    solution: Solution,
    *,
    draws: int = 200,
    seed: int = 0,
    progress: Callable[[int, int], None] | None = None,
) -> dict[str, Any]:
    """JSON-serializable report of `solution` for `problem` (see the module docstring)."""
    validate_problem(problem)
    mom = problem.moments
    avail = available_cells(mom)
    mean = np.where(avail[..., None], mom.mean, 0.0)
    p = np.asarray(problem.shares, dtype=np.float64)
    b = np.asarray(problem.baseline, dtype=np.float64)
    x = np.asarray(solution.allocation, dtype=np.float64)
    lin = linearize(problem, with_cellcov=False)
    c, j, _ = lin.shape
    keys = [problem.success] + [g.metric for g in problem.guardrails]
    # threshold units per metric key (success: absolute)
    unit = {problem.success: 1.0} | {
        key: float(lin.unit_scale[k]) for k, key in enumerate(lin.keys)
    }
    point = _lifts(problem, x, mean, b)
    se = {
        key: lift_sd(x, b, p, mom.mean, mom.cov, mom.n, problem.metric(key), mom.components)
        for key in keys
    }

    # Bootstrap correction of the optimizer's curse.
    method, kind = solution.method, solution.allocation_kind
    pure = kind == "pure"
    if method == "deterministic":
        coef = np.zeros(len(lin.keys))
        reopt = "deterministic LP" if not pure else "deterministic MILP"
    elif method == "chance":
        coef = lin.z
        reopt = "chance-constrained LP with tangent cuts" + (" (MILP)" if pure else "")
    else:
        coef = cvar_multiplier(lin.conf)
        reopt = "cone LP with the normal CVaR multiplier (exact CVaR under normal estimates)"
    chol = _mean_chol(problem, avail)
    rng = np.random.default_rng(seed)
    a_eq = simplex_rows(c, j)
    # warm multipliers for the draws' restricted LPs: the original problem re-solved once
    warm_cuts = _cuts_at(lin, x, coef)
    model0 = LPModel(lin, a_eq=a_eq)
    if not coef.any():
        duals0 = model0.solve().duals
    else:
        duals0 = solve_cone(model0, lin, coef, cuts_a=warm_cuts[0], cuts_b=warm_cuts[1]).duals
    delta: dict[str, list[float]] = {key: [] for key in keys}
    reopt_values: dict[str, list[float]] = {key: [] for key in keys}
    skipped = 0
    for d in range(draws):
        mean_d = np.where(avail[..., None], _draw_means(rng, mean, chol), 0.0)
        lin_d = linearize(problem, mean_d, with_cellcov=False)
        model = LPModel(lin_d, a_eq=a_eq)
        if not coef.any():
            x_d = model.solve(pure=pure, duals=duals0).x
        else:
            # warm start: tangent cuts of this draw's cones at the reported plan
            ca, cb = _cuts_at(lin_d, x, coef)
            x_d = solve_cone(
                model, lin_d, coef, pure=pure, tol=REOPT_TOL, cuts_a=ca, cuts_b=cb, duals=duals0
            ).x
        if x_d is None:
            skipped += 1
            continue
        own = _lifts(problem, x_d, mean_d, b)
        orig = _lifts(problem, x_d, mean, b)
        for key in keys:
            delta[key].append(own[key] - orig[key])
            reopt_values[key].append(orig[key])
        if progress is not None:
            progress(d + 1, draws)

    metrics_out = []
    for key in keys:
        s_u = unit[key]
        dl = np.asarray(delta[key])
        bias = float(dl.mean()) if dl.size else float("nan")
        lift = point[key] * s_u
        corrected = (point[key] - bias) * s_u if dl.size else float("nan")
        sd = se[key] * s_u
        row = {
            "metric": key,
            "role": "success" if key == problem.success else "guardrail",
            "lift": _num(lift),
            "se": _num(sd),
            "optimism": _num(bias * s_u),
            "optimism_se": _num(dl.std(ddof=1) / np.sqrt(dl.size) * s_u) if dl.size > 1 else None,
            "corrected_lift": _num(corrected),
            "interval": [_num(corrected - Z95 * sd), _num(corrected + Z95 * sd)],
            "reoptimized_sd": _num(np.std(reopt_values[key], ddof=1) * s_u)
            if len(reopt_values[key]) > 1
            else None,
        }
        if key != problem.success:
            k = keys.index(key) - 1
            g = problem.guardrails[k]
            harm = lin.harm[k]
            row["threshold"] = float(g.threshold)
            row["unit"] = g.unit
            row["confidence"] = float(g.confidence)
            if sd > 0:
                row["probability_holds"] = float(norm.cdf(harm * (g.threshold - lift) / sd))
                row["probability_holds_corrected"] = _num(
                    float(norm.cdf(harm * (g.threshold - corrected) / sd))
                )
            else:
                ok = harm * lift <= harm * g.threshold + 1e-12
                row["probability_holds"] = 1.0 if ok else 0.0
                row["probability_holds_corrected"] = row["probability_holds"]
        metrics_out.append(row)

    comparison = _comparison(problem, lin, x, mean, b, keys, unit)
    return {
        "method": method,
        "allocation_kind": kind,
        "baseline": "given",
        "metrics": metrics_out,
        "comparison": comparison,
        "bootstrap": {
            "draws": draws,
            "used": draws - skipped,
            "seed": seed,
            "reoptimization": reopt,
            "sampling": "cell means drawn from N(estimate, cov / n), cells independent",
            "interval": "bias-corrected lift +/- 1.96 se (normal, delta-method se)",
            "probability": "normal: P(lift within threshold) with the delta-method se",
        },
    }


def _cuts_at(lin: Linear, x: np.ndarray, coef: np.ndarray) -> tuple[list[Any], list[Any]]:
    found = [cut_row(lin, k, x, float(coef[k])) for k in range(len(coef))] if coef.any() else []
    cuts = [cu for cu in found if cu is not None]
    return [cu[0] for cu in cuts], [cu[1] for cu in cuts]


def _holds(problem: Any, lin: Linear, lifts_unit: dict[str, float]) -> dict[str, bool]:
    out = {}
    for k, g in enumerate(problem.guardrails):
        harm = lin.harm[k]
        v = lifts_unit[g.metric]
        out[g.metric] = bool(np.isfinite(v) and harm * v <= harm * g.threshold + 1e-12)
    return out


def _comparison(
    problem: Any,
    lin: Linear,
    x: np.ndarray,
    mean: np.ndarray,
    b: np.ndarray,
    keys: list[str],
    unit: dict[str, float],
) -> list[dict[str, Any]]:
    c, j, _ = lin.shape
    arm_rows: list[dict[str, Any]] = []
    for arm in range(j):
        if not lin.avail[:, arm].all():
            arm_rows.append({"plan": f"arm {arm} for everyone", "arm": arm, "available": False})
            continue
        xa = np.zeros((c, j))
        xa[:, arm] = 1.0
        lifts = _lifts(problem, xa, mean, b)
        lu = {key: lifts[key] * unit[key] for key in keys}
        arm_rows.append(
            {
                "plan": f"arm {arm} for everyone",
                "arm": arm,
                "available": True,
                "lifts": {key: _num(v) for key, v in lu.items()},
                "holds": _holds(problem, lin, lu),
            }
        )
    sign = lin.obj_sign
    safe = [r for r in arm_rows if r["available"] and all(r["holds"].values())]
    best = max(safe, key=lambda r: sign * r["lifts"][problem.success], default=None)
    rows = list(arm_rows)
    if best is not None:
        rows.append(best | {"plan": "best single arm meeting the guardrails"})
    lifts = _lifts(problem, x, mean, b)
    lu = {key: lifts[key] * unit[key] for key in keys}
    rows.append(
        {
            "plan": "this plan",
            "available": True,
            "lifts": {key: _num(v) for key, v in lu.items()},
            "holds": _holds(problem, lin, lu),
        }
    )
    return rows
