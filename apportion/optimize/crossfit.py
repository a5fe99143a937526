"""Honest held-out evaluation of a whole decision pipeline, and the method comparison.

A candidate is (cohort model method x optimizer). For each of K folds (by unit, stratified by
arm), the candidate's full pipeline (cohort discovery, estimation, shrinkage, the calibrated
optimizer) runs on the other folds and its plan is scored on the fold it never saw with doubly
robust (AIPW) scores (Robins, Rotnitzky and Zhao 1994; multi-arm form of Zhou, Athey and Wager
2023) whose outcome model is the fold plan's own cohort x arm means, fitted without the fold:

    Gamma_ijq = mu_jq(c_i) + 1{W_i = j} (Y_iq - mu_jq(c_i)) / e_j
    psi_iq    = sum_j (x[c_i, j] - b_j) Gamma_ijq            (b: all control)

The held-out lift of metric k is the mean of psi over all units (a ratio metric by the delta
method, Deng, Knoblich and Lu 2018). Its standard error is the larger of the within-fold one
and the Nadeau and Bengio (2003) corrected resampled variance of the fold estimates,
(1/K + n_test/n_train) s^2_folds (from memory of the paper: the correction factor replaces 1/K).
Candidates are compared by paired per-unit differences of psi.

The service's methods come from registries (`apportion.stats.models.METHODS`,
`apportion.optimize.solve.METHODS`), so a new cohort model joins the comparison when it is added.

Longer than most modules (about 590 lines) on purpose: the fold loop, the per-fold scoring, the
recommendation rule and the worker processes that run the folds share the fold bookkeeping (which
fold, which candidates, their progress and failures), and splitting them would pass it around whole.
"""

from __future__ import annotations

import math
import multiprocessing as mp
import os
import queue
import time
from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.stats import norm

from apportion.errors import Infeasible, InvalidInput
from apportion.optimize.calibrate import calibrated_solve
from apportion.optimize.problem import Guardrail, build_problem
from apportion.optimize.solve import METHODS as OPTIMIZERS
from apportion.optimize.solve import AllocationKind, Method
from apportion.stats import models as cohort_models
from apportion.stats.decision import DECISION_METHODS
from apportion.stats.table import UnitTable

FOLDS = 5
FOLD_DRAWS = 40  # calibration draws per fold plan (the final plan uses the full count)
# The comparison runs every candidate in every fold, and the calibration's re-solves dominate its
# time (bench/compare.py): it calibrates each fold plan with half the draws. The held-out figures
# stay honest (they score the plans actually made); the fold plans' margins are a little noisier
# than a draft's (relative se of a 20-draw sd about 16 % against 11 % at 40).
COMPARISON_DRAWS = 20
# methods that need caller input (segments: which features) are not candidates by default
NEEDS_INPUT = ("segments",)


@dataclass(frozen=True)
class Candidate:
    model: str
    optimizer: Method
    allocation: AllocationKind = "mixed"

    @property
    def name(self) -> str:
        return f"{self.model}/{self.optimizer}"


def registry() -> list[Candidate]:
    """Every (model method x optimizer) the service offers, in registry order."""
    models = [m for m in cohort_models.METHODS if m not in NEEDS_INPUT]
    return [Candidate(m, o) for m in models for o in OPTIMIZERS]


def parse_candidates(names: list[str] | None) -> list[Candidate]:
    """Candidates named "model/optimizer"; None means the whole registry."""
    if not names:
        return registry()
    out = []
    for i, name in enumerate(names):
        model, _, opt = str(name).partition("/")
        optimizer = next((o for o in OPTIMIZERS if o == opt), None)
        if model not in cohort_models.METHODS or optimizer is None:
            raise InvalidInput(
                f"candidate {name!r} must be 'model/optimizer' with model in "
                f"{list(cohort_models.METHODS)} and optimizer in {list(OPTIMIZERS)}",
                errors=[{"field": f"candidates[{i}]", "value": str(name)}],
            )
        out.append(Candidate(model, optimizer))
    if len({c.name for c in out}) != len(out):
        raise InvalidInput("candidates must not repeat", errors=[{"field": "candidates"}])
    return out


