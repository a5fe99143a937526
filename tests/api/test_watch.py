"""The guardrail watch through the HTTP API: uploads accumulate, duplicates count once,
holdout flags are checked against the lookup, and a confirmed harm rolls the plan back by itself."""

from __future__ import annotations

import io

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest
from fastapi.testclient import TestClient
from snapshots import module_snapshot
from support import draft_plan, launch, scenario_model

from apportion.demo.postlaunch import harm_to_beginners, post_launch_csv
from apportion.schemas.common import dump
from apportion.schemas.watch import MonitorResult, WatchView

CSV = {"content-type": "text/csv"}


def _two_live_versions(client: TestClient, keys) -> dict:  # type: ignore[no-untyped-def]
    """Versions 1 and 2 approved; 1 went live first, then 2 (so a rollback has somewhere to go)."""
    model = scenario_model(client, keys)
    draft_plan(client, keys, model, holdout={"share": 0.2})
    draft_plan(client, keys, model, holdout={"share": 0.2}, method="deterministic")
    launch(client, keys, 1, 2)
    return {}


# one fit, two drafts and two activations for the module; each test gets its own copy
snap, db_url, keys = module_snapshot(_two_live_versions)


@pytest.fixture
def live_plan(client: TestClient, keys):  # type: ignore[no-untyped-def]
    return client.app.state.services  # type: ignore[attr-defined]


# after launch, every non-control arm raises abandonment of beginners by 15 points (invented)
_harm_beginners = harm_to_beginners(0.15)


def test_uploads_accumulate_and_duplicates_count_once(client: TestClient, keys, live_plan) -> None:  # type: ignore[no-untyped-def]
    compiled = live_plan.plans.get("lesson-length")
    first = post_launch_csv(compiled, 3000, seed=5)
    r = client.post(
        "/v1/plans/lesson-length/monitor", content=first, headers={**keys.h(keys.analyst), **CSV}
    )
    assert r.status_code == 200, r.text
    out = r.json()
    assert (
        out["version"] == 2
        and out["rows"] == 3000
        and out["members"] == 3000
        and out["replaced"] == 0
    )
    assert out["holdout_flag_disagreement"] == 0.0
    assert {m["metric"] for m in out["metrics"]} == {
        "active_days",
        "abandon_rate",
        "cancelled",
        "support_contacts",
    }
    # the same members again (later rows win) plus new ones
    again = post_launch_csv(compiled, 4000, seed=6)
    out2 = client.post(
        "/v1/plans/lesson-length/monitor", content=again, headers={**keys.h(keys.analyst), **CSV}
    ).json()
    assert out2["replaced"] == 3000 and out2["members"] == 4000
    watch = client.get("/v1/plans/lesson-length/watch", headers=keys.h(keys.reader)).json()
    assert watch["uploads"] == 2
    abandon = next(m for m in watch["metrics"] if m["metric"] == "abandon_rate")
    assert [h["upload"] for h in abandon["history"]] == [1, 2] and abandon["status"] in (
        "holding",
        "inconclusive",
    )
    audit = client.get(
        "/v1/audit",
        params={"entity": "plan_version", "entity_id": "lesson-length/2"},
        headers=keys.h(keys.reader),
    ).json()
    assert [e["action"] for e in audit["entries"]].count("watch.upload") == 2


def _with_holdout(body: bytes, flags: np.ndarray) -> bytes:
    t = pacsv.read_csv(io.BytesIO(body))
    t = t.set_column(t.schema.get_field_index("holdout"), "holdout", pa.array(flags))
    buf = io.BytesIO()
    pacsv.write_csv(t, buf)
    return buf.getvalue()


