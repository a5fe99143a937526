"""The review page's server-side rendering, on a hand-written payload (tests/web/fixtures.py): the
fragment is well-formed XML, shows every cohort and guardrail, puts marks where the numbers say, and
offers the actions the viewer's role and the version's state allow. No database, no browser."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from collections.abc import Callable
from typing import Any

import pytest
from web.review_fixtures import ARMS, COHORTS, GUARDRAILS, page

from apportion.web import charts, pages

SVG = "{http://www.w3.org/2000/svg}"
APPROVER = {"name": "t-approver", "role": "approver"}
READER = {"name": "t-reader", "role": "reader"}


def _tree(html: str) -> ET.Element:
    # the standard library's XML parser is the outside check that every tag is closed and every
    # value escaped (the fragment is written to be well-formed XML as well as HTML)
    return ET.fromstring(html)


def _by_attr(root: ET.Element, attr: str, value: str) -> list[ET.Element]:
    return [el for el in root.iter() if el.get(attr) == value]


def _text(el: ET.Element) -> str:
    return "".join(el.itertext())


def test_fragment_is_well_formed_and_names_every_cohort_rule() -> None:
    root = _tree(pages.version_fragment(page(), APPROVER))
    rows = [el for el in root.iter("tr") if el.get("class") == "cohort"]
    assert [r.get("data-cohort") for r in rows] == [str(c["id"]) for c in COHORTS]
    for row, cohort in zip(rows, COHORTS, strict=True):
        assert cohort["rule"] in _text(row)
        assert f"{cohort['share'] * 100:.1f}%" in _text(row)


def test_each_cohorts_stacked_bar_has_its_arm_shares_in_arm_order() -> None:
    root = _tree(pages.version_fragment(page(), APPROVER))
    for cohort in COHORTS:
        (row,) = _by_attr(root, "data-cohort", str(cohort["id"]))
        segs = [el for el in row.iter(f"{SVG}rect") if el.get("class") == "segment"]
        want = [(a, cohort["arms"][a]) for a in ARMS if cohort["arms"][a] > 0]
        assert [(s.get("data-arm"), float(s.get("data-share"))) for s in segs] == want
        widths = [float(s.get("width")) for s in segs]
        # the bar is 420 px wide; widths are written with two decimals
        assert sum(widths) == pytest.approx(420, abs=0.02 * len(widths))


def test_every_guardrail_has_an_interval_chart_with_its_limit_and_probability() -> None:
    root = _tree(pages.version_fragment(page(), APPROVER))
    blocks = [
        el
        for el in root.iter("div")
        if el.get("class") == "metric" and el.get("data-role") == "guardrail"
    ]
    assert [b.get("data-metric") for b in blocks] == [g["metric"] for g in GUARDRAILS]
    texts = {b.get("data-metric"): _text(b) for b in blocks}
    # ratio and proportion lifts are written in percentage points: 0.01 -> +1 pp
    assert "limit +1 pp" in texts["abandon_rate"]
    assert "99.7% probability it holds" in texts["abandon_rate"]
    assert "limit +0.5 pp" in texts["cancelled"]
    # a relative guardrail's numbers are per cent of the baseline's value, as the report gives them
    assert "limit +5%" in texts["support_contacts"]
    assert "per cent of the baseline" in texts["support_contacts"]
    assert "93.0% probability it holds" in texts["support_contacts"]


def test_marks_sit_where_the_numbers_put_them() -> None:
    """The dot, the interval's ends and the limit line share one linear scale."""
    root = _tree(pages.version_fragment(page(), APPROVER))
    (block,) = [
        el
        for el in root.iter("div")
        if el.get("data-metric") == "cancelled" and el.get("class") == "metric"
    ]
    (bar,) = [el for el in block.iter(f"{SVG}line") if el.get("class") == "interval-bar"]
    (dot,) = [el for el in block.iter(f"{SVG}circle") if el.get("class") == "estimate"]
    (limit,) = [el for el in block.iter(f"{SVG}line") if el.get("class") == "limit"]
    x_lo, x_hi = float(bar.get("x1")), float(bar.get("x2"))
    lo, hi = float(bar.get("data-lower")), float(bar.get("data-upper"))
    assert (lo, hi) == pytest.approx((-0.26, 0.48))  # the fixture's interval in percentage points

    def at(v: float) -> float:
        return x_lo + (v - lo) / (hi - lo) * (x_hi - x_lo)

    # coordinates are rounded to 0.01 px, so 0.02 px covers two roundings
    assert float(dot.get("cx")) == pytest.approx(at(0.11), abs=0.02)
    assert float(limit.get("x1")) == pytest.approx(at(0.5), abs=0.02)
    assert float(limit.get("x1")) > x_hi  # the interval ends before the limit: it holds


