"""Server-rendered HTML for the review pages: the shell (public: no plan data, only the key box
and an empty main element) and the fragments the shell loads with the viewer's key (the plan index
and a version's review). Fragments are well-formed XML (void elements closed, everything escaped),
so tests can parse them with the standard library, and carry no script or style of their own.

Shapes: `version_fragment(data, viewer)` takes `apportion.usecases.review.review_page(...)` and a
`viewer = {"name", "role"}`; `index_fragment(plans, viewer)` takes `review.plans_index(...)`."""

from __future__ import annotations

import math
from html import escape
from typing import Any

from apportion.web import charts
from apportion.web.report_view import (
    PROB_TOL,
    MetricRow,
    comparison_rows,
    display,
    metric_rows,
    scale,
    scaled_fmt,
)

ROLE_RANK = {"reader": 0, "analyst": 1, "approver": 2, "admin": 3}
STATUS_TEXT = {
    "draft": "Draft",
    "approved": "Approved",
    "rejected": "Rejected",
    "active": "Live",
    "superseded": "Superseded",
}
ACTION_TEXT = {
    "plan.draft": "drafted",
    "plan.approve": "approved",
    "plan.reject": "rejected",
    "plan.activate": "made live",
    "plan.rollback": "rolled back",
    "plan.report": "report attached",
    "plan.held_out": "held-out evaluation attached",
}


def e(s: object) -> str:
    return escape("" if s is None else str(s), quote=True)


def _pct(x: float | None, digits: int = 0) -> str:
    return "n/a" if x is None or not math.isfinite(x) else charts.pct(x, digits)


def _count(n: object) -> str:
    return f"{n:,}" if isinstance(n, int) else str(n)


def _time(s: object) -> str:
    """'2026-03-01T12:00:03.123456+00:00' -> '2026-03-01 12:00 UTC'."""
    t = str(s or "")
    return f"{t[:10]} {t[11:16]} UTC" if len(t) >= 16 and t[10] in "T " else t


# ---- the shell ---------------------------------------------------------------------------------


def shell(*, title: str, fragment: str, crumbs: list[tuple[str, str | None]]) -> str:
    """The page a link opens. It holds no plan data; review.js fetches `fragment` with the key the
    viewer typed (kept in sessionStorage) and puts the answer into <main>."""
    trail = ' <span aria-hidden="true">/</span> '.join(
        f'<a href="{e(href)}">{e(text)}</a>' if href else f"<span>{e(text)}</span>"
        for text, href in crumbs
    )
    return f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8"/>
<meta name="viewport" content="width=device-width, initial-scale=1"/>
<meta name="referrer" content="no-referrer"/>
<title>{e(title)} \u00b7 Apportion</title>
<link rel="stylesheet" href="/ui/static/review.css"/>
<script src="/ui/static/review.js" defer="defer"></script>
</head>
<body>
<header class="top">
  <div class="brand">Apportion <span class="muted">plan review</span></div>
  <nav class="crumbs" aria-label="Location">{trail}</nav>
  <form id="keyform" class="keyform" autocomplete="off">
    <label for="apikey">API key</label>
    <input id="apikey" name="apikey" type="password" spellcheck="false" placeholder="paste a key"/>
    <button type="submit">Use key</button>
    <button type="button" id="forget" hidden="hidden">Forget key</button>
    <span id="whoami" class="muted" aria-live="polite"></span>
  </form>
</header>
<main id="content" data-fragment="{e(fragment)}">
  <p id="prompt">Enter an API key (reader role to view; approver role to decide). The key stays in
  this browser tab only and is sent to this service alone.</p>
  <noscript><p>This page needs JavaScript to send your key; the JSON API serves the same data.</p></noscript>
