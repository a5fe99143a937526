"""Answers rendered for people with rich: aligned tables and key/value blocks. The command line
prints them to the terminal and the demo to its report, so both show an answer the same way.

Every function takes an answer (the client's model, or its JSON) and returns a rich renderable;
`to_text` turns one into plain text (no colour) for files and tests.

Longer than most modules (about 500 lines) on purpose: one rendering per kind of answer, all
built from the same few number and table helpers, so the terminal and the demo's report read
the same; split by resource they would each need those helpers again."""

from __future__ import annotations

import functools
import io
import math
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any, Concatenate, ParamSpec, TypeVar

from rich import box
from rich.console import Console, Group, RenderableType
from rich.padding import Padding
from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn
from rich.table import Table
from rich.text import Text

from apportion.client.tables import as_json
from apportion.client.waiter import ProgressCallback

P = ParamSpec("P")
R = TypeVar("R")

WIDE = 240  # columns of text output that is not a terminal (files, pipes, tests): no wrapping


def _from_answer(fn: Callable[Concatenate[Any, P], R]) -> Callable[Concatenate[Any, P], R]:
    """Lets a rendering take the client's answer models: their JSON form is what it reads."""

    @functools.wraps(fn)
    def run(answer: Any, /, *args: P.args, **kwargs: P.kwargs) -> R:
        return fn(as_json(answer), *args, **kwargs)

    return run


def to_text(renderable: RenderableType, width: int = WIDE) -> str:
    """Plain text of a renderable, lines stripped of trailing blanks."""
    buf = io.StringIO()
    Console(file=buf, width=width, color_system=None, highlight=False).print(renderable)
    return "\n".join(line.rstrip() for line in buf.getvalue().splitlines())


def indent(renderable: RenderableType, spaces: int = 8) -> Padding:
    return Padding(renderable, (0, 0, 0, spaces))


@contextmanager
def job_progress(label: str, console: Console) -> Iterator[ProgressCallback]:
    """A progress bar (label, bar, per cent, job status) fed by the job waiter's callback. On a
    terminal it redraws in place; elsewhere rich prints its final state once."""
    columns = (TextColumn("{task.description}"), BarColumn(), TaskProgressColumn(),
               TextColumn("{task.fields[status]}"))  # fmt: skip
    with Progress(*columns, console=console) as bar:
        task = bar.add_task(label, total=1.0, status="queued")
        yield lambda fraction, status: bar.update(task, completed=fraction, status=status)


# ---- cells -------------------------------------------------------------------------------------


def is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def cell(v: Any) -> str:
    """A value as a table cell: '' for none, yes/no, 4 significant digits for floats."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.4g}" if abs(v) >= 1e-4 or v == 0 else f"{v:.2e}"
    return str(v)


def fmt_num(x: float | None, digits: int = 4) -> str:
    """A signed number with fixed decimals ('-' when missing or not finite)."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:+.{digits}f}"


def fmt_arms(arms: dict[str, float]) -> str:
    """{'ten_min': 0.6, 'adaptive': 0.4, 'five_min': 0} -> 'ten_min 60%, adaptive 40%'."""
    parts = [(a, s) for a, s in arms.items() if s >= 0.005]  # below half a per cent: noise
    parts.sort(key=lambda p: -p[1])
    return ", ".join(a if s > 0.9995 else f"{a} {s:.0%}" for a, s in parts)


def table(rows: Sequence[Sequence[Any]], headers: Sequence[str]) -> Table:
    """Columns under a rule below the headers; columns holding only numbers are right-aligned."""
    t = Table(box=box.SIMPLE_HEAD, show_edge=False, pad_edge=False, header_style="bold")
    for i, h in enumerate(headers):
        values = [row[i] for row in rows if row[i] not in (None, "")]
        numeric = bool(values) and all(is_number(v) for v in values)
        t.add_column(h, justify="right" if numeric else "left", overflow="fold")
    for row in rows:
        t.add_row(*(cell(v) for v in row))
    return t


def kv(pairs: Iterable[tuple[str, Any]]) -> Table:
    """Key/value lines, the values aligned two spaces after the longest key."""
    t = Table.grid(padding=(0, 2))
    t.add_column(style="bold")
    t.add_column(overflow="fold")
    for k, v in pairs:
        t.add_row(k, cell(v))
    return t


def _unit_label(unit: str) -> str:
    return "rel%" if unit == "relative" else "abs"


