"""The review page in headless Chromium against a live server: it loads with a key, shows every
cohort and guardrail of the scenario plan, fetches nothing from another origin, and approving (then
activating) through the page changes the version's state in the API."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import pytest
from support import approve, draft_plan
from web.live import CHROMIUM, SKIP_REASON, Live, build_plan, launch_chromium, live_server

from apportion.demo.scenario import GUARDRAILS

pytestmark = [pytest.mark.browser, pytest.mark.skipif(not CHROMIUM.exists(), reason=SKIP_REASON)]


@pytest.fixture(scope="module")
def live(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Live]:
    db = tmp_path_factory.mktemp("ui") / "apportion.db"
    with live_server(f"sqlite:///{db}") as server:
        server.model_id, _ = build_plan(server)  # type: ignore[attr-defined]
        yield server


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = launch_chromium(p)
        yield b
        b.close()


@pytest.fixture
def page(browser: Any, live: Live) -> Iterator[Any]:
    ctx = browser.new_context(viewport={"width": 1200, "height": 900})
    pg = ctx.new_page()
    pg.set_default_timeout(15000)
    pg.requested = []  # every URL the page asked for
    pg.on("request", lambda r: pg.requested.append(r.url))
    yield pg
    ctx.close()


def _sign_in(pg: Any, key: str) -> None:
    pg.fill("#apikey", key)
    pg.click("#keyform button[type=submit]")
    pg.wait_for_selector("#content .fragment")


def _version(live: Live, v: int) -> dict[str, Any]:
    r = live.client.get(
        f"/v1/plans/lesson-length/versions/{v}", headers=live.keys.h(live.keys.reader)
    )
    assert r.status_code == 200, r.text
    return r.json()


def test_page_without_a_key_asks_for_one_and_shows_no_plan_data(page: Any, live: Live) -> None:
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/1")
    assert page.locator("#prompt").is_visible()
    assert page.locator("tr.cohort").count() == 0
    assert page.locator("#whoami").inner_text() == "no key"


def test_page_shows_every_cohort_and_guardrail_of_the_plan(page: Any, live: Live) -> None:
    version = _version(live, 1)
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/1")
    _sign_in(page, live.keys.reader)
    rows = page.locator("tr.cohort")
    cohorts = version["allocation"]["cohorts"]
    assert len(cohorts) >= 2  # the scenario tree splits beginners from the rest at n = 40000
    assert rows.count() == len(cohorts)
    for i, c in enumerate(cohorts):
        assert c["rule"] in rows.nth(i).locator("td.rule").inner_text()
        assert rows.nth(i).locator("svg.shares rect.segment").count() == sum(
            1 for s in c["arms"].values() if s > 0
        )
    shown = page.locator("#guardrails .metric").evaluate_all(
        "els => els.map(e => e.dataset.metric)"
    )
    assert shown == [g["metric"] for g in GUARDRAILS]
    for g in GUARDRAILS:
        block = page.locator(f'#guardrails .metric[data-metric="{g["metric"]}"]')
        assert block.locator("svg line.limit").count() == 1
        assert "limit" in block.locator("svg").text_content()
    assert page.locator("#lift .metric[data-role=success] svg circle.estimate").count() == 1
    assert page.locator("#comparison tbody tr").count() >= len(version["allocation"]["arms"])
    assert "drafted" in page.locator("#history").inner_text()
    assert page.locator("#whoami").inner_text() == "viewing as t-reader (reader)"
    assert page.locator("#decision button").count() == 0  # a reader key cannot decide
    assert page.requested and all(u.startswith(live.base + "/") for u in page.requested), (
        page.requested
    )


def test_index_lists_the_plan_and_links_to_its_versions(page: Any, live: Live) -> None:
    page.goto(f"{live.base}/ui/")
    _sign_in(page, live.keys.reader)
    link = page.locator('section.plan[data-plan="lesson-length"] a', has_text="version 1")
    assert link.get_attribute("href") == "/ui/plans/lesson-length/versions/1"
    link.click()
    page.wait_for_selector("#content .fragment")  # the key survives navigation within the tab
    assert page.locator("h1").first.inner_text().startswith("lesson-length")


def test_approving_then_activating_through_the_page_changes_the_versions_state(
    page: Any, live: Live
) -> None:
    v = draft_plan(live.client, live.keys, live.model_id)["version"]  # type: ignore[attr-defined]
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/{v}")
    _sign_in(page, live.keys.approver)
    assert page.locator("#version-status").inner_text().lower() == "draft"
    page.fill("#reason", "Guardrails hold at 95 %; ship to learners")
    with page.expect_navigation():
        page.click("button[data-action=approve]")
    page.wait_for_selector("#content .fragment")
    assert page.locator("#version-status").inner_text().lower() == "approved"
    after = _version(live, v)
    assert (after["status"], after["decided_by"]) == ("approved", "t-approver")
    assert after["decision_reason"] == "Guardrails hold at 95 %; ship to learners"
    assert "approved" in page.locator("#history").inner_text()

    page.fill("#reason", "Start the rollout")
    with page.expect_navigation():
        page.click("button[data-action=activate]")
    page.wait_for_selector("#content .fragment")
    assert page.locator("#version-status").inner_text().lower() == "live"
    plan = live.client.get("/v1/plans/lesson-length", headers=live.keys.h(live.keys.reader)).json()
    assert plan["live_version"] == v


def test_a_refused_action_shows_the_services_reason(page: Any, live: Live) -> None:
    from apportion.demo.scenario import SUCCESS

    body = {
        "model_id": live.model_id,
        "success_metric": SUCCESS,
        "guardrails": GUARDRAILS,
        "draws": 20,
    }  # type: ignore[attr-defined]
    r = live.client.post(
        "/v1/plans/lesson-length/versions", json=body, headers=live.keys.h(live.keys.approver)
    )
    assert r.status_code == 201, r.text
    v = r.json()["version"]
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/{v}")
    _sign_in(page, live.keys.approver)
    assert "another approver must approve it" in page.locator("#decide .warn").inner_text()
    page.fill(
        "#reason", "ok"
    )  # shorter than the API's 3 characters: the page refuses before sending
    page.click("button[data-action=approve]")
    assert "at least 3 characters" in page.locator("#decision-message").inner_text()
    page.fill("#reason", "Approving my own draft")
    page.click("button[data-action=approve]")
    message = page.locator("#decision-message")
    message.filter(has_text="another approver").wait_for()
    assert "'t-approver@people' drafted" in message.inner_text()  # the service's own problem detail
    assert _version(live, v)["status"] == "draft"


def test_an_analyst_key_can_view_but_not_decide(page: Any, live: Live) -> None:
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/1")
    _sign_in(page, live.keys.analyst)
    assert page.locator("tr.cohort").count() >= 2
    assert page.locator("#decision button").count() == 0
    assert "deciding needs an approver key" in page.locator("#decision").inner_text()


# ---- the forged activation (issue: a crafted link made the page render JSON as HTML) -----------

FORGED_PLAN = "..%5C..%5C..%5Cv1%5Cplans%5Clesson-length"


def _bait(version: int, revision: int) -> str:
    """The notes of the attacker's draft: a form that looks like the page's decision form."""
    return (
        f"<form data-plan=lesson-length data-version={version} data-revision={revision}>"
        "<textarea>ok</textarea><p id=decision-message></p>"
        "<button data-action=activate>Approve version</button></form>"
    )


def _plan(live: Live) -> dict[str, Any]:
    r = live.client.get("/v1/plans/lesson-length", headers=live.keys.h(live.keys.reader))
    assert r.status_code == 200, r.text
    return r.json()


def _click_bait_if_shown(pg: Any) -> None:
    """What the victim does: press the button labelled 'Approve version' if the page shows one."""
    bait = pg.locator("button", has_text="Approve version")
    if bait.count():
        if pg.locator("textarea").count():
            pg.locator("textarea").first.fill("Looks fine")
        bait.first.click(no_wait_after=True)  # a submit button: CSP blocks the form post
    pg.wait_for_timeout(500)  # room for any request the click would send


def test_the_forged_activation_link_activates_nothing(page: Any, live: Live) -> None:
    """The reproducer step by step: an analyst drafts a version whose notes hold a decision form
    aimed at another approved version; an approver who is signed in opens a link whose plan
    segment holds backslashes, and presses the button the page shows."""
    # no report draws: the attack needs two versions, not their impact reports
    target = draft_plan(live.client, live.keys, live.model_id, draws=0)["version"]  # type: ignore[attr-defined]
    approve(live.client, live.keys, target)
    before = _plan(live)
    bait = draft_plan(
        live.client,
        live.keys,
        live.model_id,  # type: ignore[attr-defined]
        notes=_bait(target, before["revision"]),
        draws=0,
    )["version"]

    page.goto(f"{live.base}/ui/plans/lesson-length/versions/1")
    _sign_in(page, live.keys.approver)  # the key now sits in this tab's sessionStorage
    answer = page.goto(f"{live.base}/ui/plans/{FORGED_PLAN}/versions/{bait}")
    assert answer is not None and answer.status == 422  # the segment is no plan key
    assert answer.headers["content-type"].startswith("application/problem+json")
    _click_bait_if_shown(page)

    after = _plan(live)
    assert (after["live_version"], after["revision"]) == (
        before["live_version"],
        before["revision"],
    )
    assert not [u for u in page.requested if u.endswith("/activate")], page.requested


def test_the_page_renders_no_answer_but_a_marked_html_fragment(page: Any, live: Live) -> None:
    """Were a fragment URL ever to answer with the JSON API's body (here: the route is faked to
    do so), the script shows an error instead of inserting the text as HTML."""
    bait = json.dumps({"spec": {"notes": _bait(1, 0)}})
    page.route(
        "**/ui/fragments/plans/lesson-length/versions/1",
        lambda route: route.fulfill(status=200, content_type="application/json", body=bait),
    )
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/1")
    page.fill("#apikey", live.keys.approver)
    page.click("#keyform button[type=submit]")
    page.locator("#content .error").wait_for()
    assert "something other than a review page" in page.locator("#content").inner_text()
    assert page.locator("#content button").count() == 0


def test_buttons_the_page_did_not_make_start_no_decision(page: Any, live: Live) -> None:
    """Markup inside a genuine-looking fragment (a faked answer with the right type and marker)
    holding its own decision button: the page binds nothing to it, so clicking sends nothing."""
    fragment = (
        '<div class="fragment" data-viewer="t-approver" data-role="approver">'
        f'<p class="notes">{_bait(1, 0)}</p></div>'
    )
    page.route(
        "**/ui/fragments/plans/lesson-length/versions/1",
        lambda route: route.fulfill(
            status=200,
            content_type="text/html; charset=utf-8",
            headers={"X-Apportion-Fragment": "1"},
            body=fragment,
        ),
    )
    page.goto(f"{live.base}/ui/plans/lesson-length/versions/1")
    _sign_in(page, live.keys.approver)
    assert page.locator("button", has_text="Approve version").count() == 1
    before = _plan(live)
    _click_bait_if_shown(page)
    assert not [u for u in page.requested if "/v1/" in u], page.requested
    assert _plan(live)["revision"] == before["revision"]
