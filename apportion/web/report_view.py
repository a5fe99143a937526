"""Reads a plan version's impact report into the rows the page draws. The report is read through
its answer model (apportion.schemas.plans.ImpactReport, the one the JSON API documents), so the
page and the API agree on its layout; a part that is absent or not in that shape (an old
version, a pending job) is left out, and the rest still shows.

What is read: `metrics` (ReportMetric: lift, se, corrected_lift, interval [lo, hi] around the
corrected lift, threshold, unit, confidence, probability_holds, probability_holds_corrected), every
number in the guardrail's threshold unit (absolute: the metric's units; relative: per cent of the
baseline's value; the success metric absolute), and `comparison` (ReportComparisonRow: plan, arm
index (absent for the plan), available, lifts {metric: value}, holds {guardrail: bool}).
`display` and `scaled_fmt` turn row units into what the page writes (percentage points for
absolute lifts of proportions and ratios)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from apportion.schemas.plans import ImpactReport, ReportComparisonRow, ReportMetric
from apportion.web.charts import Fmt, signed

PROB_TOL = 1e-3  # probability shortfall treated as solver tolerance (see MetricRow.meets)


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
    # the unit of every lift in this row: "absolute" or "relative" (per cent of baseline)
    unit: str = "absolute"
    p_holds_corrected: float | None = None  # the same probability around the corrected lift

    @property
    def harmful(self) -> str | None:
        """Which side of the limit harms: a lower-is-better metric is harmed by rising."""
        return "above" if self.direction == "lower" else "below"

    @property
    def meets(self) -> bool | None:
        """Whether the probability it holds reaches the required confidence. A binding chance
        guardrail sits at its confidence only up to the solver's cut tolerance, so a shortfall
        below PROB_TOL counts as meeting it (the page then says "at the limit")."""
        if self.p_holds is None or self.confidence is None:
            return None
        return self.p_holds >= self.confidence - PROB_TOL

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


def _part(version: dict[str, Any], key: str) -> list[Any]:
    """The raw list `key` of the version's report ([] when the report or the part is absent)."""
    raw = version.get("report")
    if isinstance(raw, ImpactReport):
        raw = raw.model_dump()
    part = raw.get(key) if isinstance(raw, dict) else None
    return part if isinstance(part, list) else []


def report_metrics(version: dict[str, Any]) -> list[ReportMetric]:
    """The report's metric rows through their answer model (ImpactReport.metrics); none when a
    row is not in that shape (pydantic's ValidationError is a ValueError), so the rest shows."""
    try:
        return [ReportMetric.model_validate(m) for m in _part(version, "metrics")]
    except ValueError:
        return []


def report_comparison(version: dict[str, Any]) -> list[ReportComparisonRow]:
    """The report's comparison rows through their answer model (ImpactReport.comparison)."""
    try:
        return [ReportComparisonRow.model_validate(r) for r in _part(version, "comparison")]
    except ValueError:
        return []


def _limit_text(g: dict[str, Any]) -> str:
    t = float(g["threshold"])
    return f"{signed(t)}% of baseline" if g.get("unit") == "relative" else f"{signed(t)} (absolute)"


def metric_rows(version: dict[str, Any], metrics: dict[str, dict[str, Any]]) -> list[MetricRow]:
    """The success metric first, then every guardrail in the order declared. A metric the report
    lacks (pending report) comes back with None numbers, so the page can say so."""
    spec = version.get("spec") or {}
    entries = {m.metric: m for m in report_metrics(version)}
    wanted = [(spec.get("success_metric"), None)] + [
        (g["metric"], g) for g in spec.get("guardrails") or []
    ]
    rows = []
    for key, g in wanted:
        if key is None:
            continue
        e = entries.get(key)
        decl = metrics.get(key, {})
        interval = (e.interval if e is not None else None) or [None, None]
        # a report row's own threshold when it states one (even as null), else the declared one
        threshold = e.threshold if e is not None and "threshold" in e.model_fields_set else None
        if g is not None and (e is None or "threshold" not in e.model_fields_set):
            threshold = g["threshold"]
        rows.append(
            MetricRow(
                metric=key,
                role="guardrail" if g is not None else "success",
                direction=decl.get("direction") or ("higher" if g is None else "lower"),
                kind=decl.get("kind") or "mean",
                estimate=_num(e.lift) if e else None,
                se=_num(e.se) if e else None,
                corrected=_num(e.corrected_lift) if e else None,
                lower=_num(interval[0]),
                upper=_num(interval[1]),
                threshold=_num(threshold) if g else None,
                p_holds=_num(e.probability_holds) if g and e else None,
                confidence=float(g.get("confidence", 0.95)) if g else None,
                limit_text=_limit_text(g) if g else None,
                unit=(g.get("unit") or "absolute") if g else "absolute",
                p_holds_corrected=_num(e.probability_holds_corrected) if g and e else None,
            )
        )
    return rows


@dataclass(frozen=True)
class ComparisonRow:
    label: str
    kind: str  # "arm" | "best_safe" | "plan"
    lifts: dict[str, float | None]  # in each metric's row unit (see MetricRow.unit)
    safe: bool | None  # every guardrail holds on point estimates (None: arm not available)


def comparison_rows(version: dict[str, Any]) -> list[ComparisonRow]:
    """Every single arm for everyone, the best single arm meeting the guardrails, and this plan,
    in the report's order; arms are named by the allocation's arm keys."""
    arms = list((version.get("allocation") or {}).get("arms") or [])
    rows: list[ComparisonRow] = []
    for r in report_comparison(version):
        arm = r.arm
        name = arms[arm] if arm is not None and 0 <= arm < len(arms) else r.plan
        if arm is None:
            kind = "plan"
        elif r.plan.startswith("best"):
            kind = "best_safe"
        else:
            kind = "arm"
        safe = all(r.holds.values()) if r.holds is not None and r.available else None
        lifts = {k: _num(v) for k, v in (r.lifts or {}).items()}
        rows.append(ComparisonRow(label=name, kind=kind, lifts=lifts, safe=safe))
    return rows


def scale(kind: str, unit: str = "absolute") -> float:
    """Factor from a lift in its row unit to what the page writes: absolute lifts of proportions
    and ratios become percentage points (x 100); relative lifts are already per cent."""
    return 100.0 if unit == "absolute" and kind in ("proportion", "ratio") else 1.0


def scaled_fmt(kind: str, unit: str = "absolute") -> Fmt:
    """Writes a value already multiplied by `scale(kind, unit)`."""
    if unit == "relative":
        return lambda x: f"{signed(x)}%"
    if kind in ("proportion", "ratio"):
        return lambda x: f"{signed(x)} pp"
    return lambda x: signed(x)


def display(kind: str, unit: str = "absolute") -> tuple[Fmt, str]:
    """A formatter for raw lifts (row units) of a metric of this kind and the unit it writes."""
    k, f = scale(kind, unit), scaled_fmt(kind, unit)
    words = (
        "per cent of the baseline's value"
        if unit == "relative"
        else ("percentage points" if k == 100.0 else "metric units")
    )
    return (lambda x: f(x * k)), words