def fold_ids(arm: np.ndarray, folds: int, seed: int) -> np.ndarray:
    """(n,) fold of every unit, stratified by arm (balanced within each arm)."""
    rng = np.random.default_rng(seed)
    out = np.empty(arm.shape[0], dtype=np.int64)
    for a in np.unique(arm):
        rows = np.flatnonzero(arm == a)
        out[rows[rng.permutation(rows.size)]] = np.arange(rows.size) % folds
    return out


def model_params_for(
    cand: Candidate, guardrails: tuple[Guardrail, ...], params: dict[str, Any]
) -> dict[str, Any]:
    """The cohort model's parameters for a candidate: a decision-focused method (policy tree,
    distilled member-level models) prices the plan's guardrails while it splits, so it gets them
    unless the caller set its own; other methods take no guardrails."""
    if cand.model in DECISION_METHODS and params.get("guardrails") is None:
        return {**params, "guardrails": [
            {"metric": g.metric, "threshold": float(g.threshold), "unit": g.unit}
            for g in guardrails]}  # fmt: skip
    return params


def run_pipeline(
    table: UnitTable,
    cand: Candidate,
    *,
    success: str,
    guardrails: tuple[Guardrail, ...],
    model_params: dict[str, Any] | None = None,
    seed: int = 0,
    draws: int = FOLD_DRAWS,
) -> tuple[Any, np.ndarray, np.ndarray | None]:
    """The candidate's plan on `table`: (cohort model fit, allocation (C, J), calibrated
    probabilities or None when no plan met the guardrails and control is served)."""
    fit = fit_model(table, cand.model, success=success, guardrails=guardrails,
                    model_params=model_params, seed=seed)  # fmt: skip
    x, prob = solve_on_fit(table, fit, cand, success=success, guardrails=guardrails, seed=seed,
                           draws=draws)  # fmt: skip
    return fit, x, prob


def fit_model(table: UnitTable, model: str, *, success: str,
              guardrails: tuple[Guardrail, ...] = (), model_params: dict[str, Any] | None = None,
              seed: int = 0) -> Any:  # fmt: skip
    """The cohort model of one fold: fitted once and shared by every optimizer that uses it (a
    decision-focused method prices the guardrails, `model_params_for`)."""
    params = model_params_for(Candidate(model, "deterministic"), guardrails,
                              {"seed": seed, **(model_params or {})})  # fmt: skip
    return cohort_models.fit_cohort_model(table, model, params, success_metric=success)


def solve_on_fit(
    table: UnitTable,
    fit: Any,
    cand: Candidate,
    *,
    success: str,
    guardrails: tuple[Guardrail, ...],
    seed: int = 0,
    draws: int = FOLD_DRAWS,
) -> tuple[np.ndarray, np.ndarray | None]:
    """The calibrated allocation (C, J) of `cand`'s optimizer on a fitted model, and its
    calibrated probabilities (None when no plan met the guardrails and control is served)."""
    problem = build_problem(shares=fit.shares, moments=fit.moments, metrics=table.metrics,
                            success=success, guardrails=guardrails)  # fmt: skip
    try:
        sol, cal, _, _ = calibrated_solve(problem, cand.optimizer, cand.allocation, seed=seed,
                                          draws=draws)  # fmt: skip
        return sol.allocation, cal.probability
    except Infeasible:
        x = np.zeros((fit.partition.n_cohorts, table.n_arms))
        x[:, 0] = 1.0
        return x, None


MIN_PER_ARM_AND_FOLD = 10  # held-out units of every arm in every fold (each trains on the rest)


def check_folds(arm_counts: dict[str, int], folds: int) -> None:
    """InvalidInput unless every arm has at least MIN_PER_ARM_AND_FOLD units per fold: a fold
    with a handful of units of some arm gives a doubly robust score dominated by one weight and a
    standard error that means nothing."""
    if folds < 2 or folds > 20:
        raise InvalidInput(f"folds must be in 2..20, got {folds}", errors=[{"field": "folds"}])
    need = MIN_PER_ARM_AND_FOLD * folds
    short = {a: int(c) for a, c in arm_counts.items() if int(c) < need}
    if short:
        listed = ", ".join(f"{a!r} has {c}" for a, c in short.items())
        raise InvalidInput(
            f"too few rows for {folds} folds: every arm needs at least {need} units "
            f"({MIN_PER_ARM_AND_FOLD} per fold); {listed}. Use fewer folds or a larger readout",
            errors=[
                {"field": "folds", "problem": "too few rows", "value": folds, "arms": short}
            ],  # fmt: skip
        )