</main>
</body>
</html>
"""


# ---- the index ---------------------------------------------------------------------------------


def index_fragment(plans: list[dict[str, Any]], viewer: dict[str, str]) -> str:
    if not plans:
        body = "<p>No plans yet. Draft one with <code>POST /v1/plans/{plan}/versions</code>.</p>"
    else:
        items = []
        for p in plans:
            rows = "".join(
                f'<tr><td><a href="/ui/plans/{e(p["plan"])}/versions/{v["version"]}">version {v["version"]}</a></td>'
                f'<td><span class="status s-{e(v["status"])}">{e(STATUS_TEXT.get(v["status"], v["status"]))}</span></td>'
                f"<td>{e(v.get('author'))}</td><td>{e(_time(v.get('created_at')))}</td><td>{e(v.get('method'))}</td></tr>"
                for v in p["versions"]
            )
            live = f"version {p['live_version']} is live" if p["live_version"] else "nothing live"
            items.append(
                f'<section class="plan" data-plan="{e(p["plan"])}"><h2>{e(p["plan"])}</h2>'
                f'<p class="muted">{e(live)} \u00b7 revision {e(p["revision"])}</p>'
                f"<table><thead><tr><th>Version</th><th>State</th><th>Author</th><th>Drafted</th>"
                f"<th>Method</th></tr></thead><tbody>{rows}</tbody></table></section>"
            )
        body = "".join(items)
    return f'<div class="fragment" data-viewer="{e(viewer["name"])}" data-role="{e(viewer["role"])}"><h1>Plans</h1>{body}</div>'


# ---- a version ---------------------------------------------------------------------------------


def version_fragment(data: dict[str, Any], viewer: dict[str, str]) -> str:
    v = data["version"]
    rows = metric_rows(v, data.get("metrics") or {})
    parts = [
        f'<div class="fragment" data-viewer="{e(viewer["name"])}" data-role="{e(viewer["role"])}" '
        f'data-status="{e(v["status"])}">',
        _summary(v, data["plan"], rows),
        _lift_section(v, rows),
        _cohorts_section(v),
        _comparison_section(v, rows),
        _held_out_section(v, rows),
        _diff_section(v),
        _watch_section(data.get("watch"), rows),
        _history_section(data.get("history") or [], data["plan"], v),
        _decision_section(v, data["plan"], viewer),
        "</div>",
    ]
    return "".join(parts)


def _summary(v: dict[str, Any], plan: dict[str, Any], rows: list[MetricRow]) -> str:
    spec = v.get("spec") or {}
    status = v["status"]
    live = plan.get("live_version")
    facts = [
        (
            "State",
            f'<span class="status s-{e(status)}" id="version-status">{e(STATUS_TEXT.get(status, status))}</span>',
        ),
        ("Live version", e(f"version {live}" if live else "none")),
        ("Drafted by", e(f"{v.get('author')} on {_time(v.get('created_at'))}")),
        ("Success metric", e(spec.get("success_metric"))),
        ("Method", e(f"{spec.get('method')} \u00b7 {spec.get('allocation')} allocation")),
        ("Baseline", e(spec.get("baseline"))),
        (
            "Holdout",
            e(
                f"{_pct((spec.get('holdout') or {}).get('share'), 1)} on "
                f"{(spec.get('holdout') or {}).get('arm')}"
            ),
        ),
        ("Cohort model", e(f"model {v.get('model_id')} on experiment {spec.get('experiment')}")),
    ]
    if isinstance(spec.get("comparison"), dict):
        facts.append(("Method chosen by", _comparison_link(spec["comparison"])))
    if v.get("decided_by"):
        facts.append(
            (
                "Decided by",
                e(
                    f"{v['decided_by']} on {_time(v.get('decided_at'))}: "
                    f"\u201c{v.get('decision_reason') or ''}\u201d"
                ),
            )
        )
    guard = [r for r in rows if r.role == "guardrail"]
    verdict = ""
    if guard:
        held = sum(1 for r in guard if r.meets)
        known = sum(1 for r in guard if r.meets is not None)
        if known:
            verdict = (
                f'<p class="verdict">{held} of {len(guard)} guardrails hold with at least the required '
                f"probability (calibrated: the optimizer's selection on noisy estimates included).</p>"
            )
    notes = f'<p class="notes">Notes: {e(spec.get("notes"))}</p>' if spec.get("notes") else ""
    pending = ""
    if (v.get("report") or {}).get("status") == "pending":
        pending = '<p class="warn" role="status">The impact report is still being computed; reload later.</p>'
    dl = "".join(f"<dt>{k}</dt><dd>{val}</dd>" for k, val in facts)
    return (
        f'<section class="summary"><h1>{e(v["plan"])} <span class="muted">version {e(v["version"])}</span></h1>'
        f'{pending}{verdict}<dl class="facts">{dl}</dl>{notes}'
        f'<p class="print-only muted">Printed from /ui/plans/{e(v["plan"])}/versions/{e(v["version"])}; '
        f"content hash {e(v.get('content_hash'))}.</p></section>"
    )


def _metric_block(v: dict[str, Any], r: MetricRow) -> str:
    fmt, unit = display(r.kind, r.unit)
    better = "higher is better" if r.direction == "higher" else "lower is better"
    head = f'<h3>{e(r.metric)} <span class="muted">({e(r.kind)}, {better})</span></h3>'
    if r.estimate is None or r.lower is None or r.upper is None:
        return (
            f'<div class="metric" data-metric="{e(r.metric)}" data-role="{r.role}">{head}'
            f'<p class="muted">No projected lift in this version\'s report.</p></div>'
        )
    uid = f"{r.role[0]}-{''.join(ch if ch.isalnum() else '_' for ch in r.metric)}"
    svg = charts.interval_chart(
        uid=uid,
        estimate=_scale(r.estimate, r.kind, r.unit),
        lower=_scale(r.lower, r.kind, r.unit),
        upper=_scale(r.upper, r.kind, r.unit),
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
    prob = ""
    if r.role == "guardrail":
        cells.append(("Limit", f"{fmt(r.threshold)}" if r.threshold is not None else "n/a"))
        if r.p_holds is not None:
            ok = bool(r.meets)
            mark = "\u2713 meets" if ok else "\u2717 below"
            if ok and r.confidence is not None and abs(r.p_holds - r.confidence) < PROB_TOL:
                mark = "\u2713 at the limit of"
            prob = (
                f'<p class="prob {"ok" if ok else "bad"}"><strong>{_pct(r.p_holds, 1)}</strong> probability it holds '
                f'<span class="muted">({mark} the required {_pct(r.confidence, 0)})</span>{_corrected_prob(r)}</p>'
            )
    table = "".join(f"<div><dt>{k}</dt><dd>{e(val)}</dd></div>" for k, val in cells)
    return (
        f'<div class="metric" data-metric="{e(r.metric)}" data-role="{r.role}">{head}{prob}{svg}'
        f'<dl class="numbers">{table}</dl><p class="unit muted">Lifts against the baseline, in {unit}.</p></div>'
    )


def _corrected_prob(r: MetricRow) -> str:
    if r.p_holds_corrected is None:
        return ""
    return (
        f'<br/><span class="muted">{_pct(r.p_holds_corrected, 1)} around the corrected lift '
        "(the interval is drawn around it)</span>"
    )


def _scale(x: float | None, kind: str, unit: str = "absolute") -> float | None:
    return None if x is None else x * scale(kind, unit)


def _lift_section(v: dict[str, Any], rows: list[MetricRow]) -> str:
    success = [r for r in rows if r.role == "success"]
    guard = [r for r in rows if r.role == "guardrail"]
    legend = (
        '<p class="legend muted">\u25cf projected lift \u00b7 \u25ac interval \u00b7 \u25c7 corrected for the '
        "optimizer\u2019s curse \u00b7 dashed line: the guardrail\u2019s limit \u00b7 hatched: beyond the limit</p>"
    )
    g = "".join(_metric_block(v, r) for r in guard) or "<p>This version has no guardrails.</p>"
    return (
        f'<section id="lift"><h2>Projected lift</h2>{legend}{"".join(_metric_block(v, r) for r in success)}</section>'
        f'<section id="guardrails"><h2>Guardrails</h2>{g}</section>'
    )


def _cohorts_section(v: dict[str, Any]) -> str:
    alloc = v.get("allocation") or {}
    arms = list(alloc.get("arms") or [])
    diff = v.get("diff") or {}
    members = {c["id"]: c.get("members") for c in diff.get("cohorts") or []}
    rows = []
    for c in alloc.get("cohorts") or []:
        shares = [(a, float(c["arms"].get(a, 0.0))) for a in arms]
        text = " \u00b7 ".join(f"{a} {charts.pct(s)}" for a, s in shares if s > 0)
        n = (
            f'<br/><span class="muted">{members[c["id"]]:,} members</span>'
            if members.get(c["id"]) is not None
            else ""
        )
        rows.append(
            f'<tr class="cohort" data-cohort="{e(c["id"])}"><th scope="row">{e(c["id"])}</th>'
            f'<td class="rule"><code>{e(c["rule"])}</code></td>'
            f'<td class="size">{charts.size_bar(share=float(c["share"]))} {_pct(float(c["share"]), 1)}{n}</td>'
            f'<td class="mix">{charts.share_bar(uid="c" + str(c["id"]), segments=shares)}'
            f'<div class="mixtext">{e(text)}</div></td></tr>'
        )
    arms_note = f"Arms: {', '.join(arms)}" + (f" (control: {arms[0]})" if arms else "")
    return (
        f'<section id="cohorts"><h2>Cohorts</h2><p class="muted">{len(rows)} cohorts; size is the share of '
        f"members the model puts in each. {e(arms_note)}.</p>"
        f'<table class="cohorts"><thead><tr><th>#</th><th>Rule</th><th>Size</th><th>Arm shares</th></tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table></section>"
    )


def _comparison_section(v: dict[str, Any], rows: list[MetricRow]) -> str:
    comp = comparison_rows(v)
    if not comp:
        return (
            '<section id="comparison"><h2>Single-arm comparison</h2>'
            '<p class="muted">This version\'s report has no single-arm comparison.</p></section>'
        )
    keys = [r.metric for r in rows]
    fmts = {r.metric: display(r.kind, r.unit)[0] for r in rows}
    head = "".join(
        f"<th>{e(r.metric)}{' (% of baseline)' if r.unit == 'relative' else ''}</th>" for r in rows
    )
    body = []
    for c in comp:
        cells = "".join(
            f"<td>{e(fmts[k](c.lifts[k]) if c.lifts.get(k) is not None else 'n/a')}</td>"
            for k in keys
        )
        safe = {True: "\u2713 yes", False: "\u2717 no", None: "n/a"}[c.safe]
        label = {"best_safe": "best safe arm: ", "plan": "this plan"}.get(c.kind, "")
        name = label if c.kind == "plan" else f"{label}{c.label}"
        cls = ' class="this-plan"' if c.kind == "plan" else ""
        body.append(
            f'<tr{cls} data-kind="{e(c.kind)}"><th scope="row">{e(name)}</th>{cells}<td>{safe}</td></tr>'
        )
    return (
        f'<section id="comparison"><h2>Single-arm comparison</h2><p class="muted">Projected lift against the '
        f"baseline if everyone got one arm, beside this plan.</p><table><thead><tr><th>Allocation</th>{head}"
        f"<th>All guardrails hold (point estimates)</th></tr></thead><tbody>{''.join(body)}</tbody></table></section>"
    )


def _comparison_link(c: dict[str, Any]) -> str:
    """Where the draft's method came from: the comparison's address (the JSON API; the CLI's
    `comparison show` prints it) and how the method fared there."""
    rank = f"ranked {c.get('rank')}" if c.get("rank") is not None else "unranked"
    if c.get("follows_recommendation"):
        verdict = "the recommended candidate"
    else:
        verdict = f"not the recommended candidate ({c.get('recommended') or 'none'})"
    return (
        f'<span id="comparison-link">comparison {e(c.get("number"))}: {e(c.get("candidate"))}, '
        f"{e(rank)}, held-out guardrails {e(c.get('status'))}, {e(verdict)} \u00b7 "
        f"<code>{e(c.get('href'))}</code></span>"
    )


def _held_out_section(v: dict[str, Any], rows: list[MetricRow]) -> str:
    """The cross-fitted held-out evaluation (its own job, so it may still be running)."""
    ho = (v.get("report") or {}).get("held_out")
    if not isinstance(ho, dict):
        return ""
    head = '<section id="held-out"><h2>Held-out evaluation</h2>'
    status = ho.get("status")
    if status != "complete":
        why = {
            "pending": "Running: the model and optimizer are re-run without each fold. "
            "Reload the page when the job is done.",
            "off": "Not computed on this server.",
        }.get(str(status), f"Not available: {ho.get('error', status)}")
        return f'{head}<p class="muted">{e(why)}</p></section>'
    kinds = {r.metric: r.kind for r in rows}
    body = []
    for key, entry in (ho.get("metrics") or {}).items():
        fmt = display(kinds.get(key, "mean"))[0]
        allowed = entry.get("threshold_absolute")
        prob = entry.get("probability_holds")
        body.append(
            f'<tr><th scope="row">{e(key)}</th><td>{e(fmt(entry["lift"]))} \u00b1 '
            f"{e(fmt(entry['se']).lstrip('+'))}</td>"
            f"<td>{'' if allowed is None else e(fmt(allowed))}</td>"
            f"<td>{'' if prob is None else _pct(prob, 1)}</td></tr>"
        )
    verdict = {
        "verified": "every guardrail holds on the held-out folds",
        "unverified": "no guardrail is broken on the held-out folds, but not every one is "
        "shown to hold",
        "refused": "a guardrail is broken on the held-out folds",
    }.get(str(ho.get("verdict")), str(ho.get("verdict")))
    return (
        f'{head}<p class="muted">Lift against all-control on rows whose fold the model and '
        f"the optimizer never saw ({e(ho.get('folds'))} folds; estimate \u00b1 standard error"
        f"{_sample_note(ho)}). "
        f"Verdict: <strong>{e(verdict)}</strong>.</p><table><thead><tr><th>Metric</th>"
        "<th>Held-out lift</th><th>Allowed</th><th>Holds (held-out)</th></tr></thead>"
        f"<tbody>{''.join(body)}</tbody></table></section>"
    )


def _sample_note(d: dict[str, Any]) -> str:
    """Says so when a figure was computed on a uniform sample of a large readout's rows."""
    if not d.get("sampled"):
        return ""
    used = d.get("rows_used", d.get("members"))
    return f"; a uniform sample of {e(_count(used))} of the readout's {e(_count(d.get('readout_rows')))} rows"


