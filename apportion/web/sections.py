"""The data each section of a version's review page shows, worked out from the review payload
(apportion.usecases.review.review_page) for the template version.html: labels, numbers written
for reading, and the charts as markupsafe.Markup. No markup here beyond the charts; the template
writes and escapes everything else."""

from __future__ import annotations

import math
from typing import Any

from apportion.web import charts
from apportion.web.report_view import (
    PROB_TOL,
    MetricRow,
    comparison_rows,
    display,
    scale,
    scaled_fmt,
)

Context = dict[str, Any]

ROLE_RANK = {"reader": 0, "analyst": 1, "approver": 2, "admin": 3}
ACTION_TEXT = {
    "plan.draft": "drafted",
    "plan.approve": "approved",
    "plan.reject": "rejected",
    "plan.activate": "made live",
    "plan.rollback": "rolled back",
    "plan.report": "report attached",
    "plan.held_out": "held-out evaluation attached",
}

HELD_OUT_VERDICT = {
    "verified": "every guardrail holds on the held-out folds",
    "unverified": "no guardrail is broken on the held-out folds, but not every one is shown to hold",
    "refused": "a guardrail is broken on the held-out folds",
}

HELD_OUT_WAITING = {
    "pending": "Running: the model and optimizer are re-run without each fold. "
    "Reload the page when the job is done.",
    "off": "Not computed on this server.",
}


def pct(x: float | None, digits: int = 0) -> str:
    return "n/a" if x is None or not math.isfinite(x) else charts.pct(x, digits)


def count(n: object) -> str:
    return f"{n:,}" if isinstance(n, int) else str(n)


def when(s: object) -> str:
    """'2026-03-01T12:00:03.123456+00:00' -> '2026-03-01 12:00 UTC'."""
    t = str(s or "")
    return f"{t[:10]} {t[11:16]} UTC" if len(t) >= 16 and t[10] in "T " else t


STATUS_TEXT = {
    "draft": "Draft",
    "approved": "Approved",
    "rejected": "Rejected",
    "active": "Live",
    "superseded": "Superseded",
}


def status(s: str) -> str:
    return STATUS_TEXT.get(s, s)


def not_personalized(excluded: list[dict[str, Any]]) -> str | None:
    """'age_band (reason); region (reason)': the experiment's features declared not for
    personalization, which no cohort model splits on; None when there are none."""
    if not excluded:
        return None
    return "; ".join(
        f"{f['key']} ({f['reason']})" if f.get("reason") else str(f["key"]) for f in excluded
    )


def summary(
    v: dict[str, Any],
    plan: dict[str, Any],
    rows: list[MetricRow],
    excluded: list[dict[str, Any]] | None = None,
) -> Context:
    spec = v.get("spec") or {}
    live = plan.get("live_version")
    holdout = spec.get("holdout") or {}
    facts: list[tuple[str, object]] = [
        ("Live version", f"version {live}" if live else "none"),
        ("Drafted by", f"{v.get('author')} on {when(v.get('created_at'))}"),
        ("Success metric", spec.get("success_metric")),
        ("Method", f"{spec.get('method')} \u00b7 {spec.get('allocation')} allocation"),
        ("Baseline", spec.get("baseline")),
        ("Holdout", f"{pct(holdout.get('share'), 1)} on {holdout.get('arm')}"),
        ("Cohort model", f"model {v.get('model_id')} on experiment {spec.get('experiment')}"),
    ]
    unused = not_personalized(excluded or [])
    if unused:
        facts.append(("Not used for personalization", unused))
    decided = None
    if v.get("decided_by"):
        decided = (
            f"{v['decided_by']} on {when(v.get('decided_at'))}: "
            f"\u201c{v.get('decision_reason') or ''}\u201d"
        )
    guard = [r for r in rows if r.role == "guardrail"]
    verdict = None
    if guard and any(r.meets is not None for r in guard):
        verdict = {"held": sum(1 for r in guard if r.meets), "total": len(guard)}
    comparison = spec.get("comparison")
    return {
        "facts": facts,
        "comparison": _comparison_link(comparison) if isinstance(comparison, dict) else None,
        "decided": decided,
        "verdict": verdict,
        "notes": spec.get("notes") or None,
        "pending": (v.get("report") or {}).get("status") == "pending",
    }


def _comparison_link(c: dict[str, Any]) -> Context:
    """Where the draft's method came from: the comparison's address (the JSON API; the CLI's
    `comparison show` prints it) and how the method fared there."""
    if c.get("follows_recommendation"):
        verdict = "the recommended candidate"
    else:
        verdict = f"not the recommended candidate ({c.get('recommended') or 'none'})"
    return {
        "number": c.get("number"),
        "candidate": c.get("candidate"),
        "rank": f"ranked {c.get('rank')}" if c.get("rank") is not None else "unranked",
        "status": c.get("status"),
        "verdict": verdict,
        "href": c.get("href"),
    }


