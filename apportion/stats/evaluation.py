"""Held-out evaluation of a cohort plan: what each metric would be under the plan and under the
baseline, estimated from randomized rows the plan was not learned on.

Two estimators per metric, both unbiased because the propensities are the known design shares:
inverse-propensity weighting (Horvitz and Thompson, 1952) and the doubly robust augmented IPW
(Robins, Rotnitzky and Zhao, 1994) with cohort-arm means as the outcome model, cross-fitted. Lifts
are paired per unit, Delta_i = Gamma_i(plan) - Gamma_i(baseline), so the shared noise cancels.
Ratio metrics combine their numerator and denominator estimates by the delta method (Deng,
Knoblich and Lu, 2018) using the per-unit score covariance.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.stats.estimates import cell_moments, pool_cohorts
from apportion.stats.table import MetricSpec

_SHARE_TOL = 1e-6


def evaluate_policy(
    *,
    cohort: np.ndarray,
    arm: np.ndarray,
    design_shares: Any,
    values: np.ndarray,
    components: tuple[str, ...],
    metrics: tuple[MetricSpec, ...],
    plan: np.ndarray,
    baseline: np.ndarray,
    outcome_means: np.ndarray | None = None,
    folds: int = 2,
    seed: int = 0,
) -> dict[str, dict[str, dict[str, float | None]]]:
    """Estimate every metric under `plan` and `baseline` on held-out unit rows.

    cohort, arm: (n,) int codes (arm 0 = control); design_shares: (J,) assignment probabilities
    e_j; values: (n, Q) metric components named by `components`; plan, baseline: (C, J), rows on
    the simplex. outcome_means: (C, J, Q) cohort-arm means fitted on other rows (e.g. the rows the
    plan was learned on), used as the DR outcome model for every row; if None, cohort-arm means
    are cross-fitted over `folds` random folds of these rows (seeded by `seed`).

    Returns {metric key: {"plan": {"ipw", "ipw_se", "dr", "dr_se"}, "baseline": {...},
    "lift": {...}}} with plain floats; a value that cannot be estimated (e.g. a ratio whose
    denominator is 0 under the policy) is None.
    """
    cohort, arm, shares, values, plan, baseline = _validate(
        cohort, arm, design_shares, values, components, metrics, plan, baseline
    )
    n, q = values.shape
    n_cohorts, n_arms = plan.shape
    # outcome model as per-fold cell tables (F, C, J, Q) plus each row's fold: O(n Q) memory
    if outcome_means is None:
        table, row_fold = _cross_fit_means(
            cohort, n_cohorts, arm, n_arms, values, components, folds, seed
        )
    else:
        table, row_fold = _fixed_means(outcome_means, n_cohorts, n_arms, q), np.zeros(n, int)
    residual = values - table[row_fold, cohort, arm]  # Y_i - mu_{W_i}(X_i)

    # per-unit scores, (n, Q) per policy: IPW w_i Y_i and AIPW Gamma_i
    scores = {}
    for name, policy in (("plan", plan), ("baseline", baseline)):
        w = (policy[cohort, arm] / shares[arm])[:, None]
        direct = np.einsum("cj,fcjq->fcq", policy, table)[row_fold, cohort]
        scores[name] = {"ipw": w * values, "dr": direct + w * residual}

    pos = {c: i for i, c in enumerate(components)}
    out: dict[str, dict[str, dict[str, float | None]]] = {}
    for m in metrics:
        cols = [pos[c] for c in m.columns]
        entry: dict[str, dict[str, float | None]] = {"plan": {}, "baseline": {}, "lift": {}}
        for est in ("ipw", "dr"):
            lin = {}
            for name in ("plan", "baseline"):
                value, lin[name] = _linearize(scores[name][est][:, cols], m.kind == "ratio")
                entry[name][est] = _num(value)
                entry[name][f"{est}_se"] = _se(lin[name])
            entry["lift"][est] = _diff(entry["plan"][est], entry["baseline"][est])
            entry["lift"][f"{est}_se"] = _se(lin["plan"] - lin["baseline"])
        out[m.key] = entry
    return out


def _linearize(score: np.ndarray, ratio: bool) -> tuple[float, np.ndarray]:
    """Point estimate and per-unit influence values (n,) whose sd / sqrt(n) is its SE.

    Mean metric: the score itself. Ratio metric R = mean(num)/mean(den): the delta method,
    (num_i - R den_i) / mean(den) (Deng, Knoblich and Lu, 2018)."""
    if not ratio:
        s = score[:, 0]
        return float(s.mean()), s
    num, den = score[:, 0], score[:, 1]
    mu_n, mu_d = float(num.mean()), float(den.mean())
    if mu_d == 0.0:
        return math.nan, np.full(num.shape, np.nan)
    r = mu_n / mu_d
    return r, (num - r * den) / mu_d


def _se(influence: np.ndarray) -> float | None:
    n = influence.shape[0]
    if n < 2:
        return None
    return _num(float(np.std(influence, ddof=1)) / math.sqrt(n))


def _num(x: float) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _diff(a: float | None, b: float | None) -> float | None:
    return None if a is None or b is None else _num(a - b)


def _cross_fit_means(
    cohort: np.ndarray,
    n_cohorts: int,
    arm: np.ndarray,
    n_arms: int,
    values: np.ndarray,
    components: tuple[str, ...],
    folds: int,
    seed: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Cell tables (F, C, J, Q) of cohort-arm means, table f fitted on the rows outside fold f,
    and each row's fold (n,). A cell empty outside fold f falls back to the arm's mean over all
    cohorts there, then to 0: with known propensities AIPW stays unbiased whatever the outcome
    model, so a fallback only costs variance."""
    n = cohort.shape[0]
    if not isinstance(folds, int | np.integer) or not 2 <= folds <= n:
        raise InvalidInput(f"folds must be an integer between 2 and the row count {n}, got {folds}")
    rng = np.random.default_rng(seed)
    fold = np.empty(n, dtype=np.int64)
    fold[rng.permutation(n)] = np.arange(n) % folds
    table = np.empty((folds, n_cohorts, n_arms, values.shape[1]))
    for f in range(folds):
        train = fold != f
        mom = cell_moments(cohort[train], n_cohorts, arm[train], n_arms, values[train], components)
        arm_mean = np.nan_to_num(pool_cohorts(mom).mean[0], nan=0.0)  # (J, Q)
        table[f] = np.where(np.isnan(mom.mean), arm_mean[None], mom.mean)
    return table, fold