def _diff_section(v: dict[str, Any]) -> str:
    d = v.get("diff")
    if not d:
        why = (
            "This version is the live one."
            if v.get("live")
            else "No version of this plan is live yet."
        )
        return (
            f'<section id="diff"><h2>Change from live plan</h2><p class="muted">{why}</p></section>'
        )
    rows = "".join(
        f'<tr><th scope="row">{e(c["id"])}</th><td><code>{e(c["rule"])}</code></td><td>{c.get("members", 0):,}</td>'
        f"<td>{charts.size_bar(share=float(c['share_changed']))} {_pct(float(c['share_changed']), 1)}</td></tr>"
        for c in d.get("cohorts") or []
    )
    return (
        f'<section id="diff"><h2>Change from live plan</h2><p><strong>{_pct(d.get("share_changed"), 1)}</strong> '
        f"of members would get a different arm than under live version {e(d.get('live_version'))} "
        f'<span class="muted">(counted over {e(_count(d.get("members")))} members of the readout{_sample_note(d)})</span>.</p>'
        f"<table><thead><tr><th>#</th><th>Cohort</th><th>Members</th><th>Arm changes</th></tr></thead>"
        f"<tbody>{rows}</tbody></table></section>"
    )


def _watch_section(w: dict[str, Any] | None, rows: list[MetricRow]) -> str:
    if not w:
        return ""
    kinds = {r.metric: r for r in rows}
    blocks = []
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
        svg = charts.watch_chart(
            uid=f"w-{len(blocks)}",
            history=hist,
            threshold=_scale(m.get("threshold"), kind),
            harmful=r.harmful if r else None,
            fmt=scaled_fmt(kind),
        )
        status = m.get("status") or "no data"
        blocks.append(
            f'<div class="metric watch" data-metric="{e(m["metric"])}"><h3>{e(m["metric"])} '
            f'<span class="status w-{e(status)}">{e(status)}</span></h3>{svg}</div>'
        )
    if not blocks:
        return ""
    return (
        f'<section id="watch"><h2>Guardrail watch</h2><p class="muted">Live plan against its holdout after '
        f"each monitoring upload ({e(w.get('uploads'))} so far; always-valid intervals).</p>"
        f"{''.join(blocks)}</section>"
    )