def _scores(table: UnitTable, fit: Any, x: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """(len(rows), Q) per-unit AIPW lift scores psi of plan x against all-control, per
    component, with the fit's cohort x arm means (fitted on other rows) as outcome model."""
    sub = table.take(rows)
    cohort, _ = fit.partition.route(sub.feature_values, sub.features)
    mu = np.nan_to_num(
        fit.moments.mean
    )  # (C, J, Q); an empty cell falls back to 0 (still unbiased)
    e = np.asarray(sub.design_shares, dtype=np.float64)
    y = sub.component_matrix()
    d = x - np.eye(x.shape[1])[0][None]  # (C, J): plan minus all-control
    resid = y - mu[cohort, sub.arm]
    direct = np.einsum("ij,ijq->iq", d[cohort], mu[cohort])
    out: np.ndarray = direct + (d[cohort, sub.arm] / e[sub.arm])[:, None] * resid
    return out


def _control_scores(table: UnitTable, fit: Any, rows: np.ndarray) -> np.ndarray:
    """(len(rows), Q) AIPW scores of every component's level under all-control."""
    sub = table.take(rows)
    cohort, _ = fit.partition.route(sub.feature_values, sub.features)
    mu = np.nan_to_num(fit.moments.mean)
    y = sub.component_matrix()
    w = (sub.arm == 0) / float(sub.design_shares[0])
    out: np.ndarray = mu[cohort, 0] + w[:, None] * (y - mu[cohort, 0])
    return out


def _metric_influence(
    table: UnitTable, key: str, psi: np.ndarray, base: np.ndarray
) -> tuple[float, np.ndarray]:
    """Lift estimate of metric `key` and per-unit influence values (n,)."""
    m = table.metric(key)
    pos = {c: i for i, c in enumerate(table.component_names())}
    if m.kind != "ratio":
        v = psi[:, pos[key]]
        return float(v.mean()), v
    a, dd = pos[m.ratio_columns[0]], pos[m.ratio_columns[1]]
    nb, db = base[:, a], base[:, dd]
    nx, dx = nb + psi[:, a], db + psi[:, dd]
    rb, rx = nb.mean() / db.mean(), nx.mean() / dx.mean()
    infl = (nx - rx * dx) / dx.mean() - (nb - rb * db) / db.mean()
    return float(rx - rb), infl


@dataclass
class _FoldPlan:
    """What every fold of a comparison shares (sent once to each worker process)."""

    by_model: dict[str, list[Candidate]]
    success: str
    guardrails: tuple[Guardrail, ...]
    seed: int
    draws: int
    model_params: dict[str, dict[str, Any]]


@dataclass
class _FoldOut:
    """One fold's results: held-out scores of the test rows, per candidate."""

    base: np.ndarray | None  # (n_test, Q) control scores; None when every model failed
    psi: dict[str, np.ndarray] = field(default_factory=dict)  # candidate -> (n_test, Q)
    no_plan: dict[str, bool] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)
    fit_seconds: dict[str, float] = field(default_factory=dict)
    failed: dict[str, str] = field(default_factory=dict)  # candidate -> why (a domain error)


def _run_fold(
    table: UnitTable, fold: np.ndarray, f: int, plan: _FoldPlan, tick: Callable[[int], None]
) -> _FoldOut:
    """Fit every model on the other folds, solve every candidate on its model's fit and score
    the plans on fold f. A fold depends on nothing another fold computed, so the folds run in
    any order or at once and give the same numbers."""
    train, test = np.flatnonzero(fold != f), np.flatnonzero(fold == f)
    tr = table.take(train)
    out = _FoldOut(base=None)
    for model, group in plan.by_model.items():
        t0 = time.perf_counter()
        try:
            fit = fit_model(tr, model, success=plan.success, guardrails=plan.guardrails,
                            seed=plan.seed + f, model_params=plan.model_params.get(model))  # fmt: skip
        except InvalidInput as exc:  # a domain refusal; a defect still fails the job
            for cand in group:
                out.failed[cand.name] = f"fold {f + 1}: the {model} fit failed: {exc.detail}"
            tick(1 + len(group))
            continue
        out.fit_seconds[model] = time.perf_counter() - t0
        fit_share = out.fit_seconds[model] / len(group)
        tick(1)
        if out.base is None:  # control scores from the first model that fitted in this fold
            out.base = _control_scores(table, fit, test)
        for cand in group:
            t0 = time.perf_counter()
            try:
                x, prob = solve_on_fit(tr, fit, cand, success=plan.success,
                                       guardrails=plan.guardrails, seed=plan.seed + f,
                                       draws=plan.draws)  # fmt: skip
            except InvalidInput as exc:  # a domain refusal; a defect still fails the job
                out.failed[cand.name] = (
                    f"fold {f + 1}: the {cand.optimizer} plan failed: {exc.detail}"
                )
                tick(1)
                continue
            out.psi[cand.name] = _scores(table, fit, x, test)
            out.no_plan[cand.name] = prob is None
            out.seconds[cand.name] = fit_share + time.perf_counter() - t0
            tick(1)
    return out


