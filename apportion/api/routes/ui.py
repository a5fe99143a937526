"""The review pages: an index of plans at /ui/ and a version's review at /ui/plans/{plan}/versions/{v}.

Who may see what: the page a link opens is a shell with no plan data, served without a key, so
reviewers can follow a link from a ticket or chat. Plans are internal, so the data itself (cohort
rules, effects, the audit trail) comes from fragment routes that need a reader key like every /v1
route. The viewer types the key once; the page's script keeps it in sessionStorage (this
tab only, gone when it closes), sends it as `Authorization: Bearer`, and never puts it in a URL, so
it does not reach logs, history or referrers. Approve / reject / activate / rollback call the JSON
lifecycle API with the same key, which enforces the approver role and the author rule.

Everything is served by the app itself (stylesheet and script from apportion/web/static); the
Content-Security-Policy forbids any other origin, inline scripts and inline styles."""

from __future__ import annotations

from functools import cache
from pathlib import Path

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.templating import Jinja2Templates

from apportion.api.body import LimitedRoute
from apportion.api.deps import ReaderDep, ServicesDep
from apportion.api.fields import VersionPath
from apportion.api.params import PlanKey
from apportion.errors import NotFound
from apportion.usecases import review
from apportion.web import pages

router = APIRouter(prefix="/ui", include_in_schema=False, route_class=LimitedRoute)
# Starlette's Jinja2 integration over the pages' own environment (autoescaping on)
templates = Jinja2Templates(env=pages.environment())

STATIC = Path(__file__).resolve().parents[2] / "web" / "static"
STATIC_TYPES = {
    "review.css": "text/css; charset=utf-8",
    "review.js": "text/javascript; charset=utf-8",
}
CSP = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; "
    "form-action 'none'; base-uri 'none'; frame-ancestors 'none'"
)
HEADERS = {
    "Content-Security-Policy": CSP,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}


def _html(request: Request, context: pages.Context) -> HTMLResponse:
    return templates.TemplateResponse(request, pages.SHELL, context, headers=HEADERS)


def _fragment(request: Request, name: str, context: pages.Context) -> HTMLResponse:
    """A fragment for review.js, which inserts a 200 answer only when it carries this marker and
    the text/html type: no other route (the JSON API, an error) can be rendered into the page."""
    return templates.TemplateResponse(
        request, name, context, headers={**HEADERS, "X-Apportion-Fragment": "1"}
    )


@cache
def _static(name: str) -> bytes:
    return (STATIC / name).read_bytes()


@router.get("", response_class=RedirectResponse)
def index_redirect() -> RedirectResponse:
    return RedirectResponse("/ui/", status_code=308)


@router.get("/", response_class=HTMLResponse)
def index_page(request: Request) -> HTMLResponse:
    return _html(
        request,
        pages.shell_context(
            title="Plans", fragment="/ui/fragments/plans", crumbs=[("Plans", None)]
        ),
    )


@router.get("/plans/{plan}/versions/{version}", response_class=HTMLResponse)
def version_page(request: Request, plan: PlanKey, version: VersionPath) -> HTMLResponse:
    return _html(
        request,
        pages.shell_context(
            title=f"{plan} version {version}",
            fragment=f"/ui/fragments/plans/{plan}/versions/{version}",
            crumbs=[("Plans", "/ui/"), (plan, None), (f"version {version}", None)],
        ),
    )


@router.get("/fragments/plans", response_class=HTMLResponse)
def index_fragment(request: Request, actor: ReaderDep, services: ServicesDep) -> HTMLResponse:
    return _fragment(
        request,
        pages.INDEX,
        pages.index_context(
            review.plans_index(services),
            {"name": actor.name, "role": actor.role, "owner": actor.identity},
        ),
    )


@router.get("/fragments/plans/{plan}/versions/{version}", response_class=HTMLResponse)
def version_fragment(
    request: Request, plan: PlanKey, version: VersionPath, actor: ReaderDep, services: ServicesDep
) -> HTMLResponse:
    data = review.review_page(services, plan=plan, version=version)
    return _fragment(
        request,
        pages.VERSION,
        pages.version_context(
            data, {"name": actor.name, "role": actor.role, "owner": actor.identity}
        ),
    )


@router.get("/static/{name}")
def static(name: str) -> Response:
    if name not in STATIC_TYPES:
        raise NotFound(f"no static file '{name}'")
    return Response(
        _static(name),
        media_type=STATIC_TYPES[name],
        headers={"X-Content-Type-Options": "nosniff", "Cache-Control": "public, max-age=300"},
    )
