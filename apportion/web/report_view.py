"""Reads a plan version's impact report into the rows the page draws. The report's layout belongs to
apportion/optimize/report.py; this module is the one place that knows it, so the page survives a
report that lacks a part (an old version, a pending job) by leaving that part out.

Report layout read here: report["metrics"] = [{metric, role, lift, se, corrected_lift, interval
[lo, hi] around the corrected lift, threshold, unit, confidence, probability_holds,
probability_holds_corrected}], every number in the guardrail's
threshold unit (absolute: the metric's units; relative: per cent of the baseline's value; the
success metric absolute), and report["comparison"] = [{plan, arm (index, absent for the plan),
available, lifts {metric: value}, holds {guardrail: bool}}]. `display` and `scaled_fmt` turn row
units into what the page writes (percentage points for absolute lifts of proportions and ratios)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

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


def _limit_text(g: dict[str, Any]) -> str:
    t = float(g["threshold"])
    return f"{signed(t)}% of baseline" if g.get("unit") == "relative" else f"{signed(t)} (absolute)"


def metric_rows(version: dict[str, Any], metrics: dict[str, dict[str, Any]]) -> list[MetricRow]:
    """The success metric first, then every guardrail in the order declared. A metric the report
    lacks (pending report) comes back with None numbers, so the page can say so."""
    spec = version.get("spec") or {}
    report = version.get("report") or {}
    entries = {m.get("metric"): m for m in report.get("metrics") or [] if isinstance(m, dict)}
    wanted = [(spec.get("success_metric"), None)] + [
        (g["metric"], g) for g in spec.get("guardrails") or []
    ]
    rows = []
    for key, g in wanted:
        if key is None:
            continue
        e = entries.get(key, {})
        decl = metrics.get(key, {})
        interval = e.get("interval") or [None, None]
        rows.append(
            MetricRow(
                metric=key,
                role="guardrail" if g is not None else "success",
                direction=decl.get("direction") or ("higher" if g is None else "lower"),
                kind=decl.get("kind") or "mean",
                estimate=_num(e.get("lift")),
                se=_num(e.get("se")),
                corrected=_num(e.get("corrected_lift")),
                lower=_num(interval[0]),
                upper=_num(interval[1]),
                threshold=_num(e.get("threshold", g["threshold"])) if g else None,
                p_holds=_num(e.get("probability_holds")) if g else None,
                confidence=float(g.get("confidence", 0.95)) if g else None,
                limit_text=_limit_text(g) if g else None,
                unit=(g.get("unit") or "absolute") if g else "absolute",
                p_holds_corrected=_num(e.get("probability_holds_corrected")) if g else None,
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
    report = version.get("report") or {}
    arms = list((version.get("allocation") or {}).get("arms") or [])
    rows: list[ComparisonRow] = []
    for r in report.get("comparison") or []:
        if not isinstance(r, dict):
            continue
        arm = r.get("arm")
        name = arms[arm] if isinstance(arm, int) and 0 <= arm < len(arms) else str(r.get("plan"))
        if arm is None:
            kind = "plan"
        elif str(r.get("plan", "")).startswith("best"):
            kind = "best_safe"
        else:
            kind = "arm"
        holds = r.get("holds")
        safe = all(holds.values()) if isinstance(holds, dict) and r.get("available", True) else None
        lifts = {k: _num(v) for k, v in (r.get("lifts") or {}).items()}
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
