"""A guardrail promise that holds on new members, selection included.

The optimizer selects cohorts and arms on noisy estimates, so the chosen plan's guardrail
estimates are too optimistic (the optimizer's curse acting on constraints; Smith and Winkler
2006). Two remedies, applied to every optimizer the same way:

1. Empirical-Bayes shrinkage of the cohort x arm lifts inside the optimizer: per arm and metric
   component, lifts shrink toward their precision-weighted mean across cohorts with the
   DerSimonian-Laird (1986) between-cohort variance (the moment estimator statsmodels'
   `combine_effects(..., method_re="dl")` computes). Control means are left as they are.
2. Calibration by a parametric bootstrap centred at the shrunk estimates (Efron and Tibshirani
   1993 applied to the whole selection): draw cell means around the shrunk
   "truth", run the same pipeline (shrink, optimize at the same thresholds) on every draw, and
   record how far the chosen plan's estimated guardrail lift falls short of its lift under the
   bootstrap truth. The calibrated probability that guardrail k holds is
   Phi((allowance - estimate - mean error) / sd), sd the larger of the errors' sd and the plan's
   delta-method sd. When it is below the confidence, the guardrail's allowance handed to the
   optimizer is tightened by the shortfall and everything is re-run, until it holds or the
   optimizer finds no plan (then `Infeasible`, with each guardrail's calibrated probability).

Cohort discovery is not re-run in the draws: the cohort models estimate on rows they did not
split on, so the estimates are unbiased for the fixed partition and the remaining optimism is the
optimizer's. bench/decisions.py measures the resulting breach rates on designs the code was not
tuned on.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy.stats import norm

from apportion.errors import Infeasible
from apportion.optimize.chance import solve_cone
from apportion.optimize.linear import Linear, cvar_multiplier, linearize
from apportion.optimize.lp import LPModel, cut_row, simplex_rows
from apportion.optimize.problem import AllocationProblem, available_cells, validate_problem
from apportion.optimize.solve import (
    AllocationKind,
    Method,
    Solution,
    method_coefficients,
    solve_linear,
    summarize,
)
from apportion.stats.estimates import CellMoments

DRAWS = 100
ROUNDS = 8  # tightening rounds; each step grows by 1.5x so a slow fixed point still ends
DRAW_CUT_ROUNDS = 3  # Kelley rounds per draw; the last point is scaled to feasibility (chance.py)
FLOOR = 1.0  # floor of the error sd as a share of the plan's delta-method sd
Z95 = float(norm.ppf(0.975))


# ---- empirical-Bayes shrinkage -----------------------------------------------------------------


def dl_tau2(y: np.ndarray, v: np.ndarray) -> float:
    """DerSimonian-Laird between-group variance of estimates y with sampling variances v."""
    ok = np.isfinite(y) & np.isfinite(v) & (v > 0)
    y, v = y[ok], v[ok]
    if y.size < 2:
        return 0.0
    w = 1.0 / v
    mean = float((w * y).sum() / w.sum())
    q = float((w * (y - mean) ** 2).sum())
    denom = float(w.sum() - (w**2).sum() / w.sum())
    return max(0.0, (q - (y.size - 1)) / denom) if denom > 0 else 0.0


def shrink_means(
    mean: np.ndarray, var_mean: np.ndarray, avail: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Shrunk component means (C, J, Q) and the shrinkage factors kappa (C, J, Q).

    mean: (C, J, Q) cell means; var_mean: (C, J, Q) their sampling variances (var / n); avail:
    (C, J) usable cells. For each arm j >= 1 and component q the lift L_c = mean[c, j] - mean[c, 0]
    (variance V_c = var[c, j] + var[c, 0]) becomes m + kappa_c (L_c - m), kappa_c = tau2 /
    (tau2 + V_c), with m the 1/(V_c + tau2)-weighted mean and tau2 the DL estimate."""
    c, j, q = mean.shape
    out = mean.copy()
    kappa = np.ones_like(mean)
    if c < 2:
        return out, kappa
    for a in range(1, j):
        cells = avail[:, a] & avail[:, 0]
        if cells.sum() < 2:
            continue
        for k in range(q):
            lift = mean[cells, a, k] - mean[cells, 0, k]
            v = var_mean[cells, a, k] + var_mean[cells, 0, k]
            tau2 = dl_tau2(lift, v)
            w = 1.0 / np.maximum(v + tau2, 1e-300)
            centre = float((w * lift).sum() / w.sum())
            kap = tau2 / (tau2 + v) if tau2 > 0 else np.zeros_like(v)
            out[cells, a, k] = mean[cells, 0, k] + centre + kap * (lift - centre)
            kappa[cells, a, k] = kap
    return out, kappa