def _history_section(history: list[dict[str, Any]], plan: dict[str, Any], v: dict[str, Any]) -> str:
    if not history:
        return (
            '<section id="history"><h2>History</h2><p class="muted">No audit entries.</p></section>'
        )
    rows = []
    for h in history:
        what = ACTION_TEXT.get(h.get("action") or "", h.get("action"))
        p = h.get("payload") or {}
        if h.get("action") in ("plan.activate", "plan.rollback"):
            what = f"{what}: version {p.get('from_version') or 'none'} \u2192 {p.get('to_version')}"
        rows.append(
            f'<tr class="entry" data-action="{e(h.get("action"))}"><td>{e(_time(h.get("at")))}</td>'
            f'<td>{e(h.get("actor_name"))} <span class="muted">({e(h.get("actor_role"))})</span></td>'
            f"<td>{e(what)}</td><td>{e(h.get('reason') or '')}</td>"
            f'<td class="muted">#{e(h.get("id"))}</td></tr>'
        )
    return (
        '<section id="history"><h2>History</h2><p class="muted">From the audit trail (entry numbers are its '
        "sequence).</p><table><thead><tr><th>When</th><th>Who</th><th>What</th><th>Reason</th><th>Entry</th>"
        f"</tr></thead><tbody>{''.join(rows)}</tbody></table></section>"
    )