def test_comparison_lists_every_single_arm_the_best_safe_arm_and_the_plan() -> None:
    root = _tree(pages.version_fragment(page(), APPROVER))
    (section,) = _by_attr(root, "id", "comparison")
    heads = [_text(tr.find("th")) for tr in section.iter("tr") if tr.find("th") is not None][1:]
    assert heads == [*ARMS, "best safe arm: adaptive", "this plan"]
    (unsafe,) = [
        tr
        for tr in section.iter("tr")
        if tr.find("th") is not None and _text(tr.find("th")) == "fifteen_min"
    ]
    assert "\u2717 no" in _text(unsafe)
    assert "+1.82 pp" in _text(unsafe)


def test_diff_and_history_are_shown() -> None:
    root = _tree(pages.version_fragment(page(), APPROVER))
    (diff,) = _by_attr(root, "id", "diff")
    assert "41.0%" in _text(diff) and "live version 1" in _text(diff)
    assert "20,000 members" in _text(diff)
    (history,) = _by_attr(root, "id", "history")
    (entry,) = [tr for tr in history.iter("tr") if tr.get("class") == "entry"]
    assert entry.get("data-action") == "plan.draft"
    assert "t-analyst" in _text(entry) and "Second try" in _text(entry)


def test_without_a_live_version_the_diff_says_so() -> None:
    root = _tree(pages.version_fragment(page(live=None), APPROVER))
    (diff,) = _by_attr(root, "id", "diff")
    assert "No version of this plan is live yet." in _text(diff)


def _buttons(html: str) -> list[str]:
    """The actions the page's script will offer: named by the decision form, never as buttons in
    the fragment itself (review.js creates and binds the buttons)."""
    root = _tree(html)
    assert not list(root.iter("button"))
    forms = _by_attr(root, "id", "decide")
    return forms[0].get("data-actions").split() if forms else []


@pytest.mark.parametrize(
    ("status", "activations", "want"),
    [
        ("draft", 1, ["approve", "reject"]),
        ("approved", 1, ["activate"]),
        ("superseded", 2, ["activate"]),
        ("active", 2, ["rollback"]),
        ("active", 1, []),
        ("rejected", 1, []),
    ],
    ids=["draft", "approved", "superseded", "active-with-earlier", "active-first", "rejected"],
)
def test_actions_follow_the_versions_state(status: str, activations: int, want: list[str]) -> None:
    data = page(status)
    data["plan"]["activations"] = [{"version": i + 1} for i in range(activations)]
    assert _buttons(pages.version_fragment(data, APPROVER)) == want


def test_a_reader_sees_no_actions_and_is_told_why() -> None:
    html = pages.version_fragment(page(), READER)
    assert _buttons(html) == []
    assert "deciding needs an approver key" in html


def test_activate_carries_the_revision_the_viewer_saw() -> None:
    root = _tree(pages.version_fragment(page("approved"), APPROVER))
    (form,) = _by_attr(root, "id", "decide")
    assert (form.get("data-plan"), form.get("data-version"), form.get("data-revision")) == (
        "lesson-length",
        "2",
        "3",
    )


def test_the_author_is_warned_before_approving_their_own_draft() -> None:
    html = pages.version_fragment(page(author="t-approver"), APPROVER)
    assert "another approver must approve it" in html


def test_values_from_the_database_are_escaped() -> None:
    data = page()
    data["version"]["allocation"]["cohorts"][0]["rule"] = 'level = "<script>alert(1)</script>"'
    data["history"][0]["reason"] = "<img src=x onerror=alert(1)>"
    html = pages.version_fragment(data, APPROVER)
    assert "<script>" not in html and "<img" not in html
    root = _tree(html)  # still well-formed
    assert 'level = "<script>alert(1)</script>"' in _text(root)


HOSTILE = "<script>alert('x')</script> & <img src=x onerror=\"alert(1)\">"


def _plan_name(d: dict[str, Any], _viewer: dict[str, str]) -> None:
    d["version"]["plan"] = HOSTILE


def _cohort_rule(d: dict[str, Any], _viewer: dict[str, str]) -> None:
    d["version"]["allocation"]["cohorts"][1]["rule"] = HOSTILE
    d["version"]["diff"]["cohorts"][1]["rule"] = HOSTILE