def _var_mean(moments: CellMoments, avail: np.ndarray) -> np.ndarray:
    d = np.diagonal(np.nan_to_num(moments.cov), axis1=2, axis2=3)
    return np.where(avail[..., None], d / np.maximum(moments.n, 1)[..., None], np.inf)


def shrunk_problem(problem: AllocationProblem) -> tuple[AllocationProblem, dict[str, Any]]:
    """The problem with every cohort x arm lift shrunk (see `shrink_means`)."""
    mom = problem.moments
    avail = available_cells(mom)
    var_mean = _var_mean(mom, avail)
    mean, kappa = shrink_means(np.where(avail[..., None], mom.mean, 0.0), var_mean, avail)
    mean = np.where(avail[..., None], mean, mom.mean)
    shrunk = replace(problem, moments=replace(mom, mean=mean))
    used = kappa[:, 1:][avail[:, 1:]]
    info = {
        "method": "empirical Bayes per arm and component, DerSimonian-Laird tau^2, lifts shrunk "
        "toward their precision-weighted mean across cohorts",
        "mean_kept_share": float(used.mean()) if used.size else 1.0,
    }
    return shrunk, info


# ---- calibration -------------------------------------------------------------------------------


@dataclass(frozen=True)
class Calibration:
    """What the calibrated solve found. Arrays are per guardrail, in absolute harm-oriented units
    (larger is more harm) except `probability`."""

    probability: np.ndarray  # (K,) calibrated probability each guardrail holds
    estimate: np.ndarray  # (K,) the plan's estimated harm (shrunk estimates)
    optimism: np.ndarray  # (K,) mean of (true - estimated) harm over the draws
    error_sd: np.ndarray  # (K,) sd used in the probability
    margin: np.ndarray  # (K,) how much each allowance was tightened
    success_optimism: float  # mean of (true - estimated) success lift (larger-is-better units)
    success_sd: float
    rounds: int
    draws: int
    seconds: float


def _coef_lin(lin: Linear, method: str, options: dict[str, Any]) -> tuple[Linear, str]:
    """A linear form and the method for `solve_linear` that the draws use: the stochastic mixed
    plan is replaced by its exact normal equivalent, the cone LP with the CVaR multiplier
    (stochastic.py), because stochastic approximation per draw would take minutes."""
    if method == "stochastic":
        return replace(lin, z=cvar_multiplier(lin.conf, options.get("tail"))), "chance"
    return lin, method


def _solve(
    problem: Any, lin: Any, method: str, allocation: str, seed: int, options: dict[str, Any]
) -> tuple[Any, int, dict[str, Any]]:
    lin_m, meth = (lin, method) if allocation == "pure" else _coef_lin(lin, method, options)
    x, it, diag = solve_linear(problem, lin_m, meth, allocation, seed=seed, options=options)
    return x, it, diag


def _draw_means(rng: np.random.Generator, mean: np.ndarray, sd: np.ndarray) -> np.ndarray:
    out: np.ndarray = mean + rng.standard_normal(mean.shape) * sd
    return out


def _warm_cuts(
    lin: Linear, x0: np.ndarray, coef: np.ndarray
) -> tuple[list[np.ndarray], list[float]]:
    found = [cut_row(lin, k, x0, float(coef[k])) for k in range(len(coef))] if coef.any() else []
    cuts = [cu for cu in found if cu is not None]
    return [cu[0] for cu in cuts], [cu[1] for cu in cuts]