def _scale(x: float | None, kind: str, unit: str = "absolute") -> float | None:
    return None if x is None else x * scale(kind, unit)


def metric_block(r: MetricRow) -> Context:
    fmt, unit = display(r.kind, r.unit)
    block: Context = {
        "metric": r.metric,
        "role": r.role,
        "kind": r.kind,
        "better": "higher is better" if r.direction == "higher" else "lower is better",
        "chart": None,
    }
    if r.estimate is None or r.lower is None or r.upper is None:
        return block
    uid = f"{r.role[0]}-{''.join(ch if ch.isalnum() else '_' for ch in r.metric)}"
    block["chart"] = charts.interval_chart(
        uid=uid,
        estimate=r.estimate * scale(r.kind, r.unit),
        lower=r.lower * scale(r.kind, r.unit),
        upper=r.upper * scale(r.kind, r.unit),
        corrected=_scale(r.corrected, r.kind, r.unit),
        threshold=_scale(r.threshold, r.kind, r.unit),
        harmful=r.harmful if r.role == "guardrail" else None,
        fmt=scaled_fmt(r.kind, r.unit),
    )
    cells = [
        ("Projected lift", fmt(r.estimate)),
        ("Standard error", fmt(r.se).lstrip("+") if r.se is not None else "n/a"),
        ("Corrected lift", fmt(r.corrected) if r.corrected is not None else "n/a"),
        ("Interval", f"{fmt(r.lower)} to {fmt(r.upper)}"),
    ]
    block["prob"] = None
    if r.role == "guardrail":
        cells.append(("Limit", fmt(r.threshold) if r.threshold is not None else "n/a"))
        if r.p_holds is not None:
            ok = bool(r.meets)
            mark = "\u2713 meets" if ok else "\u2717 below"
            if ok and r.confidence is not None and abs(r.p_holds - r.confidence) < PROB_TOL:
                mark = "\u2713 at the limit of"
            block["prob"] = {
                "ok": ok,
                "holds": pct(r.p_holds, 1),
                "mark": mark,
                "required": pct(r.confidence, 0),
                "corrected": None if r.p_holds_corrected is None else pct(r.p_holds_corrected, 1),
            }
    block["cells"] = cells
    block["unit"] = unit
    return block


def cohorts(v: dict[str, Any]) -> Context:
    alloc = v.get("allocation") or {}
    arms = list(alloc.get("arms") or [])
    members = {c["id"]: c.get("members") for c in (v.get("diff") or {}).get("cohorts") or []}
    rows = []
    for c in alloc.get("cohorts") or []:
        shares = [(a, float(c["arms"].get(a, 0.0))) for a in arms]
        share = float(c["share"])
        rows.append(
            {
                "id": c["id"],
                "rule": c["rule"],
                "size_bar": charts.size_bar(share=share),
                "share": pct(share, 1),
                "members": members.get(c["id"]),
                "share_bar": charts.share_bar(uid="c" + str(c["id"]), segments=shares),
                "mix": " \u00b7 ".join(f"{a} {charts.pct(s)}" for a, s in shares if s > 0),
            }
        )
    arms_note = f"Arms: {', '.join(arms)}" + (f" (control: {arms[0]})" if arms else "")
    return {"rows": rows, "arms_note": arms_note}


def comparison(v: dict[str, Any], rows: list[MetricRow]) -> Context | None:
    comp = comparison_rows(v)
    if not comp:
        return None
    fmts = {r.metric: display(r.kind, r.unit)[0] for r in rows}
    body = []
    for c in comp:
        label = {"best_safe": "best safe arm: ", "plan": "this plan"}.get(c.kind, "")
        body.append(
            {
                "kind": c.kind,
                "name": label if c.kind == "plan" else f"{label}{c.label}",
                "cells": [
                    fmts[r.metric](x) if (x := c.lifts.get(r.metric)) is not None else "n/a"
                    for r in rows
                ],
                "safe": {True: "\u2713 yes", False: "\u2717 no", None: "n/a"}[c.safe],
            }
        )
    heads = [(r.metric, " (% of baseline)" if r.unit == "relative" else "") for r in rows]
    return {"heads": heads, "rows": body}


def _sample_note(d: dict[str, Any]) -> str | None:
    """Says so when a figure was computed on a uniform sample of a large readout's rows."""
    if not d.get("sampled"):
        return None
    used = d.get("rows_used", d.get("members"))
    return (
        f"; a uniform sample of {count(used)} of the readout's {count(d.get('readout_rows'))} rows"
    )


