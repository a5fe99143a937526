"""The allocation problem as the optimizers see it: cohort shares, per-cell component moments,
metric definitions, the success metric, guardrails and the baseline plan.

Shapes: C cohorts, J arms (arm 0 is the control), Q metric components. An allocation x is (C, J)
with rows on the simplex. Guardrail thresholds follow the shared convention (CONTRACTS.md): the
allowed change against the baseline, signed in the harmful direction.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from apportion.errors import InvalidInput
from apportion.optimize.values import metric_values
from apportion.stats.estimates import CellMoments
from apportion.stats.table import MetricSpec

ROW_TOL = 1e-6  # rows of an allocation and the shares must sum to 1 within this


@dataclass(frozen=True)
class Guardrail:
    metric: str
    threshold: float  # signed allowed change, see CONTRACTS.md
    unit: Literal["absolute", "relative"] = "absolute"
    confidence: float = 0.95


@dataclass(frozen=True)
class AllocationProblem:
    shares: np.ndarray  # (C,) cohort shares, sums to 1
    moments: CellMoments  # (C, J, Q) per cohort/arm component moments
    metrics: tuple[MetricSpec, ...]
    success: str  # success metric key; its direction says maximize or minimize
    guardrails: tuple[Guardrail, ...]
    baseline: np.ndarray  # (C, J) baseline allocation, rows sum to 1

    @property
    def n_cohorts(self) -> int:
        return int(self.moments.mean.shape[0])

    @property
    def n_arms(self) -> int:
        return int(self.moments.mean.shape[1])

    def metric(self, key: str) -> MetricSpec:
        for m in self.metrics:
            if m.key == key:
                return m
        raise InvalidInput(f"unknown metric {key!r}", errors=[{"field": "metric", "value": key}])


def available_cells(moments: CellMoments) -> np.ndarray:
    """(C, J) bool: cells with at least two units and finite moments; others cannot be chosen."""
    mean_ok = np.isfinite(moments.mean).all(axis=-1)
    cov_ok = np.isfinite(moments.cov).all(axis=(-1, -2))
    out: np.ndarray = (moments.n >= 2) & mean_ok & cov_ok
    return out


def control_allocation(n_cohorts: int, n_arms: int) -> np.ndarray:
    x = np.zeros((n_cohorts, n_arms))
    x[:, 0] = 1.0
    return x


def _bad(field: str, detail: str, **values: object) -> InvalidInput:
    return InvalidInput(detail, errors=[{"field": field, **values}])


def _check_metrics(
    moments: CellMoments,
    metrics: tuple[MetricSpec, ...],
    success: str,
    guardrails: tuple[Guardrail, ...],
) -> None:
    comps = set(moments.components)
    for m in metrics:
        missing = [c for c in m.columns if c not in comps]
        if missing:
            raise _bad(
                "metrics",
                f"metric {m.key!r} needs components {missing} absent from the moments "
                f"(have {list(moments.components)})",
                metric=m.key,
            )
    check_objective(metrics, success, guardrails)


def check_objective(
    metrics: tuple[MetricSpec, ...], success: str, guardrails: tuple[Guardrail, ...]
) -> None:
    """InvalidInput unless the success metric and every guardrail name a declared metric once,
    with a unit, confidence and threshold sign that fit it (needs no data: callers check a
    request with it before they store anything)."""
    keys = [m.key for m in metrics]
    if success not in keys:
        raise _bad("success", f"unknown success metric {success!r}; known: {keys}", value=success)
    seen: set[str] = set()
    for i, g in enumerate(guardrails):
        f = f"guardrails[{i}]"
        if g.metric not in keys:
            raise _bad(
                f"{f}.metric",
                f"unknown guardrail metric {g.metric!r}; known: {keys}",
                value=g.metric,
            )
        if g.metric in seen:
            raise _bad(f"{f}.metric", f"guardrail metric {g.metric!r} listed twice", value=g.metric)
        seen.add(g.metric)
        if g.unit not in ("absolute", "relative"):
            raise _bad(
                f"{f}.unit", f"unit must be absolute or relative, got {g.unit!r}", value=g.unit
            )
        if not (0.5 < float(g.confidence) < 1.0):
            raise _bad(
                f"{f}.confidence",
                f"confidence of guardrail {g.metric!r} must lie in (0.5, 1), got {g.confidence}",
                value=g.confidence,
            )
        t = float(g.threshold)
        if not np.isfinite(t):
            raise _bad(f"{f}.threshold", f"threshold of {g.metric!r} is not finite", value=t)
        direction = next(m.direction for m in metrics if m.key == g.metric)
        if direction == "lower" and t < 0:
            raise _bad(
                f"{f}.threshold",
                f"{g.metric!r} is lower-is-better, so its threshold (allowed rise) must be >= 0, got {t}",
                value=t,
            )
        if direction == "higher" and t > 0:
            raise _bad(
                f"{f}.threshold",
                f"{g.metric!r} is higher-is-better, so its threshold (allowed drop) must be <= 0, got {t}",
                value=t,
            )


def _check_allocation(name: str, x: np.ndarray, shape: tuple[int, int], avail: np.ndarray) -> None:
    x = np.asarray(x, dtype=np.float64)
    if x.shape != shape:
        raise _bad(name, f"{name} must have shape {shape}, got {x.shape}")
    if not np.isfinite(x).all() or (x < -ROW_TOL).any():
        raise _bad(name, f"{name} must be finite and non-negative")
    rows = x.sum(axis=1)
    bad = np.flatnonzero(np.abs(rows - 1.0) > ROW_TOL)
    if bad.size:
        raise _bad(
            name,
            f"{name} rows must sum to 1; cohorts {bad[:5].tolist()} sum to {rows[bad[:5]].round(6).tolist()}",
            cohorts=bad[:5].tolist(),
        )
    used = (x > ROW_TOL) & ~avail
    if used.any():
        c, j = np.argwhere(used)[0]
        raise _bad(
            name,
            f"{name} puts traffic on cohort {c} arm {j}, a cell without data (n < 2)",
            cohort=int(c),
            arm=int(j),
        )


def _check_shares(shares: np.ndarray, n_cohorts: int) -> None:
    shares = np.asarray(shares, dtype=np.float64)
    if shares.shape != (n_cohorts,):
        raise _bad("shares", f"shares must have shape ({n_cohorts},), got {shares.shape}")
    if not np.isfinite(shares).all() or (shares < 0).any():
        raise _bad("shares", "shares must be finite and non-negative")
    if abs(shares.sum() - 1.0) > ROW_TOL:
        raise _bad(
            "shares", f"shares must sum to 1, got {shares.sum():.8g}", value=float(shares.sum())
        )


def validate_problem(problem: AllocationProblem) -> None:
    """Raise InvalidInput naming the offending field; return None when the problem is well posed."""
    mean = np.asarray(problem.moments.mean)
    if mean.ndim != 3 or mean.shape[0] < 1 or mean.shape[1] < 1:
        raise _bad("moments", f"moments.mean must be (C, J, Q), got {mean.shape}")
    c, j, _ = mean.shape
    _check_shares(problem.shares, c)
    _check_metrics(problem.moments, problem.metrics, problem.success, problem.guardrails)
    avail = available_cells(problem.moments)
    _check_allocation("baseline", problem.baseline, (c, j), avail)
    x = np.asarray(problem.baseline, dtype=np.float64)
    pos = {name: i for i, name in enumerate(problem.moments.components)}
    mu = np.where(avail[..., None], mean, 0.0)
    p = np.asarray(problem.shares, dtype=np.float64)
    for m in problem.metrics:
        if m.kind == "ratio":
            den = float(np.einsum("c,cj,cj->", p, x, mu[..., pos[m.ratio_columns[1]]]))
            if not den > 0:
                raise _bad(
                    "metrics",
                    f"ratio metric {m.key!r} has a non-positive denominator mean {den:.6g} under the baseline",
                    metric=m.key,
                )


def _single_arm_lifts(
    shares: np.ndarray, moments: CellMoments, metrics: tuple[MetricSpec, ...], arm: int
) -> dict[str, float] | None:
    """Point-estimate lifts of `arm`-for-everyone against all-control, or None if a cell is empty."""
    avail = available_cells(moments)
    c, j, _ = moments.mean.shape
    if not avail[:, arm].all() or not avail[:, 0].all():
        return None
    x = np.zeros((c, j))
    x[:, arm] = 1.0
    base = control_allocation(c, j)
    mv = metric_values(x, shares, moments.mean, metrics, moments.components)
    mb = metric_values(base, shares, moments.mean, metrics, moments.components)
    return {k: mv[k] - mb[k] for k in mv} | {f"__base__{k}": mb[k] for k in mb}


def best_single_arm(
    shares: np.ndarray,
    moments: CellMoments,
    metrics: tuple[MetricSpec, ...],
    success: str,
    guardrails: tuple[Guardrail, ...],
) -> int:
    """The arm that, given to everyone, has the best success lift among the arms meeting every
    guardrail against all-control (point estimates). Control (lift 0) always qualifies."""
    spec = {m.key: m for m in metrics}
    sign = 1.0 if spec[success].direction == "higher" else -1.0
    best, best_val = 0, 0.0
    for arm in range(1, moments.mean.shape[1]):
        lifts = _single_arm_lifts(shares, moments, metrics, arm)
        if lifts is None:
            continue
        ok = True
        for g in guardrails:
            t = g.threshold
            if g.unit == "relative":
                t = t / 100.0 * abs(lifts[f"__base__{g.metric}"])
            harm = 1.0 if spec[g.metric].direction == "lower" else -1.0
            if harm * lifts[g.metric] > harm * t + 1e-12:
                ok = False
                break
        if ok and sign * lifts[success] > best_val:
            best, best_val = arm, sign * lifts[success]
    return best


def baseline_allocation(
    kind: Literal["control", "best_arm", "live"],
    *,
    shares: np.ndarray,
    moments: CellMoments,
    metrics: tuple[MetricSpec, ...],
    success: str,
    guardrails: tuple[Guardrail, ...] = (),
    live: np.ndarray | None = None,
) -> np.ndarray:
    """(C, J) baseline: all-control; the best single arm that meets the guardrails (point
    estimates, against all-control); or the live allocation as given."""
    c, j, _ = moments.mean.shape
    if kind == "control":
        return control_allocation(c, j)
    if kind == "best_arm":
        arm = best_single_arm(shares, moments, metrics, success, guardrails)
        x = np.zeros((c, j))
        x[:, arm] = 1.0
        return x
    if kind == "live":
        if live is None:
            raise _bad("baseline", "baseline 'live' needs the live allocation")
        return np.asarray(live, dtype=np.float64).copy()
    raise _bad("baseline", f"baseline must be control, best_arm or live, got {kind!r}", value=kind)


def build_problem(
    *,
    shares: np.ndarray,
    moments: CellMoments,
    metrics: tuple[MetricSpec, ...],
    success: str,
    guardrails: tuple[Guardrail, ...],
    baseline: Literal["control", "best_arm", "live"] = "control",
    live: np.ndarray | None = None,
) -> AllocationProblem:
    """Convenience constructor: pick the baseline, build and validate the problem."""
    shares = np.asarray(shares, dtype=np.float64)
    _check_shares(shares, moments.mean.shape[0])
    _check_metrics(moments, tuple(metrics), success, tuple(guardrails))
    b = baseline_allocation(
        baseline,
        shares=shares,
        moments=moments,
        metrics=tuple(metrics),
        success=success,
        guardrails=tuple(guardrails),
        live=live,
    )
    problem = AllocationProblem(shares, moments, tuple(metrics), success, tuple(guardrails), b)
    validate_problem(problem)
    return problem