def lines(*items: RenderableType | str) -> Group:
    return Group(*(Text(i) if isinstance(i, str) else i for i in items))


# ---- experiments, readouts, models, jobs -------------------------------------------------------


@_from_answer
def experiment_view(e: dict[str, Any]) -> Group:
    arms = table([[a["key"], a["share"]] for a in e["arms"]], ["arm", "design share"])
    metrics = table(
        [[m["key"], m["kind"], m.get("direction")] for m in e["metrics"]],
        ["metric", "kind", "direction"],
    )
    readouts = table(
        [[r["version"], r["n_rows"],
          "flagged" if (r.get("sample_ratio") or {}).get("flagged") else "ok",
          r["content_hash"][:12], r["created_at"]] for r in e["readouts"]],
        ["readout", "rows", "sample ratio", "hash", "created"],
    )  # fmt: skip
    feats = e.get("features") or []
    features = table(
        [[f["key"], f["kind"], "yes" if f.get("personalize", True) else "no"] for f in feats],
        ["feature", "kind", "personalize"],
    )
    unused = [f"{f['key']} ({f.get('reason') or 'no reason given'})"
              for f in feats if not f.get("personalize", True)]  # fmt: skip
    note = ["not used for personalization: " + "; ".join(unused), ""] if unused else []
    return lines(f"experiment {e['key']} ({e.get('name') or ''})", "", arms, "", metrics, "",
                 features, "", *note, readouts)  # fmt: skip


@_from_answer
def readout_view(r: dict[str, Any], created: bool | None = None) -> Group:
    srm = r.get("sample_ratio") or {}
    items: list[RenderableType | str] = []
    if created is not None:
        items.append(
            f"readout {r['experiment']}/{r['version']}: "
            + ("stored" if created else "these bytes were uploaded before; the existing version")
        )
    items.append(
        f"{r['n_rows']} rows, hash {r['content_hash'][:12]}; sample-ratio check "
        f"{'FLAGGED' if srm.get('flagged') else 'ok'} (p = {srm.get('p_value', float('nan')):.3g})"
    )
    arms = r.get("arms") or []
    metrics = list(arms[0]["metrics"]) if arms else []
    rows = [
        [a["arm"], a["n"]]
        + [
            f"{a['metrics'][k]['mean']:.4g} ± {a['metrics'][k]['se']:.2g}"
            if a["metrics"][k]["mean"] is not None
            else "-"
            for k in metrics
        ]
        for a in arms
    ]
    items += ["", table(rows, ["arm", "n", *metrics])]
    items += [f"warning: {w}" for w in r.get("warnings") or []]
    return lines(*items)


@_from_answer
def model_view(m: dict[str, Any]) -> Group:
    head = kv([
        ("model", m["id"]),
        ("experiment", f"{m['experiment']} (readout {m.get('version')})"),
        ("method", m["method"]),
        ("status", m["status"]),
        ("progress", f"{float(m.get('progress') or 0):.0%}"),
    ])  # fmt: skip
    if m["status"] == "failed":
        return lines(head, f"error: {m.get('error')}")
    if m["status"] != "done":
        return lines(head)
    arms, cohorts = m["arms"], m["cohorts"]
    items: list[RenderableType | str] = [
        head,
        "",
        table([[c["id"], f"{(c['share'] or 0):.1%}", c["rule"]] for c in cohorts],
              ["cohort", "share", "rule"]),
    ]  # fmt: skip
    metrics = list(cohorts[0]["estimates"]) if cohorts else []
    rows = []
    for c in cohorts:
        for a in arms[1:]:
            row: list[Any] = [c["id"], a]
            for k in metrics:
                e = c["estimates"][k][a]
                row.append("-" if e["effect"] is None
                           else f"{e['effect']:+.4f} ± {(e['effect_se'] or 0) * 1.96:.4f}")  # fmt: skip
            rows.append(row)
    items += ["", f"effects against {arms[0]} (estimate ± 1.96 standard errors):",
              table(rows, ["cohort", "arm", *metrics])]  # fmt: skip
    prices = (m.get("diagnostics") or {}).get("guardrail_prices")
    if prices:
        items += ["", "guardrail prices that shaped the partition (structure half): "
                  + ", ".join(f"{k} {fmt_num(v)}" for k, v in prices.items())]  # fmt: skip
    return lines(*items)