def held_out(v: dict[str, Any], rows: list[MetricRow]) -> Context | None:
    """The cross-fitted held-out evaluation (its own job, so it may still be running)."""
    ho = (v.get("report") or {}).get("held_out")
    if not isinstance(ho, dict):
        return None
    state = ho.get("status")
    if state != "complete":
        why = HELD_OUT_WAITING.get(str(state), f"Not available: {ho.get('error', state)}")
        return {"complete": False, "why": why}
    kinds = {r.metric: r.kind for r in rows}
    body = []
    for key, entry in (ho.get("metrics") or {}).items():
        fmt = display(kinds.get(key, "mean"))[0]
        allowed = entry.get("threshold_absolute")
        prob = entry.get("probability_holds")
        body.append(
            {
                "metric": key,
                "lift": fmt(entry["lift"]),
                "se": fmt(entry["se"]).lstrip("+"),
                "allowed": None if allowed is None else fmt(allowed),
                "holds": None if prob is None else pct(prob, 1),
            }
        )
    verdict = ho.get("verdict")
    reading = ho.get("reading") or {}
    return {
        "complete": True,
        "measures": reading.get("measures"),
        "warning": reading.get("warning"),
        "folds": ho.get("folds"),
        "sample": _sample_note(ho),
        "verdict": HELD_OUT_VERDICT.get(str(verdict), str(verdict)),
        "rows": body,
    }


def diff(v: dict[str, Any]) -> Context:
    d = v.get("diff")
    if not d:
        why = (
            "This version is the live one."
            if v.get("live")
            else "No version of this plan is live yet."
        )
        return {"why": why}
    return {
        "why": None,
        "share_changed": pct(d.get("share_changed"), 1),
        "live_version": d.get("live_version"),
        "members": count(d.get("members")),
        "sample": _sample_note(d),
        "rows": [
            {
                "id": c["id"],
                "rule": c["rule"],
                "members": f"{c.get('members', 0):,}",
                "bar": charts.size_bar(share=float(c["share_changed"])),
                "share": pct(float(c["share_changed"]), 1),
            }
            for c in d.get("cohorts") or []
        ],
    }


def watch(w: dict[str, Any] | None, rows: list[MetricRow]) -> Context | None:
    if not w:
        return None
    kinds = {r.metric: r for r in rows}
    blocks: list[Context] = []
    for m in w.get("metrics") or []:
        if m.get("role") != "guardrail":
            continue
        r = kinds.get(m["metric"])
        kind = r.kind if r else "mean"
        hist = [
            {
                **h,
                "estimate": _scale(h.get("estimate"), kind),
                "lower": _scale(h.get("lower"), kind),
                "upper": _scale(h.get("upper"), kind),
            }
            for h in m.get("history") or []
            if None not in (h.get("estimate"), h.get("lower"), h.get("upper"))
        ]
        chart = charts.watch_chart(
            uid=f"w-{len(blocks)}",
            history=hist,
            threshold=_scale(m.get("threshold"), kind),
            harmful=r.harmful if r else None,
            fmt=scaled_fmt(kind),
        )
        blocks.append(
            {"metric": m["metric"], "status": m.get("status") or "no data", "chart": chart}
        )
    if not blocks:
        return None
    return {"uploads": w.get("uploads"), "blocks": blocks}


def history(history: list[dict[str, Any]]) -> list[Context]:
    rows = []
    for h in history:
        action = h.get("action")
        what = ACTION_TEXT.get(action or "", action)
        p = h.get("payload") or {}
        if action in ("plan.activate", "plan.rollback"):
            what = f"{what}: version {p.get('from_version') or 'none'} \u2192 {p.get('to_version')}"
        rows.append(
            {
                "action": action,
                "at": when(h.get("at")),
                "actor": h.get("actor_name"),
                "role": h.get("actor_role"),
                "what": what,
                "reason": h.get("reason"),
                "id": h.get("id"),
            }
        )
    return rows


def decision(v: dict[str, Any], plan: dict[str, Any], viewer: dict[str, str]) -> Context:
    """Which actions the page's script offers (review.js creates and labels the buttons)."""
    state = v["status"]
    actions: list[str] = []
    if state == "draft":
        actions = ["approve", "reject"]
    elif state in ("approved", "superseded"):
        actions = ["activate"]
    elif state == "active" and len(plan.get("activations") or []) > 1:
        actions = ["rollback"]
    own = state == "draft" and v.get("author_owner", v.get("author")) == viewer.get(
        "owner", viewer["name"]
    )
    return {
        "actions": " ".join(actions),
        "state": status(state).lower(),
        "may_decide": ROLE_RANK.get(viewer["role"], -1) >= ROLE_RANK["approver"],
        "own": own,
        "revision": plan.get("revision"),
    }