def _fixed_means(outcome_means: np.ndarray, n_cohorts: int, n_arms: int, q: int) -> np.ndarray:
    """The given (C, J, Q) means as a one-fold table (1, C, J, Q)."""
    mu = np.asarray(outcome_means, dtype=np.float64)
    if mu.shape != (n_cohorts, n_arms, q):
        raise InvalidInput(
            f"outcome_means must have shape {(n_cohorts, n_arms, q)} (cohorts, arms, components), "
            f"got {mu.shape}"
        )
    if not np.all(np.isfinite(mu)):
        bad = np.argwhere(~np.isfinite(mu))[:5].tolist()
        raise InvalidInput(f"outcome_means must be finite; non-finite at (cohort, arm, q) {bad}")
    return mu[None]


def _validate(
    cohort: Any,
    arm: Any,
    design_shares: Any,
    values: Any,
    components: tuple[str, ...],
    metrics: tuple[MetricSpec, ...],
    plan: Any,
    baseline: Any,
) -> tuple[np.ndarray, ...]:
    shares = np.asarray(design_shares, dtype=np.float64).ravel()
    plan = np.asarray(plan, dtype=np.float64)
    baseline = np.asarray(baseline, dtype=np.float64)
    values = np.asarray(values, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    cohort = np.asarray(cohort).ravel()
    arm = np.asarray(arm).ravel()
    n = cohort.shape[0]
    if n < 2:
        raise InvalidInput(f"policy evaluation needs at least 2 rows, got {n}")
    if arm.shape[0] != n or values.shape[0] != n:
        raise InvalidInput(
            f"cohort, arm and values need one row per unit: got {n}, {arm.shape[0]}, "
            f"{values.shape[0]} rows"
        )
    if values.shape[1] != len(components):
        raise InvalidInput(
            f"values has {values.shape[1]} columns for {len(components)} components {components}"
        )
    missing = sorted({c for m in metrics for c in m.columns} - set(components))
    if missing:
        raise InvalidInput(f"metric columns {missing} are not among the components {components}")
    if not np.all(np.isfinite(values)):
        rows = np.flatnonzero(~np.all(np.isfinite(values), axis=1))[:5].tolist()
        raise InvalidInput(f"metric values must be finite; not in rows {rows}")
    j = shares.shape[0]
    if not np.all(np.isfinite(shares)) or np.any(shares < 0) or abs(shares.sum() - 1) > _SHARE_TOL:
        raise InvalidInput(f"design shares must be >= 0 and sum to 1, got {shares.tolist()}")
    for name, p in (("plan", plan), ("baseline", baseline)):
        if p.ndim != 2 or p.shape[1] != j:
            raise InvalidInput(f"{name} must have shape (cohorts, {j}), got {p.shape}")
        sums = p.sum(axis=1)
        if np.any(p < -_SHARE_TOL) or np.any(np.abs(sums - 1) > _SHARE_TOL):
            bad = np.flatnonzero(np.any(p < -_SHARE_TOL, axis=1) | (np.abs(sums - 1) > _SHARE_TOL))
            raise InvalidInput(
                f"{name} rows must be >= 0 and sum to 1; cohorts {bad[:5].tolist()} "
                f"have sums {sums[bad[:5]].tolist()}"
            )
        # positivity: a policy may only use arms the design could assign
        used = np.flatnonzero((p > 0).any(axis=0) & (shares <= 0))
        if used.size:
            raise InvalidInput(
                f"{name} assigns arms {used.tolist()} whose design share is 0; "
                "they cannot be evaluated from this experiment"
            )
    if plan.shape != baseline.shape:
        raise InvalidInput(f"plan {plan.shape} and baseline {baseline.shape} shapes differ")
    c = plan.shape[0]
    for name, codes, hi in (("cohort", cohort, c), ("arm", arm, j)):
        if not np.issubdtype(codes.dtype, np.integer):
            raise InvalidInput(f"{name} codes must be integers, got dtype {codes.dtype}")
        bad = np.flatnonzero((codes < 0) | (codes >= hi))
        if bad.size:
            raise InvalidInput(
                f"{name} codes must be in 0..{hi - 1}; rows {bad[:5].tolist()} have "
                f"{codes[bad[:5]].tolist()}"
            )
    stray = np.flatnonzero(shares[arm] <= 0)
    if stray.size:
        raise InvalidInput(
            f"rows {stray[:5].tolist()} are in arms whose design share is 0 "
            f"({sorted(set(arm[stray].tolist()))}); their propensity is unknown"
        )
    plan = np.clip(plan, 0.0, None)
    baseline = np.clip(baseline, 0.0, None)
    return cohort.astype(np.int64), arm.astype(np.int64), shares, values, plan, baseline