def _errors(
    problem: AllocationProblem,
    centre: np.ndarray,
    margin: np.ndarray,
    method: str,
    allocation: str,
    options: dict[str, Any],
    draws: int,
    seed: int,
    x0: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """(B, K) true minus estimated harm and (B,) true minus estimated success lift of the plans
    the pipeline picks on draws around `centre` (the bootstrap truth). Components are drawn
    independently per cell with their sampling variance (their within-cell correlation only
    moves ratio metrics, and the delta-method sd floors the probability anyway). Cone plans are
    warm-started with tangent cuts at the plan x0 and solved to a 1 % cut tolerance, as the impact
    report's re-optimizations are (report.py)."""
    mom = problem.moments
    avail = available_cells(mom)
    var_mean = _var_mean(mom, avail)
    sd = np.sqrt(np.where(avail[..., None], var_mean, 0.0))
    lin_true = linearize(problem, centre, with_cellcov=False)
    rng = np.random.default_rng(seed)
    c, j = avail.shape
    a_eq = simplex_rows(c, j)
    pure = allocation == "pure"
    errs, s_errs = [], []
    for _ in range(draws):
        drawn = np.where(avail[..., None], _draw_means(rng, centre, sd), centre)
        est, _ = shrink_means(drawn, var_mean, avail)
        lin_d = linearize(problem, est, with_cellcov=False)
        lin_d = replace(lin_d, rhs=np.maximum(lin_d.rhs - margin, 0.0))
        if method == "deterministic":
            x = LPModel(lin_d, a_eq=a_eq).solve(pure=pure).x
        else:
            coef = (
                lin_d.z if method == "chance" else cvar_multiplier(lin_d.conf, options.get("tail"))
            )
            ca, cb = _warm_cuts(lin_d, x0, coef)
            x = solve_cone(LPModel(lin_d, a_eq=a_eq), lin_d, coef, pure=pure, tol=1e-2, max_iter=DRAW_CUT_ROUNDS,
                           cuts_a=ca, cuts_b=cb).x  # fmt: skip
        if x is None:
            continue
        errs.append(lin_true.harm_lift(x) - lin_d.harm_lift(x))
        s_errs.append(lin_true.success_lift(x) - lin_d.success_lift(x))
    k = len(problem.guardrails)
    e = np.array(errs) if errs else np.zeros((0, k))
    return e.reshape(len(errs), k), np.asarray(s_errs)


# one tightening round's record: (plan x, solver iterations, solver diagnostics, calibrated
# probability, estimate, selection optimism and error sd per guardrail, the success metric's
# optimism and error sd, rounds so far)
_Round = tuple[
    np.ndarray,
    int,
    dict[str, Any],
    np.ndarray,
    np.ndarray,
    np.ndarray,
    np.ndarray,
    float,
    float,
    int,
]


def calibrated_solve(
    problem: AllocationProblem,
    method: Method,
    allocation: AllocationKind = "mixed",
    *,
    seed: int = 0,
    options: dict[str, Any] | None = None,
    draws: int = DRAWS,
    rounds: int = ROUNDS,
) -> tuple[Solution, Calibration, AllocationProblem, dict[str, Any]]:
    """Solve on shrunk estimates and tighten until every guardrail's calibrated probability meets
    its confidence. Returns (solution on the shrunk problem, calibration, the shrunk problem, the
    shrinkage info); raises Infeasible with each guardrail's calibrated probability."""
    validate_problem(problem)
    opts = dict(options or {})
    t0 = time.perf_counter()
    shrunk, info = shrunk_problem(problem)
    lin0 = linearize(shrunk)
    mom = shrunk.moments
    avail = available_cells(mom)
    centre = np.where(avail[..., None], mom.mean, 0.0)
    k = len(problem.guardrails)
    margin = np.zeros(k)
    last: _Round | None = None
    for r in range(rounds):
        lin = replace(lin0, rhs=np.maximum(lin0.rhs - margin, 0.0))
        x, it, diag = _solve(shrunk, lin, method, allocation, seed, opts)
        if x is None:
            break
        est = lin0.harm_lift(x)
        samp_sd = lin0.harm_sd(x)
        e, s_e = _errors(shrunk, centre, margin, method, allocation, opts, draws, seed + 7919, x)
        opt = e.mean(axis=0) if len(e) else np.zeros(k)
        esd = e.std(axis=0, ddof=1) if len(e) > 1 else samp_sd
        esd = np.maximum(esd, FLOOR * samp_sd)
        room = lin0.rhs - est - opt
        with np.errstate(divide="ignore", invalid="ignore"):
            prob = np.where(
                esd > 0, norm.cdf(room / np.where(esd > 0, esd, 1.0)), 1.0 * (room >= 0)
            )
        s_opt = float(s_e.mean()) if len(s_e) else 0.0
        s_sd = float(s_e.std(ddof=1)) if len(s_e) > 1 else 0.0
        last = (x, it, diag, prob, est, opt, esd, s_opt, s_sd, r + 1)
        short = prob < lin0.conf - 1e-9
        if not short.any():
            break
        need = est + opt + lin0.z * esd - lin0.rhs  # > 0 where short
        margin = margin + np.where(
            short, np.maximum(need, 0.0) * 1.15 * 1.5**r + 1e-9 * lin0.rhs, 0.0
        )
    scaled = 1.0
    if last is not None and (last[3] < lin0.conf - 1e-9).any() and allocation == "mixed":
        last, scaled = _scale_toward_baseline(lin0, last)
    seconds = time.perf_counter() - t0
    if last is None or (last[3] < lin0.conf - 1e-9).any():
        _raise(problem, lin0, last)
    assert last is not None
    x, it, diag, prob, est, opt, esd, s_opt, s_sd, n_rounds = last
    diag = {**diag, "scaled_toward_baseline": scaled}
    cal = Calibration(prob, est, opt, esd, margin, s_opt, s_sd, n_rounds, draws, seconds)
    diag = {k2: v for k2, v in diag.items() if k2 != "cuts_state"}
    diag["calibration"] = {"rounds": n_rounds, "draws": draws, "margin": margin.tolist()}
    lin_t = replace(lin0, rhs=np.maximum(lin0.rhs - margin, 0.0))
    sol = summarize(shrunk, lin_t, x, method=method, allocation=allocation,
                    coef=method_coefficients(lin_t, method, opts), iterations=it,
                    seconds=seconds, diagnostics=diag)  # fmt: skip
    return sol, cal, shrunk, info


def _scale_toward_baseline(lin: Linear, last: _Round) -> tuple[_Round, float]:
    """When tightening the allowance cannot reach the confidence (it stops at zero allowance,
    where the plan may still carry noise), mix the plan with the baseline: x = b + s (x - b).
    Estimate, selection error and its sd all scale with s (each is linear in x - b), so
    s = min_k allowance_k / (estimate_k + optimism_k + z_k sd_k) over the short guardrails
    meets every confidence exactly. Returns the scaled record and s (0 means the baseline)."""
    x, it, diag, prob, est, opt, esd, s_opt, s_sd, rounds = last
    short = prob < lin.conf - 1e-9
    need = est + opt + lin.z * esd
    with np.errstate(divide="ignore", invalid="ignore"):
        s_k = np.where(short & (need > 0), lin.rhs / np.where(need > 0, need, 1.0), 1.0)
    s = float(np.clip(s_k.min(), 0.0, 1.0)) * (1.0 - 1e-9)
    est, opt, esd = s * est, s * opt, s * esd
    room = lin.rhs - est - opt
    with np.errstate(divide="ignore", invalid="ignore"):
        prob = np.where(esd > 0, norm.cdf(room / np.where(esd > 0, esd, 1.0)), 1.0 * (room >= 0))
    x = lin.b + s * (x - lin.b)
    return (x, it, diag, prob, est, opt, esd, s * s_opt, s * s_sd, rounds), s


def _raise(problem: AllocationProblem, lin: Linear, last: _Round | None) -> None:
    errors = []
    for k, g in enumerate(problem.guardrails):
        prob = None if last is None else float(last[3][k])
        errors.append(
            {
                "guardrail": g.metric,
                "threshold": float(g.threshold),
                "unit": g.unit,
                "confidence": float(g.confidence),
                "calibrated_probability": prob,
            }
        )
    parts = ", ".join(
        f"{e['guardrail']}: {'no plan' if e['calibrated_probability'] is None else format(e['calibrated_probability'], '.3f')}"
        f" vs {e['confidence']:g}"
        for e in errors
    )
    raise Infeasible(
        "no plan meets every guardrail at its confidence once selection is accounted for "
        f"(calibrated probability each holds: {parts})",
        errors=errors,
    )


def calibration_view(
    problem: AllocationProblem, cal: Calibration, info: dict[str, Any]
) -> dict[str, Any]:
    """JSON view: per guardrail the calibrated probability, in the threshold's units."""
    lin = linearize(problem, with_cellcov=False)
    rows = []
    for k, g in enumerate(problem.guardrails):
        s = float(lin.unit_scale[k])
        h = float(lin.harm[k])
        rows.append(
            {
                "guardrail": g.metric,
                "threshold": float(g.threshold),
                "unit": g.unit,
                "confidence": float(g.confidence),
                "probability_holds": float(cal.probability[k]),
                "estimate": float(h * cal.estimate[k] * s),
                "selection_correction": float(h * cal.optimism[k] * s),
                "corrected_estimate": float(h * (cal.estimate[k] + cal.optimism[k]) * s),
                "sd": float(cal.error_sd[k] * s),
                "tightened_by": float(cal.margin[k] * s),
            }
        )
    return {
        "guardrails": rows,
        "holds": bool((cal.probability >= lin.conf - 1e-9).all()),
        "rounds": cal.rounds,
        "draws": cal.draws,
        "seconds": round(cal.seconds, 3),
        "shrinkage": info,
        "method": "empirical-Bayes shrinkage in the optimizer, then a parametric bootstrap "
        "centred at the shrunk estimates that re-runs shrinkage and optimization per draw; "
        "allowances tightened until each guardrail's probability meets its confidence",
    }