def test_holdout_flags_that_disagree_with_the_lookup_are_not_evidence(
    client: TestClient, keys, live_plan
) -> None:  # type: ignore[no-untyped-def]
    """Rows whose stated holdout flag is not what the plan's lookup gives are left out; above
    APPORTION_WATCH_MAX_FLAG_DISAGREEMENT (1 %) the upload is refused whole, naming the share.
    The reproducer: invented rows with the flag alternating, automatic rollback on."""
    h, ha = keys.h(keys.approver), {**keys.h(keys.analyst), **CSV}
    client.post(
        "/v1/plans/lesson-length/auto-rollback",
        json={"enabled": True, "min_units_per_group": 100, "reason": "protect"},
        headers=h,
    )
    compiled = live_plan.plans.get("lesson-length")
    honest = post_launch_csv(compiled, 4000, seed=7, harm=_harm_beginners)
    true_flags = np.asarray(pacsv.read_csv(io.BytesIO(honest)).column("holdout"), dtype=bool)
    alternating = _with_holdout(honest, np.arange(4000) % 2 == 0)
    r = client.post("/v1/plans/lesson-length/monitor", content=alternating, headers=ha)
    assert r.status_code == 422, r.text
    expected = float(np.mean(true_flags != (np.arange(4000) % 2 == 0)))
    err = r.json()["errors"][0]
    assert err["column"] == "holdout" and err["share"] == pytest.approx(expected, abs=1e-12)
    assert f"{expected:.2%}" in r.json()["detail"]
    watch = client.get("/v1/plans/lesson-length/watch", headers=keys.h(keys.reader)).json()
    assert watch["uploads"] == 0 and watch["live_version"] == 2  # nothing stored, no rollback
    uploads = client.get(
        "/v1/audit", params={"entity_id": "lesson-length/2"}, headers=keys.h(keys.reader)
    ).json()["entries"]
    assert [e for e in uploads if e["action"] == "watch.upload"] == []

    # a few flipped flags (0.5 %): accepted, and exactly those rows are left out
    flipped = true_flags.copy()
    flipped[:20] = ~flipped[:20]
    out = client.post(
        "/v1/plans/lesson-length/monitor",
        content=_with_holdout(post_launch_csv(compiled, 4000, seed=7), flipped),
        headers=ha,
    ).json()
    assert out["rows"] == 4000 and out["rows_excluded"] == 20 and out["members"] == 3980
    assert out["holdout_flag_disagreement"] == pytest.approx(20 / 4000, abs=1e-12)


def test_bad_monitor_upload_is_422_and_stores_nothing(client: TestClient, keys, live_plan) -> None:  # type: ignore[no-untyped-def]
    compiled = live_plan.plans.get("lesson-length")
    body = post_launch_csv(compiled, 100, seed=8).replace(b"member_id", b"learner", 1)
    r = client.post(
        "/v1/plans/lesson-length/monitor", content=body, headers={**keys.h(keys.analyst), **CSV}
    )
    assert r.status_code == 422 and "member_id" in r.text
    assert (
        client.get("/v1/plans/lesson-length/watch", headers=keys.h(keys.reader)).json()["uploads"]
        == 0
    )


def test_confirmed_harm_rolls_back_once_with_evidence(client: TestClient, keys, live_plan) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/plans/lesson-length/auto-rollback",
        json={"enabled": True, "min_units_per_group": 500, "reason": "protect"},
        headers=keys.h(keys.approver),
    )
    assert r.status_code == 200
    compiled = live_plan.plans.get("lesson-length")
    assert compiled.version == 2
    rolled = []
    for batch in range(8):
        body = post_launch_csv(
            compiled, 4000, seed=100 + batch, harm=_harm_beginners, id_prefix=f"b{batch}-"
        )
        out = client.post(
            "/v1/plans/lesson-length/monitor",
            params={"version": 2},
            content=body,
            headers={**keys.h(keys.analyst), **CSV},
        ).json()
        if out["rolled_back"]:
            rolled.append(batch)
            # the answer as its schema declares it, undeclared keys refused (the evidence too)
            assert dump(MonitorResult.model_validate(out, extra="forbid")) == out
    assert len(rolled) >= 1
    plan = client.get("/v1/plans/lesson-length", headers=keys.h(keys.reader)).json()
    assert plan["live_version"] == 1
    # the watch of the rolled-back version says so (the upload's stored result records it)
    watch = client.get("/v1/plans/lesson-length/watch", params={"version": 2},
                       headers=keys.h(keys.reader)).json()  # fmt: skip
    assert watch["rolled_back"] is not None
    assert dump(WatchView.model_validate(watch, extra="forbid")) == watch
    assert [a["kind"] for a in plan["activations"]].count(
        "rollback"
    ) == 1  # exactly once, although later uploads still breach
    entries = client.get(
        "/v1/audit",
        params={"entity": "plan", "actor": "guardrail-watch"},
        headers=keys.h(keys.reader),
    ).json()["entries"]
    assert len(entries) == 1
    ev = entries[0]["payload"]["evidence"]
    assert (
        ev["guardrail"] == "abandon_rate"
        and ev["interval"][0] > ev["threshold"]
        and ev["units"]["plan"] >= 500
    )
    # the entry names the upload that triggered it and who sent it
    # (by owner, as the author check compares owners; the key's name beside it)
    assert ev["upload"] == rolled[0] + 1
    assert ev["uploaded_by"] == "t-analyst@people" and ev["uploaded_with_key"] == "t-analyst"
    a = client.post(
        "/v1/plans/lesson-length/assign",
        json={"member_id": "x", "features": {}},
        headers=keys.h(keys.reader),
    ).json()
    assert a["plan_version"] == 1
    assert client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()["intact"] is True


def test_auto_rollback_needs_an_approver(client: TestClient, keys, live_plan) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/plans/lesson-length/auto-rollback",
        json={"enabled": True, "reason": "x" * 5},
        headers=keys.h(keys.analyst),
    )
    assert r.status_code == 403
