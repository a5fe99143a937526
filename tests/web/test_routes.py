"""The /ui routes without a browser: the shell is public and data-free, fragments need a reader key,
the static files come from the app itself, and every answer carries the strict CSP."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import pytest
from fastapi.testclient import TestClient
from snapshots import module_snapshot
from support import draft_plan, launch, scenario_model


def _drafted(client: TestClient, keys) -> dict:  # type: ignore[no-untyped-def]
    return {"drafted": draft_plan(client, keys, scenario_model(client, keys, n=8000))}


# one fit and one draft for the module; each test gets its own copy of that database
snap, db_url, keys = module_snapshot(_drafted)


@pytest.fixture
def drafted(snap) -> dict:  # type: ignore[no-untyped-def]
    return snap.data["drafted"]


def test_shell_needs_no_key_and_allows_only_this_origin(client: TestClient) -> None:
    r = client.get("/ui/plans/lesson-length/versions/1")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    csp = r.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "script-src 'self'" in csp and "style-src 'self'" in csp
    assert 'data-fragment="/ui/fragments/plans/lesson-length/versions/1"' in r.text
    assert client.get("/ui", follow_redirects=False).headers["location"] == "/ui/"


# The plan segment of the forged-activation reproducer: backslashes that a browser turns into
# slashes when the page builds its fragment URL, walking it over to the JSON API.
FORGED_PLAN = "..%5C..%5C..%5Cv1%5Cplans%5Clesson-length"


@pytest.mark.parametrize(
    "path",
    [
        f"/ui/plans/{FORGED_PLAN}/versions/3",
        f"/ui/fragments/plans/{FORGED_PLAN}/versions/3",
        "/ui/plans/Lesson.Length/versions/3",
        "/ui/plans/lesson%00length/versions/3",
    ],
)
def test_a_page_for_a_segment_that_is_no_plan_key_is_refused(
    client: TestClient, keys, path: str
) -> None:  # type: ignore[no-untyped-def]
    r = client.get(path, headers=keys.h(keys.reader))
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert r.json()["errors"][0]["field"] == "path.plan"
    assert "data-fragment" not in r.text


@pytest.mark.parametrize(
    ("method", "path"),
    [
        ("GET", f"/v1/plans/{FORGED_PLAN}"),
        ("GET", f"/v1/plans/{FORGED_PLAN}/versions/1"),
        ("POST", f"/v1/plans/{FORGED_PLAN}/activate"),
        ("GET", f"/v1/plans/{FORGED_PLAN}/watch"),
        ("GET", "/v1/experiments/a%5Cb"),
        ("POST", "/v1/experiments/a%5Cb/models"),
    ],
)
def test_every_route_checks_its_key_segment(
    client: TestClient, keys, method: str, path: str
) -> None:  # type: ignore[no-untyped-def]
    r = client.request(method, path, headers=keys.h(keys.admin), json={})
    assert r.status_code == 422, r.text
    fields = [e["field"] for e in r.json()["errors"]]
    assert "path.plan" in fields or "path.key" in fields, fields


def test_fragments_carry_the_marker_the_page_script_requires(
    client: TestClient, keys, drafted: dict
) -> None:  # type: ignore[no-untyped-def]
    for path in ("/ui/fragments/plans", "/ui/fragments/plans/lesson-length/versions/1"):
        r = client.get(path, headers=keys.h(keys.reader))
        assert r.status_code == 200 and r.headers["x-apportion-fragment"] == "1"
    shell = client.get("/ui/plans/lesson-length/versions/1")
    assert "x-apportion-fragment" not in shell.headers  # the shell is no fragment
    api = client.get("/v1/plans/lesson-length/versions/1", headers=keys.h(keys.reader))
    assert "x-apportion-fragment" not in api.headers


def test_fragment_without_a_key_is_401_problem_json(client: TestClient) -> None:
    r = client.get("/ui/fragments/plans/lesson-length/versions/1")
    assert r.status_code == 401
    assert r.headers["content-type"].startswith("application/problem+json")


def test_fragment_with_a_reader_key_shows_the_plan(client: TestClient, keys, drafted: dict) -> None:  # type: ignore[no-untyped-def]
    r = client.get("/ui/fragments/plans/lesson-length/versions/1", headers=keys.h(keys.reader))
    assert r.status_code == 200, r.text
    root = ET.fromstring(r.text)  # well-formed: stdlib XML parser
    rules = ["".join(td.itertext()) for td in root.iter("td") if td.get("class") == "rule"]
    assert rules == [c["rule"] for c in drafted["allocation"]["cohorts"]]
    guard = [d.get("data-metric") for d in root.iter("div") if d.get("data-role") == "guardrail"]
    assert guard == [g["metric"] for g in drafted["spec"]["guardrails"]]
    assert root.get("data-role") == "reader"


def test_unknown_version_is_404(client: TestClient, keys, drafted: dict) -> None:  # type: ignore[no-untyped-def]
    r = client.get("/ui/fragments/plans/lesson-length/versions/99", headers=keys.h(keys.reader))
    assert r.status_code == 404


def test_index_fragment_lists_plans(client: TestClient, keys, drafted: dict) -> None:  # type: ignore[no-untyped-def]
    r = client.get("/ui/fragments/plans", headers=keys.h(keys.reader))
    assert r.status_code == 200
    assert 'href="/ui/plans/lesson-length/versions/1"' in r.text


@pytest.mark.parametrize(
    ("name", "ctype"), [("review.css", "text/css"), ("review.js", "text/javascript")]
)
def test_static_files_are_served_by_the_app(client: TestClient, name: str, ctype: str) -> None:
    r = client.get(f"/ui/static/{name}")
    assert (
        r.status_code == 200
        and r.headers["content-type"].startswith(ctype)
        and len(r.content) > 500
    )
    assert "http://" not in r.text and "https://" not in r.text  # nothing from another origin


def test_only_known_static_files_are_served(client: TestClient) -> None:
    assert client.get("/ui/static/..%2Fpages.py").status_code == 404
    assert client.get("/ui/static/other.js").status_code == 404


def test_live_version_page_draws_the_guardrail_watch(
    client: TestClient, keys, drafted: dict
) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.postlaunch import post_launch_csv

    launch(client, keys, 1)
    compiled = client.app.state.services.plans.get("lesson-length")  # type: ignore[attr-defined]
    for seed in (5, 6):
        r = client.post(
            "/v1/plans/lesson-length/monitor",
            content=post_launch_csv(compiled, 2000, seed=seed, id_prefix=f"s{seed}-"),
            headers={**keys.h(keys.analyst), "content-type": "text/csv"},
        )
        assert r.status_code == 200, r.text
    r = client.get("/ui/fragments/plans/lesson-length/versions/1", headers=keys.h(keys.reader))
    root = ET.fromstring(r.text)
    (watch,) = [s for s in root.iter("section") if s.get("id") == "watch"]
    blocks = [d for d in watch.iter("div") if d.get("data-metric")]
    assert [b.get("data-metric") for b in blocks] == [
        g["metric"] for g in drafted["spec"]["guardrails"]
    ]
    for b in blocks:
        bars = [
            el
            for el in b.iter("{http://www.w3.org/2000/svg}line")
            if el.get("class") == "watch-interval"
        ]
        assert len(bars) == 2  # one interval per upload
