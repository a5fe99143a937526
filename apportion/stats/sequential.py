"""Always-valid confidence sequences for the guardrail watch: plan-exposed members against the
randomised holdout, per metric, safe to look at after every batch.

The boundary is the two-sided normal-mixture boundary of Howard, Ramdas, McAuliffe and Sekhon
(2021, Ann. Statist., "Time-uniform, nonparametric, nonasymptotic confidence sequences"),
|S_t| <= sqrt((V_t + r) log((V_t + r) / (alpha^2 r))), used in the asymptotic form with an
estimated variance of Waudby-Smith, Arbour, Sinha, Kennedy and Ramdas (2024, Ann. Statist.,
"Time-uniform central limit theory and asymptotic confidence sequences"):

    estimate +/- sigma_hat * sqrt( 2 (t rho^2 + 1) / (t^2 rho^2) * log( sqrt(t rho^2 + 1) / alpha ) )

with rho^2 = (2 log(1/alpha) + log(1 + 2 log(1/alpha))) / t*, which makes the boundary tightest
near the expected horizon t* (Waudby-Smith et al. 2024, above). With se = sigma_hat / sqrt(t) the radius is
se * sqrt(2 (t rho^2 + 1) / (t rho^2) * log(sqrt(t rho^2 + 1) / alpha)). The same set is the
acceptance region of the mixture SPRT of Johari, Koomen, Pekelis and Walsh (2022) with mixing
variance tau^2 = rho^2 sigma_hat^2; we compute the boundary form, not the likelihood ratio.

The estimate is the difference plan - holdout of the metric; its standard error is Welch's
(ratio metrics: delta method), i.e. the influence function of an asymptotically linear estimator
over t = n_plan + n_holdout i.i.d. arrivals, which is what the asymptotic CS needs.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike

from apportion.errors import InvalidInput
from apportion.stats.estimates import CellMoments, metric_estimates, pool_cohorts
from apportion.stats.table import Direction, MetricSpec

Status = Literal["holding", "inconclusive", "breached"]

# Layout of the two groups in a CellMoments: the arm axis, holdout first (the control position,
# as elsewhere control is code 0), plan-exposed second. Cohorts stay on the cohort axis.
HOLDOUT, PLAN = 0, 1


@dataclass(frozen=True)
class SequenceInterval:
    """A confidence-sequence interval for plan - holdout at the current look."""

    estimate: float
    lower: float
    upper: float
    n_plan: int
    n_holdout: int
    alpha: float


@dataclass(frozen=True)
class GroupStats:
    """Sufficient statistics of one group for a mean or proportion metric: count, mean and the
    unit-level sample variance (ddof=1)."""

    n: int
    mean: float
    var: float


def _check(alpha: float, horizon: int) -> None:
    if not 0.0 < alpha < 1.0:
        raise InvalidInput(f"alpha must be in (0, 1), got {alpha}")
    if horizon < 1:
        raise InvalidInput(f"horizon must be at least 1 unit, got {horizon}")


def rho_squared(alpha: float, horizon: int) -> float:
    """The mixture precision rho^2 that makes the boundary tightest near `horizon` units
    (Waudby-Smith et al. 2024, above)."""
    _check(alpha, horizon)
    la = np.log(1.0 / alpha)
    return float((2.0 * la + np.log1p(2.0 * la)) / horizon)


def radius_factor(n_total: ArrayLike, alpha: float, horizon: int) -> np.ndarray:
    """Radius / standard error of the CS after `n_total` units (scalar or array); grows like
    sqrt(log log t) relative to the fixed-horizon normal quantile."""
    r2 = rho_squared(alpha, horizon)
    t = np.asarray(n_total, dtype=np.float64)
    trho = t * r2
    with np.errstate(divide="ignore", invalid="ignore"):
        f = np.sqrt(2.0 * (trho + 1.0) / trho * np.log(np.sqrt(trho + 1.0) / alpha))
    return np.where(t > 0, f, np.inf)


def confidence_sequence(
    diff: ArrayLike, se: ArrayLike, n_total: ArrayLike, alpha: float, horizon: int
) -> tuple[Any, Any]:
    """(lower, upper) of the two-sided CS at level 1 - alpha around `diff` with standard error
    `se` after `n_total` units. Scalars or arrays broadcasting together (vectorised over streams);
    a NaN or infinite se gives (-inf, inf)."""
    se = np.asarray(se, dtype=np.float64)
    rad = se * radius_factor(n_total, alpha, horizon)
    rad = np.where(np.isfinite(rad), rad, np.inf)
    lo, hi = np.asarray(diff) - rad, np.asarray(diff) + rad
    if lo.ndim == 0:
        return float(lo), float(hi)
    return lo, hi


def _interval(
    diff: float, se: float, n_plan: int, n_holdout: int, alpha: float, horizon: int
) -> SequenceInterval:
    _check(alpha, horizon)
    if n_plan < 2 or n_holdout < 2 or not np.isfinite(se) or not np.isfinite(diff):
        est = float(diff) if np.isfinite(diff) else float("nan")
        return SequenceInterval(est, -np.inf, np.inf, int(n_plan), int(n_holdout), alpha)
    lo, hi = confidence_sequence(float(diff), float(se), n_plan + n_holdout, alpha, horizon)
    return SequenceInterval(float(diff), lo, hi, int(n_plan), int(n_holdout), alpha)


def interval_from_stats(
    plan: GroupStats, holdout: GroupStats, *, alpha: float, horizon: int
) -> SequenceInterval:
    """CS for the difference of two group means from their sufficient statistics (Welch se)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        se = np.sqrt(plan.var / plan.n + holdout.var / holdout.n)
    return _interval(plan.mean - holdout.mean, se, plan.n, holdout.n, alpha, horizon)