# ---- the folds in worker processes ---------------------------------------------------------------
# Spawned, not forked: the parent may be a server with threads and OpenMP already running
# (scikit-learn's boosting), and neither survives a fork safely. Each worker gets the table, the
# fold ids and the plan once (initializer); progress comes back through a queue as step counts, and
# a cancel event stops a worker at its next step when the job is abandoned.

_WORKER: dict[str, Any] = {}


class _Cancelled(Exception):
    """The comparison was abandoned (its job was reclaimed or failed in the parent)."""


def _init_worker(table: UnitTable, fold: np.ndarray, plan: _FoldPlan, steps: Any,
                 cancel: Any) -> None:  # fmt: skip
    _WORKER.update(table=table, fold=fold, plan=plan, steps=steps, cancel=cancel)


def _worker_fold(f: int) -> _FoldOut:
    w = _WORKER

    def tick(k: int) -> None:
        if w["cancel"].is_set():
            raise _Cancelled
        w["steps"].put(k)

    return _run_fold(w["table"], w["fold"], f, w["plan"], tick)


def _folds_in_processes(
    table: UnitTable,
    fold: np.ndarray,
    folds: int,
    plan: _FoldPlan,
    workers: int,
    tick: Callable[[int], None],
    steps_total: int,
) -> list[_FoldOut]:
    ctx = mp.get_context("spawn")
    steps, cancel = ctx.Queue(), ctx.Event()
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_init_worker,
                               initargs=(table, fold, plan, steps, cancel))  # fmt: skip
    try:
        futures = [pool.submit(_worker_fold, f) for f in range(folds)]
        pending = set(futures)
        received = 0
        while pending:
            try:
                k = steps.get(timeout=0.2)
                received += k
                tick(k)
            except queue.Empty:
                pass
            pending = {fu for fu in pending if not fu.done()}
            for fu in futures:
                exc = fu.exception() if fu.done() else None
                if exc is not None:
                    raise exc
        # every fold has finished, so every step was sent; the last ones may still be on their
        # way (the queue's pipe is not the results' pipe)
        while received < steps_total:
            try:
                k = steps.get(timeout=30.0)
            except queue.Empty:  # pragma: no cover - a worker died between a step and its result
                break
            received += k
            tick(k)
        outs = [fu.result() for fu in futures]
    except BaseException:
        cancel.set()  # running folds stop at their next step; queued ones never start
        pool.shutdown(wait=False, cancel_futures=True)
        raise
    pool.shutdown(wait=True)  # every fold is done: the idle workers exit and are joined here
    return outs


# Below this many units the folds run in the job's own process: a worker starts a fresh
# interpreter that imports numpy, scipy and scikit-learn (2 to 3 s measured on the 2-core box
# under load) and receives the table, which costs more than folds of that size take.
PROCESS_MIN_UNITS = 50_000


def comparison_workers(configured: int, units: int) -> int:
    """Worker processes for a comparison's folds: `configured` (0: min(2, cores)), or 1 for a
    readout under PROCESS_MIN_UNITS units."""
    if units < PROCESS_MIN_UNITS:
        return 1
    return configured or max(1, min(2, os.cpu_count() or 1))


