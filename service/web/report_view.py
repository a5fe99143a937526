"""Reads a plan version's impact report into the rows the page draws. The report's layout belongs to
service/optimize/report.py; this module is the one place that knows it, so the page survives a
report that lacks a part (an old version, a pending job) by leaving that part out.

MetricRow values are in the metric's own units (absolute lift against the baseline); `display`
turns them into what the page writes (percentage points for proportions and ratios)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from service.web.charts import Fmt, signed


@dataclass(frozen=True)
class MetricRow:
    metric: str
    role: str  # "success" | "guardrail"
    direction: str  # "higher" | "lower": which way is better
    kind: str  # mean | proportion | ratio
    estimate: float | None  # projected lift vs baseline
    se: float | None
    corrected: float | None  # after the optimizer's-curse correction
    lower: float | None
    upper: float | None
    threshold: float | None  # absolute limit on the lift (guardrails)
    p_holds: float | None  # probability the guardrail holds
    confidence: float | None  # the probability it must hold with
    limit_text: str | None  # the guardrail as declared, e.g. "+5% of baseline"

    @property
    def harmful(self) -> str | None:
        """Which side of the limit harms: a lower-is-better metric is harmed by rising."""
        return "above" if self.direction == "lower" else "below"

    @property
    def holds(self) -> bool | None:
        """Whether the interval stays on the safe side of the limit (None without both)."""
        if self.threshold is None or self.lower is None or self.upper is None:
            return None
        return (
            self.upper <= self.threshold
            if self.direction == "lower"
            else self.lower >= self.threshold
        )


def _num(x: Any) -> float | None:
    if isinstance(x, bool) or x is None:
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _first(d: dict[str, Any], *keys: str) -> Any:
    for k in keys:
        if k in d and d[k] is not None:
            return d[k]
    return None


def _entries(report: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """metric key -> its report entry, whether the report lists them or keys them."""
    raw = _first(report, "metrics", "lifts", "impact")
    if isinstance(raw, dict):
        return {k: v for k, v in raw.items() if isinstance(v, dict)}
    if isinstance(raw, list):
        return {e.get("metric") or e.get("key"): e for e in raw if isinstance(e, dict)}
    return {}


def _interval(e: dict[str, Any]) -> tuple[float | None, float | None]:
    iv = _first(e, "interval", "ci")
    if isinstance(iv, dict):
        return _num(_first(iv, "lower", "lo", "low")), _num(_first(iv, "upper", "hi", "high"))
    if isinstance(iv, list | tuple) and len(iv) == 2:
        return _num(iv[0]), _num(iv[1])
    return _num(_first(e, "lower", "interval_lower", "ci_lower")), _num(
        _first(e, "upper", "interval_upper", "ci_upper")
    )


def _limit_text(g: dict[str, Any]) -> str:
    t = float(g["threshold"])
    if g.get("unit") == "relative":
        return f"{signed(t)}% of baseline"
    return f"{signed(t)} (absolute)"


def metric_rows(version: dict[str, Any], metrics: dict[str, dict[str, Any]]) -> list[MetricRow]:
    """The success metric first, then every guardrail in the order declared."""
    spec = version.get("spec") or {}
    report = version.get("report") or {}
    entries = _entries(report)
    solved = {
        g.get("metric") or g.get("guardrail"): g
        for g in ((report.get("solution") or {}).get("guardrails") or [])
        if isinstance(g, dict)
    }
    wanted = [(spec.get("success_metric"), None)] + [
        (g["metric"], g) for g in spec.get("guardrails") or []
    ]
    rows = []
    for key, g in wanted:
        if key is None:
            continue
        e = entries.get(key, {})
        decl = metrics.get(key, {})
        lo, hi = _interval(e)
        threshold = _num(_first(e, "threshold_absolute", "limit", "threshold"))
        if threshold is None and g is not None and g.get("unit", "absolute") == "absolute":
            threshold = float(g["threshold"])
        estimate = _num(_first(e, "projected", "lift", "estimate", "projected_lift"))
        if estimate is None and g is None:
            estimate = _num((report.get("solution") or {}).get("objective"))
        if (
            estimate is None
            and g is not None
            and key in solved
            and g.get("unit", "absolute") == "absolute"
        ):
            estimate = _num(solved[key].get("lift"))
        rows.append(
            MetricRow(
                metric=key,
                role="guardrail" if g is not None else "success",
                direction=decl.get("direction")
                or e.get("direction")
                or ("higher" if g is None else "lower"),
                kind=decl.get("kind") or e.get("kind") or "mean",
                estimate=estimate,
                se=_num(_first(e, "se", "projected_se", "lift_se")),
                corrected=_num(_first(e, "corrected", "corrected_lift", "lift_corrected")),
                lower=lo,
                upper=hi,
                threshold=threshold if g is not None else None,
                p_holds=_num(_first(e, "p_holds", "prob_holds", "probability_holds", "probability"))
                if g
                else None,
                confidence=float(g.get("confidence", 0.95)) if g else None,
                limit_text=_limit_text(g) if g else None,
            )
        )
    return rows


@dataclass(frozen=True)
class ComparisonRow:
    label: str
    kind: str  # "arm" | "best_safe" | "plan" | "baseline"
    lifts: dict[str, float | None]
    safe: bool | None  # every guardrail holds (None when unknown)


def comparison_rows(version: dict[str, Any]) -> list[ComparisonRow]:
    """Every single arm for everyone, the best safe arm, and this plan, in the report's order."""
    report = version.get("report") or {}
    raw = _first(report, "comparison", "comparisons", "single_arm")
    rows: list[ComparisonRow] = []
    if isinstance(raw, dict):
        raw = [{"label": k, **v} for k, v in raw.items() if isinstance(v, dict)]
    for r in raw or []:
        if not isinstance(r, dict):
            continue
        lifts_raw = _first(r, "lifts", "metrics", "values") or {}
        if isinstance(lifts_raw, list):
            lifts_raw = {
                e.get("metric"): _first(e, "lift", "value", "projected")
                for e in lifts_raw
                if isinstance(e, dict)
            }
        lifts = {k: _num(v.get("lift") if isinstance(v, dict) else v) for k, v in lifts_raw.items()}
        safe = _first(r, "safe", "feasible", "guardrails_hold", "holds")
        rows.append(
            ComparisonRow(
                label=str(_first(r, "label", "name", "arm") or "?"),
                kind=str(_first(r, "kind", "type") or "arm"),
                lifts=lifts,
                safe=bool(safe) if isinstance(safe, bool) else None,
            )
        )
    return rows


def display(row_kind: str) -> tuple[Fmt, str]:
    """A formatter for lifts of a metric of this kind, and the unit it writes: proportions and ratios
    in percentage points (0.01 -> '+1 pp'), means in their own units."""
    if row_kind in ("proportion", "ratio"):
        return (lambda x: f"{signed(x * 100)} pp"), "percentage points"
    return (lambda x: signed(x)), "metric units"