def _arm_name(d: dict[str, Any], _viewer: dict[str, str]) -> None:
    alloc = d["version"]["allocation"]
    alloc["arms"][1] = HOSTILE  # written in the stacked bars (SVG), their titles and the table
    for c in alloc["cohorts"]:
        c["arms"][HOSTILE] = c["arms"].pop("ten_min")


def _notes_and_reason(d: dict[str, Any], _viewer: dict[str, str]) -> None:
    d["version"]["spec"]["notes"] = HOSTILE
    d["history"][0]["reason"] = HOSTILE


def _author_and_viewer(d: dict[str, Any], viewer: dict[str, str]) -> None:
    d["version"]["author"] = HOSTILE
    viewer["name"] = HOSTILE


def _comparison_link(d: dict[str, Any], _viewer: dict[str, str]) -> None:
    d["version"]["spec"]["comparison"] = {"number": 1, "candidate": HOSTILE, "href": HOSTILE}


@pytest.mark.parametrize(
    "plant",
    [_plan_name, _cohort_rule, _arm_name, _notes_and_reason, _author_and_viewer, _comparison_link],
    ids=["plan-name", "cohort-rule", "arm-name", "notes-and-reason", "author-and-viewer", "link"],
)
def test_a_hostile_string_anywhere_in_the_data_renders_as_text(
    plant: Callable[[dict[str, Any], dict[str, str]], None],
) -> None:
    """The templates' autoescaping, checked from outside: the standard library's XML parser reads
    the planted string back as text or as an attribute value, never as markup."""
    data, viewer = page(), {**APPROVER, "owner": "t-approver"}
    plant(data, viewer)
    html = pages.version_fragment(data, viewer)
    assert "<script" not in html and "<img" not in html
    root = _tree(html)
    assert not [el.tag for el in root.iter() if el.tag in ("script", "img")]
    as_text = [el for el in root.iter() if HOSTILE in "".join(el.itertext())]
    as_value = [el for el in root.iter() if HOSTILE in el.attrib.values()]
    assert as_text or as_value


def test_a_hostile_plan_name_or_author_in_the_index_and_shell_renders_as_text() -> None:
    plans = [
        {
            "plan": HOSTILE,
            "live_version": None,
            "revision": 1,
            "versions": [
                {
                    "version": 1,
                    "status": "draft",
                    "author": HOSTILE,
                    "created_at": "2026-03-02T09:14:05+00:00",
                    "method": "chance",
                }
            ],
        }
    ]
    root = _tree(pages.index_fragment(plans, APPROVER))
    (section,) = _by_attr(root, "class", "plan")
    assert section.get("data-plan") == HOSTILE
    assert _text(section).count(HOSTILE) == 2  # the heading and the author
    shell = pages.shell(
        title=HOSTILE, fragment="/ui/fragments/plans", crumbs=[("Plans", "/ui/"), (HOSTILE, None)]
    )
    assert shell.count("<script") == 1 and "<img" not in shell  # only the page's own script
    assert shell.count("&lt;script&gt;") == 2  # the title and the crumb


def test_watch_chart_draws_one_interval_per_upload_against_the_limit() -> None:
    history = [
        {"upload": i + 1, "estimate": 0.1 * i, "lower": 0.1 * i - 0.5, "upper": 0.1 * i + 0.5}
        for i in range(5)
    ]
    svg = charts.watch_chart(
        uid="w", history=history, threshold=0.8, harmful="above", fmt=charts.signed
    )
    root = _tree(svg)
    bars = [el for el in root.iter(f"{SVG}line") if el.get("class") == "watch-interval"]
    assert len(bars) == 5
    (limit,) = [el for el in root.iter(f"{SVG}line") if el.get("class") == "limit"]
    # y grows downwards: the last interval's top (0.9) is above (smaller y than) the limit 0.8
    assert float(bars[-1].get("y2")) < float(limit.get("y1")) < float(bars[-1].get("y1"))
    assert "limit +0.8" in _text(root)


def test_watch_section_appears_only_with_a_watch() -> None:
    data = page("active")
    assert 'id="watch"' not in pages.version_fragment(data, APPROVER)
    data["watch"] = {
        "version": 2,
        "uploads": 2,
        "metrics": [
            {
                "metric": "cancelled",
                "role": "guardrail",
                "status": "holding",
                "threshold": 0.005,
                "history": [
                    {"upload": 1, "estimate": 0.001, "lower": -0.004, "upper": 0.006},
                    {"upload": 2, "estimate": 0.001, "lower": -0.002, "upper": 0.004},
                ],
            }
        ],
    }
    root = _tree(pages.version_fragment(data, APPROVER))
    (watch,) = _by_attr(root, "id", "watch")
    assert "holding" in _text(watch) and "limit +0.5 pp" in _text(watch)


