"""Regenerate docs/review-page.png: a live server with the scenario plan (version 1, guardrails on
point estimates, live; version 2, chance-constrained, drafted against it), the version 2 review
page opened with an approver key in headless Chromium.

    .venv/bin/python tests/web/screenshot.py [docs/review-page.png]
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT / "tests"), str(ROOT)]

from support import draft_plan  # noqa: E402
from web.live import CHROMIUM, launch_chromium, live_server  # noqa: E402
from web.live import build_plan as _build  # noqa: E402


def main(out: Path) -> None:
    if not CHROMIUM.exists():
        raise SystemExit(f"{CHROMIUM} is absent: apt-get install chromium")
    from playwright.sync_api import sync_playwright

    with tempfile.TemporaryDirectory() as tmp, live_server(f"sqlite:///{tmp}/apportion.db") as live:
        # the demo's size and the cohort model's own defaults (max_depth 6, 5-fold pruning)
        model_id, first = _build(live, n=200_000, params={"seed": 1}, method="deterministic")
        h = live.keys.h
        v1 = first["version"]
        r = live.client.post(
            f"/v1/plans/lesson-length/versions/{v1}/approve",
            json={"reason": "First personalized plan"},
            headers=h(live.keys.approver),
        )
        assert r.status_code == 200, r.text
        rev = live.client.get("/v1/plans/lesson-length", headers=h(live.keys.reader)).json()[
            "revision"
        ]
        r = live.client.post(
            "/v1/plans/lesson-length/activate",
            json={"version": v1, "reason": "Roll out to learners", "expected_revision": rev},
            headers=h(live.keys.approver),
        )
        assert r.status_code == 200, r.text
        v2 = draft_plan(
            live.client,
            live.keys,
            model_id,
            method="chance",
            draws=200,
            notes="Guardrails at 80 % confidence each instead of on point estimates",
        )["version"]
        with sync_playwright() as p:
            browser = launch_chromium(p)
            page = browser.new_page(viewport={"width": 1200, "height": 900}, device_scale_factor=1)
            page.goto(f"{live.base}/ui/plans/lesson-length/versions/{v2}")
            page.fill("#apikey", live.keys.approver)
            page.click("#keyform button[type=submit]")
            page.wait_for_selector("#content .fragment")
            page.screenshot(path=str(out), full_page=True)
            browser.close()
    print(out)


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else ROOT / "docs" / "review-page.png")