def difference_interval(
    moments: CellMoments,
    metric: MetricSpec,
    *,
    alpha: float,
    horizon: int,
    cohort: int | None = None,
) -> SequenceInterval:
    """CS for plan - holdout of `metric` from component moments laid out with the groups on the
    arm axis (J = 2: HOLDOUT = 0, PLAN = 1), e.g. `cell_moments(cohort, C, group, 2, values, ...)`.
    `cohort=None` pools all cohorts; ratio metrics get the delta-method se of metric_estimates."""
    c, j, _ = moments.shape
    if j != 2:
        raise InvalidInput(f"moments must have 2 groups (holdout, plan) on the arm axis, got {j}")
    if cohort is None:
        moments, cohort = pool_cohorts(moments), 0
    elif not 0 <= cohort < c:
        raise InvalidInput(f"cohort must be in 0..{c - 1}, got {cohort}")
    est = metric_estimates(moments, (metric,))
    n_hold, n_plan = (int(x) for x in moments.n[cohort])
    return _interval(
        est.effect[cohort, PLAN, 0], est.effect_se[cohort, PLAN, 0], n_plan, n_hold, alpha, horizon
    )


def absolute_threshold(
    threshold: float, unit: Literal["absolute", "relative"], baseline: float
) -> float:
    """A guardrail threshold in the metric's own units: `relative` is per cent of `baseline`
    (the holdout's value), `absolute` passes through."""
    if unit == "relative":
        return float(threshold) * abs(float(baseline)) / 100.0
    if unit == "absolute":
        return float(threshold)
    raise InvalidInput(f"unit must be 'absolute' or 'relative', got {unit!r}")


def guardrail_status(
    interval: SequenceInterval, threshold_abs: float, direction: Direction
) -> Status:
    """`breached` when the whole interval lies on the harmful side of the threshold, `holding`
    when it lies wholly on the safe side, else `inconclusive`.

    The threshold is the allowed change signed in the harmful direction (CONTRACTS.md): >= 0 for a
    lower-is-better metric, <= 0 for a higher-is-better one."""
    if direction == "lower":
        if threshold_abs < 0:
            raise InvalidInput(
                f"a lower-is-better guardrail needs threshold >= 0, got {threshold_abs}"
            )
        if interval.lower > threshold_abs:
            return "breached"
        if interval.upper < threshold_abs:
            return "holding"
        return "inconclusive"
    if direction == "higher":
        if threshold_abs > 0:
            raise InvalidInput(
                f"a higher-is-better guardrail needs threshold <= 0, got {threshold_abs}"
            )
        if interval.upper < threshold_abs:
            return "breached"
        if interval.lower > threshold_abs:
            return "holding"
        return "inconclusive"
    raise InvalidInput(f"direction must be 'higher' or 'lower', got {direction!r}")