@_from_answer
def job_view(j: dict[str, Any]) -> Table:
    return kv([("job", j["id"]), ("kind", j["kind"]), ("status", j["status"]),
               ("progress", f"{j['progress']:.0%}"), ("error", j.get("error"))])  # fmt: skip


# ---- comparisons -------------------------------------------------------------------------------


@_from_answer
def comparison_view(c: dict[str, Any]) -> Group:
    """What was compared, then (when done) one row per candidate in the server's order
    (guardrails holding on held-out folds first, by held-out success lift), every guardrail's
    held-out lift beside it, and the recommendation with its reason."""
    spec = c.get("spec") or {}
    head = kv([
        ("comparison", f"{c['experiment']} #{c['number']}"),
        ("readout", c.get("readout_version")),
        ("success metric", spec.get("success_metric")),
        ("folds", spec.get("folds")),
        ("status", c["status"]),
    ])  # fmt: skip
    if c["status"] == "failed":
        return lines(head, "", f"the comparison failed: {c.get('error')}")
    if c["status"] != "done":
        return lines(head, f"progress  {c.get('progress', 0):.0%}")
    success = spec.get("success_metric")
    guards = [g["metric"] for g in spec.get("guardrails") or []]
    rows = []
    failed = [r for r in c.get("table") or [] if r["status"] == "failed"]
    for r in c.get("table") or []:
        m = r["metrics"]
        if r["status"] == "failed":  # left the comparison; its reason is printed below
            rows.append(["-", r["candidate"], "failed", *["-"] * (len(guards) + 1), "-",
                         r["seconds"]])  # fmt: skip
            continue
        cells = [r["rank"], r["candidate"], r["status"],
                 f"{fmt_num(m[success]['lift'])} ± {m[success]['se']:.4f}"]  # fmt: skip
        cells += [f"{fmt_num(m[g]['lift'])} ± {m[g]['se']:.4f}" for g in guards]
        cells += [r.get("folds_without_plan"), r.get("seconds")]
        rows.append(cells)
    headers = ["rank", "candidate", "guardrails", f"{success} lift"]
    headers += [f"{g} lift" for g in guards] + ["folds w/o plan", "seconds"]
    allowed = []
    for g in guards:  # the same allowance for every candidate (relative ones in metric units)
        t = next((r["metrics"][g].get("threshold_absolute") for r in c.get("table") or []
                  if r["metrics"]), None)  # fmt: skip
        if t is not None:
            allowed.append(f"{g} {'>=' if t < 0 else '<='} {fmt_num(t)}")
    return lines(
        head, "", table(rows, headers), "",
        "Held-out lifts against all-control, ± standard error; each candidate's plans were made",
        "without the fold they are scored on. guardrails: verified (holds with the stated",
        "confidence), unverified (estimate within the threshold, not yet with that confidence),",
        "refused (estimate beyond the threshold).",
        *([f"allowed lifts: {', '.join(allowed)}"] if allowed else []),
        *[f"{r['candidate']} failed: {r['error']}" for r in failed],
        "",
        f"recommended: {c.get('recommended') or 'none'}",
        f"why: {c.get('reason')}",
    )  # fmt: skip


@_from_answer
def comparisons_table(items: Sequence[dict[str, Any]]) -> Table:
    return table(
        [[c["number"], c["status"], c["success_metric"], c["candidates"], c["recommended"],
          c["created_by"], c["created_at"]] for c in items],
        ["number", "status", "success", "candidates", "recommended", "by", "at"],
    )  # fmt: skip


# ---- plans -------------------------------------------------------------------------------------


@_from_answer
def report_metric_rows(version: dict[str, Any]) -> list[dict[str, Any]]:
    """The impact report as one row per metric, the success metric first: metric, role, lift
    (point estimate), projected (corrected for the optimizer's curse), low/high (its interval),
    threshold and unit (guardrails; lifts are in the threshold's unit, so a relative guardrail's
    lifts are per cent of the baseline), holds (probability)."""
    entries = (version.get("report") or {}).get("metrics") or []
    rows = [
        {
            "metric": e.get("metric"),
            "role": e.get("role"),
            "lift": e.get("lift"),
            "projected": e.get("corrected_lift"),
            "low": (e.get("interval") or [None, None])[0],
            "high": (e.get("interval") or [None, None])[1],
            "threshold": e.get("threshold"),
            "unit": e.get("unit") or "absolute",
            "holds": e.get("probability_holds"),
        }
        for e in entries
        if isinstance(e, dict)
    ]
    rows.sort(key=lambda r: r["role"] != "success")
    return rows