def _decision_section(v: dict[str, Any], plan: dict[str, Any], viewer: dict[str, str]) -> str:
    status = v["status"]
    actions: list[str] = []  # review.js labels them
    if status == "draft":
        actions = ["approve", "reject"]
    elif status in ("approved", "superseded"):
        actions = ["activate"]
    elif status == "active" and len(plan.get("activations") or []) > 1:
        actions = ["rollback"]
    head = '<section id="decision" class="decision"><h2>Decision</h2>'
    if not actions:
        return (
            head
            + f"<p>Nothing to decide: this version is {e(STATUS_TEXT.get(status, status).lower())}.</p></section>"
        )
    if ROLE_RANK.get(viewer["role"], -1) < ROLE_RANK["approver"]:
        return head + (
            f"<p>Your key ({e(viewer['name'])}, {e(viewer['role'])}) can view this page; deciding "
            "needs an approver key.</p></section>"
        )
    own = status == "draft" and v.get("author_owner", v.get("author")) == viewer.get(
        "owner", viewer["name"]
    )
    warn = (
        '<p class="warn">You drafted this version: another approver must approve it.</p>'
        if own
        else ""
    )
    # The buttons are not in the HTML: review.js creates them from data-actions and binds its
    # handlers to those elements only, so markup that reached a page some other way (a version's
    # notes, a forged fragment) can never trigger a decision.
    return head + (
        f'<form id="decide" class="decide" data-plan="{e(v["plan"])}" data-version="{e(v["version"])}" '
        f'data-revision="{e(plan.get("revision"))}" data-actions="{" ".join(actions)}">{warn}'
        f'<label for="reason">Reason (kept in the audit trail)</label>'
        f'<textarea id="reason" name="reason" rows="3" required="required" minlength="3" maxlength="5000"></textarea>'
        f'<div class="buttons"></div>'
        f'<p id="decision-message" role="alert" aria-live="assertive"></p></form></section>'
    )
