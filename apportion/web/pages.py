"""The review pages: the shell (public: no plan data, only the key box and an empty main element)
and the fragments the shell loads with the viewer's key (the plan index and a version's review).

The markup lives in Jinja2 templates (apportion/web/templates/) rendered with autoescaping on, so
every value from the database is escaped by the template engine; this module only turns the data
into what the templates write (labels, formatted numbers, the charts as `markupsafe.Markup`).
The routes (apportion/api/routes/ui.py) serve the same templates through Starlette's integration
(`Jinja2Templates(env=environment())`); `render` gives the same text without a request, for tests.
Fragments are well-formed XML (void elements closed, everything escaped), so tests can parse them
with the standard library, and carry no script or style of their own.

Shapes: `version_context(data, viewer)` takes `apportion.usecases.review.review_page(...)` and a
`viewer = {"name", "role", "owner"?}`; `index_context(plans, viewer)` takes
`review.plans_index(...)`; `shell_context(title=, fragment=, crumbs=)` the page a link opens.
"""

from __future__ import annotations

from functools import cache
from pathlib import Path
from typing import Any

import jinja2

from apportion.web import sections
from apportion.web.report_view import metric_rows

TEMPLATES = Path(__file__).resolve().parent / "templates"
SHELL, INDEX, VERSION = "shell.html", "plans.html", "version.html"

Context = sections.Context


def _blank_none(value: Any) -> Any:
    """What `{{ x }}` writes for None: nothing (a missing author, an absent reason)."""
    return "" if value is None else value


@cache
def environment() -> jinja2.Environment:
    """The one template environment: autoescaping on for every template, undefined names are
    errors (a misspelt field fails the render instead of printing nothing), block tags leave no
    blank lines, and None prints as nothing."""
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATES),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        finalize=_blank_none,
    )
    env.filters.update(
        pct=sections.pct, count=sections.count, when=sections.when, status=sections.status
    )
    return env


def render(name: str, context: Context) -> str:
    """The template `name` rendered with `context`: what the route sends, without a request."""
    return environment().get_template(name).render(context)


# ---- the shell ---------------------------------------------------------------------------------


def shell_context(*, title: str, fragment: str, crumbs: list[tuple[str, str | None]]) -> Context:
    """The page a link opens. It holds no plan data; review.js fetches `fragment` with the key the
    viewer typed (kept in sessionStorage) and puts the answer into <main>."""
    return {"title": title, "fragment": fragment, "crumbs": crumbs}


def shell(*, title: str, fragment: str, crumbs: list[tuple[str, str | None]]) -> str:
    return render(SHELL, shell_context(title=title, fragment=fragment, crumbs=crumbs))


# ---- the index ---------------------------------------------------------------------------------


def index_context(plans: list[dict[str, Any]], viewer: dict[str, str]) -> Context:
    return {"plans": plans, "viewer": viewer}


def index_fragment(plans: list[dict[str, Any]], viewer: dict[str, str]) -> str:
    return render(INDEX, index_context(plans, viewer))


# ---- a version ---------------------------------------------------------------------------------


def version_context(data: dict[str, Any], viewer: dict[str, str]) -> Context:
    v = data["version"]
    plan = data["plan"]
    rows = metric_rows(v, data.get("metrics") or {})
    return {
        "viewer": viewer,
        "v": v,
        "summary": sections.summary(v, plan, rows, data.get("not_personalized") or []),
        "success": [sections.metric_block(r) for r in rows if r.role == "success"],
        "guardrails": [sections.metric_block(r) for r in rows if r.role == "guardrail"],
        "cohorts": sections.cohorts(v),
        "comparison": sections.comparison(v, rows),
        "held_out": sections.held_out(v, rows),
        "diff": sections.diff(v),
        "watch": sections.watch(data.get("watch"), rows),
        "history": sections.history(data.get("history") or []),
        "decision": sections.decision(v, plan, viewer),
    }


def version_fragment(data: dict[str, Any], viewer: dict[str, str]) -> str:
    return render(VERSION, version_context(data, viewer))