@_from_answer
def cohorts_table(cohorts: Sequence[dict[str, Any]]) -> Table:
    return table(
        [[c["id"], f"{c['share']:.1%}", fmt_arms(c["arms"]), c["rule"]] for c in cohorts],
        ["cohort", "share", "arms", "rule"],
    )


@_from_answer
def prices_view(rows: Sequence[dict[str, Any]]) -> list[RenderableType | str]:
    """The report's guardrail prices and the success lift at five thresholds around each one."""
    if not rows:
        return []
    t = []
    for r in rows:
        lifts = [fmt_num(p["lift"]) if "lift" in p else p.get("status", "-").split(" ")[0]
                 for p in r["points"]]  # fmt: skip
        t.append([r["metric"], _unit_label(r["unit"]), fmt_num(r["price"]),
                  " ".join(fmt_num(p["threshold"]) for p in r["points"]), " ".join(lifts)])  # fmt: skip
    return [
        "",
        "guardrail prices (success lift bought by one more unit of allowed harm) and the success"
        " lift at five thresholds around the chosen one (the middle):",
        table(t, ["guardrail", "unit", "price", "thresholds", "success lift"]),
    ]


@_from_answer
def held_out_view(held: Any) -> list[RenderableType | str]:
    """The draft's cross-fitted held-out evaluation: its figures, or why there are none yet."""
    if not isinstance(held, dict):
        return []
    if held.get("status") != "complete":
        why = held.get("error") or {"pending": "running (see its job)"}.get(
            str(held.get("status")), str(held.get("status"))
        )
        return ["", f"held-out evaluation: {why}"]
    rows = [
        [k, fmt_num(m["lift"]), fmt_num(m["se"]).lstrip("+"), fmt_num(m.get("threshold_absolute")),
         "" if m.get("probability_holds") is None else f"{m['probability_holds']:.3f}"]
        for k, m in (held.get("metrics") or {}).items()
    ]  # fmt: skip
    reading = held.get("reading") or {}
    out: list[RenderableType | str] = [
        "",
        f"held-out evaluation ({held.get('folds')} folds the model and optimizer never saw; "
        f"against all-control): {held.get('verdict')}",
    ]
    if reading.get("warning"):
        out.append(f"WARNING: {reading['warning']}")
    out.append(table(rows, ["metric", "lift", "se", "allowed", "P(holds)"]))
    if reading.get("measures"):
        out.append(reading["measures"])
    return out


@_from_answer
def version_view(v: dict[str, Any]) -> Group:
    """A plan version: its spec, cohorts, impact report, prices, held-out figures, diff."""
    spec = v.get("spec") or {}
    holdout = spec.get("holdout") or {}
    report = v.get("report") or {}
    items: list[RenderableType | str] = [
        kv([
            ("plan version", f"{v['plan']}/{v['version']}"),
            ("status", v["status"] + (" (live)" if v.get("live") else "")),
            ("model", v.get("model_id")),
            ("author", v.get("author")),
            ("decided by", v.get("decided_by")),
            ("method", f"{spec.get('method')} / {spec.get('allocation')}"),
            ("success metric", spec.get("success_metric")),
            ("baseline", spec.get("baseline")),
            ("holdout", f"{holdout.get('share', 0):.1%} on {holdout.get('arm')}"),
            ("report", report.get("status")),
        ]),
        "",
        cohorts_table((v.get("allocation") or {}).get("cohorts") or []),
    ]  # fmt: skip
    rows = report_metric_rows(v)
    if rows:
        items += [
            "",
            "impact against the baseline (projected = corrected for the optimizer's curse; unit"
            " abs = the metric's own units, rel% = per cent of the baseline's value):",
            table(
                [[r["metric"], r["role"], _unit_label(r["unit"]), fmt_num(r["lift"]),
                  fmt_num(r["projected"]), f"[{fmt_num(r['low'])}, {fmt_num(r['high'])}]",
                  fmt_num(r["threshold"]),
                  "" if r["holds"] is None else f"{r['holds']:.3f}"] for r in rows],
                ["metric", "role", "unit", "lift", "projected", "interval", "allowed",
                 "P(holds)"],
            ),
        ]  # fmt: skip
    items += prices_view(report.get("guardrail_prices") or [])
    items += held_out_view(report.get("held_out"))
    diff = v.get("diff")
    if diff:
        items += [
            "",
            f"against live version {diff['live_version']}: {diff['share_changed']:.1%} of "
            f"{diff['members']} readout members would change arm"
            + (f" (a uniform sample of the readout's {diff['readout_rows']})"
               if diff.get("sampled") else ""),
        ]  # fmt: skip
    return lines(*items)