def evaluate_candidates(
    table: UnitTable,
    candidates: list[Candidate],
    *,
    success: str,
    guardrails: tuple[Guardrail, ...],
    folds: int = FOLDS,
    seed: int = 0,
    model_params: dict[str, dict[str, Any]] | None = None,
    progress: Callable[[float], None] | None = None,
    draws: int = FOLD_DRAWS,
    workers: int = 1,
) -> dict[str, Any]:
    """Cross-fit every candidate and rank them (see the module docstring and `recommend`);
    `draws`: calibration draws per fold plan; `workers`: processes that run folds at once (1: in
    this process, one fold after the other; the result is the same either way)."""
    check_folds({str(k): int(v) for k, v in
                 zip(table.arm_keys, np.bincount(table.arm, minlength=table.n_arms), strict=True)},
                folds)  # fmt: skip
    t_all = time.perf_counter()
    fold = fold_ids(table.arm, folds, seed)
    n = table.n
    keys = [success] + [g.metric for g in guardrails]
    by_model: dict[str, list[Candidate]] = {}
    for cand in candidates:  # each model is fitted once per fold; every optimizer reuses it
        by_model.setdefault(cand.model, []).append(cand)
    plan = _FoldPlan(by_model, success, guardrails, seed, draws, dict(model_params or {}))
    steps, done = folds * (len(by_model) + len(candidates)), 0

    def tick(steps_done: int) -> None:
        nonlocal done
        done += steps_done
        if progress is not None:
            progress(done / steps)

    if workers > 1 and folds > 1:
        outs = _folds_in_processes(table, fold, folds, plan, min(workers, folds), tick, steps)
    else:
        outs = [_run_fold(table, fold, f, plan, tick) for f in range(folds)]

    q = len(table.component_names())
    psi = {c.name: np.zeros((n, q)) for c in candidates}
    base = np.zeros((n, q))
    infeasible = {c.name: 0 for c in candidates}
    fold_vals: dict[str, list[dict[str, float]]] = {c.name: [] for c in candidates}
    seconds = {c.name: 0.0 for c in candidates}
    fit_seconds = dict.fromkeys(by_model, 0.0)
    failed: dict[str, str] = {}  # candidate -> why it left (the first fold where it failed)
    for f, fo in enumerate(outs):
        for name, why in fo.failed.items():
            failed.setdefault(name, why)
        for model, s in fo.fit_seconds.items():
            fit_seconds[model] += s
        for name, s in fo.seconds.items():
            seconds[name] += s
        if fo.base is None:
            break  # every model failed in this fold: nothing is left to compare
        test = np.flatnonzero(fold == f)
        base[test] = fo.base
        for name, p in fo.psi.items():
            psi[name][test] = p
            infeasible[name] += fo.no_plan[name]
        for cand in candidates:
            if cand.name in failed:
                continue
            fv = {k: _metric_influence(table, k, psi[cand.name][test], base[test])[0] for k in keys}
            fold_vals[cand.name].append(fv)
    if len(failed) == len(candidates):
        raise InvalidInput(
            "no candidate could be evaluated: "
            + "; ".join(f"{name}: {why}" for name, why in failed.items()),
            errors=[{"field": "candidates", "problem": why, "value": name}
                    for name, why in failed.items()],
        )  # fmt: skip
    rows = []
    for cand in candidates:
        if cand.name in failed:
            continue
        p = psi[cand.name]
        metrics = {}
        for k in keys:
            v, infl = _metric_influence(table, k, p, base)
            se_within = float(infl.std(ddof=1) / math.sqrt(n))
            per_fold = np.array([d[k] for d in fold_vals[cand.name]])
            se_nb = float(math.sqrt((1 / folds + 1 / (folds - 1)) * per_fold.var(ddof=1)))
            metrics[k] = {"lift": v, "se": max(se_within, se_nb), "se_within": se_within,
                          "se_folds": se_nb, "folds": per_fold.tolist()}  # fmt: skip
        rows.append({"candidate": cand.name, "model": cand.model, "optimizer": cand.optimizer,
                     "metrics": metrics, "folds_without_plan": infeasible[cand.name],
                     "seconds": round(seconds[cand.name], 3)})  # fmt: skip
    out = recommend(table, rows, psi, base, success=success, guardrails=guardrails)
    for cand in candidates:  # failed candidates last, unranked, with the reason they left
        if cand.name in failed:
            out["candidates"].append({
                "candidate": cand.name, "model": cand.model, "optimizer": cand.optimizer,
                "metrics": {}, "folds_without_plan": 0, "seconds": round(seconds[cand.name], 3),
                "status": "failed", "failing": [], "rank": None, "error": failed[cand.name]})  # fmt: skip
    out.update(folds=folds, seed=seed, units=n, draws=draws,
               seconds=round(time.perf_counter() - t_all, 3),
               fit_seconds={m: round(v, 3) for m, v in fit_seconds.items()})  # fmt: skip
    return out