@pytest.mark.parametrize(
    ("x", "want"),
    [(0.0213, "+0.0213"), (-0.4, "\u22120.4"), (0.0, "0"), (12345.0, "+12345"), (1e-5, "+0.00001")],
    ids=["small", "negative", "zero", "large", "tiny"],
)
def test_signed_numbers(x: float, want: str) -> None:
    assert charts.signed(x) == want


def test_shell_holds_no_plan_data_and_loads_only_its_own_files() -> None:
    html = pages.shell(
        title="lesson-length version 2",
        fragment="/ui/fragments/plans/lesson-length/versions/2",
        crumbs=[("Plans", "/ui/"), ("lesson-length", None)],
    )
    refs = re.findall(r'(?:src|href)="([^"]+)"', html)
    assert refs and all(r.startswith("/") and not r.startswith("//") for r in refs), refs
    assert 'data-fragment="/ui/fragments/plans/lesson-length/versions/2"' in html
    assert (
        "<style" not in html and "<script>" not in html
    )  # no inline style or script: CSP forbids them


@pytest.mark.parametrize(
    ("p_holds", "want", "held"),
    [
        (0.9496, "\u2713 at the limit of the required 95%", 3),
        (0.94, "\u2717 below the required 95%", 2),
    ],
    ids=["binding-within-solver-tolerance", "short"],
)
def test_a_binding_chance_guardrail_counts_as_met_within_tolerance(
    p_holds: float, want: str, held: int
) -> None:
    data = page()
    (row,) = [m for m in data["version"]["report"]["metrics"] if m["metric"] == "cancelled"]
    row["probability_holds"] = p_holds
    root = _tree(pages.version_fragment(data, APPROVER))
    (block,) = [
        el
        for el in root.iter("div")
        if el.get("data-metric") == "cancelled" and el.get("class") == "metric"
    ]
    assert want in _text(block)
    assert f"{held} of 3 guardrails hold" in _text(root)


def test_a_report_part_in_the_wrong_shape_is_left_out_and_the_rest_shows() -> None:
    """The report is read through its answer model (apportion.schemas.plans): comparison rows
    without their required fields are dropped, the metrics still show."""
    data = page()
    data["version"]["report"]["comparison"] = [{"plan": "arm 0 for everyone"}]  # no 'available'
    root = _tree(pages.version_fragment(data, APPROVER))
    (section,) = _by_attr(root, "id", "comparison")
    assert "no single-arm comparison" in _text(section)
    assert "99.7% probability it holds" in _text(root)


def test_the_summary_names_the_features_not_used_for_personalization() -> None:
    data = {**page(), "not_personalized": [{"key": "age_band", "reason": "legal review <pending>"}]}
    root = _tree(pages.version_fragment(data, READER))
    (facts,) = [el for el in root.iter("dl") if el.get("class") == "facts"]
    pairs = dict(zip([_text(d) for d in facts.iter("dt")], [_text(d) for d in facts.iter("dd")],
                     strict=True))  # fmt: skip
    assert pairs["Not used for personalization"] == "age_band (legal review <pending>)"
    plain = _tree(pages.version_fragment(page(), READER))
    assert "Not used for personalization" not in _text(plain)


def _with_reading(lift: float, se: float) -> dict[str, Any]:
    from apportion.usecases.plans.views import held_out_reading

    data = page()
    report = data["version"]["report"]
    report["held_out"]["metrics"]["active_days"] = {"lift": lift, "se": se}
    report["held_out"]["reading"] = held_out_reading(report, "active_days")
    return data


def test_the_held_out_section_says_what_it_measures_and_warns_only_when_short() -> None:
    # the fixture projects active_days at [0.127, 0.249]; 0.015 +/- 0.012 lies entirely below it
    short = _tree(pages.version_fragment(_with_reading(0.015, 0.012), READER))
    (warning,) = _by_attr(short, "id", "held-out-warning")
    assert warning.get("role") == "alert" and "entirely below" in _text(warning)
    (measures,) = _by_attr(short, "id", "held-out-measures")
    assert "scores the procedure, not this version" in _text(measures)
    fine = _tree(pages.version_fragment(_with_reading(0.2, 0.04), READER))
    assert not _by_attr(fine, "id", "held-out-warning")
    assert _by_attr(fine, "id", "held-out-measures")