@_from_answer
def plans_table(plans: Sequence[dict[str, Any]]) -> Table:
    return table(
        [[p["plan"], p["live_version"], p["revision"], p["versions"], p["latest_status"]]
         for p in plans],
        ["plan", "live", "revision", "versions", "latest status"],
    )  # fmt: skip


@_from_answer
def plan_view(plan: dict[str, Any]) -> Group:
    return lines(
        f"plan {plan['plan']}: live version {plan['live_version'] or 'none'}, "
        f"revision {plan['revision']}",
        "",
        table([[v["version"], v["status"], v.get("method"), v.get("model_id"), v["author"]]
               for v in plan["versions"]], ["version", "status", "method", "model", "author"]),
        "",
        table([[a["revision"], a["kind"], a["version"], a["actor"], a["at"], a.get("reason")]
               for a in plan["activations"]], ["revision", "kind", "version", "by", "at",
                                              "reason"]),
    )  # fmt: skip


@_from_answer
def switch_line(got: dict[str, Any], plan: str, verb: str) -> str:
    before = got["from_version"]
    was = f"version {before}" if before else "no live version"
    return f"{verb} {plan}: {was} -> version {got['to_version']} (revision {got['revision']})"


@_from_answer
def assignments_table(items: Sequence[dict[str, Any]], members: Sequence[str]) -> Table:
    return table(
        [[m, a["arm"], a["cohort"], a["plan_version"], a["holdout"], ", ".join(a["defaults_used"])]
         for m, a in zip(members, items, strict=True)],
        ["member", "arm", "cohort", "version", "holdout", "defaults used"],
    )  # fmt: skip


# ---- the watch, the audit trail ----------------------------------------------------------------


@_from_answer
def watch_table(metrics: Sequence[dict[str, Any]]) -> Table:
    """One row per metric with its latest always-valid interval and status."""
    rows = []
    for m in metrics:
        last = m["history"][-1] if m.get("history") else m
        rows.append([m["metric"], m["role"], m.get("status") or "-", fmt_num(last.get("estimate")),
                     f"[{fmt_num(last.get('lower'))}, {fmt_num(last.get('upper'))}]",
                     fmt_num(m.get("threshold")), last.get("n_plan"), last.get("n_holdout")])  # fmt: skip
    return table(rows, ["metric", "role", "status", "plan - holdout", "always-valid interval",
                        "limit", "plan n", "holdout n"])  # fmt: skip


@_from_answer
def watch_upload_view(got: dict[str, Any]) -> Group:
    rolled = got.get("rolled_back")
    return lines(
        f"upload {got['upload']} to {got['plan']} v{got['version']}: {got['rows']} rows, "
        f"{got['members']} members ({got['replaced']} replaced); holdout flags that disagree "
        f"with the lookup: {got['holdout_flag_disagreement']:.1%}",
        watch_table(got["metrics"]),
        *([f"rolled back automatically: {rolled}"] if rolled else []),
    )


@_from_answer
def watch_view(w: dict[str, Any]) -> Group:
    return lines(
        f"{w['plan']} v{w['version']}: {w['uploads']} uploads, {w['members']} members",
        watch_table(w.get("metrics") or []),
    )


@_from_answer
def audit_table(entries: Sequence[dict[str, Any]]) -> Table:
    return table(
        [[e["id"], e["at"], f"{e['actor_name']} ({e['actor_role']})", e["action"],
          f"{e['entity']}:{e['entity_id']}", e.get("reason")] for e in entries],
        ["id", "at", "actor", "action", "entity", "reason"],
    )  # fmt: skip


@_from_answer
def chain_line(result: dict[str, Any]) -> str:
    """The audit chain's verification in one line."""
    if result["intact"]:
        return f"audit chain intact: {result['entries']} entries"
    return f"audit chain BROKEN at entry {result['first_broken']}: {result['problem']}"