def _allowance(table: UnitTable, g: Guardrail, base_level: float) -> tuple[float, float]:
    """(harm sign, absolute threshold) of a guardrail."""
    m = table.metric(g.metric)
    harm = 1.0 if m.direction == "lower" else -1.0
    t = g.threshold / 100.0 * abs(base_level) if g.unit == "relative" else g.threshold
    return harm, float(t)


def recommend(
    table: UnitTable,
    rows: list[dict[str, Any]],
    psi: dict[str, np.ndarray],
    base: np.ndarray,
    *,
    success: str,
    guardrails: tuple[Guardrail, ...],
) -> dict[str, Any]:
    """Rule: refuse a candidate whose held-out estimate of some guardrail
    lies beyond its threshold; call it verified when estimate + z' se stays within for every
    guardrail (z' Bonferroni-adjusted for the number of candidates); among the rest take the
    best held-out success lift, preferring a verified one, and within one paired standard error
    of it the one with fewer cohorts' worth of complexity (registry order: simpler first)."""
    m_success = table.metric(success)
    sign = 1.0 if m_success.direction == "higher" else -1.0
    pos = {c: i for i, c in enumerate(table.component_names())}
    base_levels = {}
    for g in guardrails:
        m = table.metric(g.metric)
        if m.kind == "ratio":
            base_levels[g.metric] = float(
                base[:, pos[m.ratio_columns[0]]].mean() / base[:, pos[m.ratio_columns[1]]].mean()
            )
        else:
            base_levels[g.metric] = float(base[:, pos[g.metric]].mean())
    n_cand = max(len(rows), 1)
    for r in rows:
        status, failing = "verified", []
        for g in guardrails:
            harm, t = _allowance(table, g, base_levels[g.metric])
            v = r["metrics"][g.metric]
            zp = float(norm.ppf(1 - (1 - g.confidence) / n_cand))
            if harm * v["lift"] > harm * t:
                status = "refused"
                failing.append(g.metric)
            elif harm * v["lift"] + zp * v["se"] > harm * t and status != "refused":
                status = "unverified"
            v["threshold_absolute"] = t
            v["probability_holds"] = (
                float(norm.cdf((harm * t - harm * v["lift"]) / v["se"]))
                if v["se"] > 0
                else float(harm * v["lift"] <= harm * t)
            )
        r["status"], r["failing"] = status, failing
    ok = [r for r in rows if r["status"] != "refused"]
    order = sorted(
        rows, key=lambda r: (r["status"] == "refused", -sign * r["metrics"][success]["lift"])
    )
    rank = {r["candidate"]: i + 1 for i, r in enumerate(order)}
    for r in rows:
        r["rank"] = rank[r["candidate"]]
    if not ok:
        worst = sorted({g for r in rows for g in r["failing"]})
        return {"candidates": order, "recommended": None,
                "reason": f"every candidate's held-out estimate breaks a guardrail ({', '.join(worst)}); "
                "keep control (or the best single arm that passes) and revisit the thresholds"}  # fmt: skip
    pool = [r for r in ok if r["status"] == "verified"] or ok
    best = max(pool, key=lambda r: sign * r["metrics"][success]["lift"])
    names = [r["candidate"] for r in rows]
    s_col = pos[success] if m_success.kind != "ratio" else None
    chosen = best
    for r in pool:  # registry order: the first within one paired SE of the best
        if s_col is None:
            break
        diff = sign * (psi[best["candidate"]][:, s_col] - psi[r["candidate"]][:, s_col])
        if diff.mean() <= diff.std(ddof=1) / math.sqrt(diff.size):
            chosen = r
            break
    verified = "verified" if chosen["status"] == "verified" else "not refused"
    reason = (f"{chosen['candidate']}: held-out {success} lift {chosen['metrics'][success]['lift']:.4g} "
              f"(se {chosen['metrics'][success]['se']:.2g}), every guardrail {verified} on folds "
              "its plans never saw")  # fmt: skip
    if chosen is not best:
        reason += (
            f"; within one paired se of the best ({best['candidate']}) and earlier in the registry"
        )
    assert chosen["candidate"] in names
    return {"candidates": order, "recommended": chosen["candidate"], "reason": reason}
