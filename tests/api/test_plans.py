"""Plan versions and their lifecycle through the HTTP API (issues 4 and 5)."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from snapshots import module_snapshot
from support import approve, draft_plan, launch, scenario_model

from apportion.store.plans import ImmutableVersion


def _drafted(client: TestClient, keys) -> dict:  # type: ignore[no-untyped-def]
    model = scenario_model(client, keys)
    return {"model": model, "draft": draft_plan(client, keys, model)}


# one fit and one draft (version 1) for the module; each test gets its own copy of that database
snap, db_url, keys = module_snapshot(_drafted)


@pytest.fixture
def model_id(snap) -> int:  # type: ignore[no-untyped-def]
    return int(snap.data["model"])


def test_draft_has_allocation_report_and_audit(client: TestClient, keys, snap) -> None:  # type: ignore[no-untyped-def]
    v = snap.data["draft"]
    assert v["version"] == 1 and v["status"] == "draft" and v["author"] == "t-analyst"
    cohorts = v["allocation"]["cohorts"]
    assert cohorts and all(abs(sum(c["arms"].values()) - 1) < 1e-9 for c in cohorts)
    assert v["report"]["status"] == "complete" and "held_out" in v["report"]
    plan = client.get("/v1/plans/lesson-length", headers=keys.h(keys.reader)).json()
    assert (
        plan["live_version"] is None
        and plan["revision"] == 0
        and [x["version"] for x in plan["versions"]] == [1]
    )
    audit = client.get(
        "/v1/audit", params={"entity": "plan_version"}, headers=keys.h(keys.reader)
    ).json()["entries"]
    assert [(e["action"], e["entity_id"]) for e in audit] == [("plan.draft", "lesson-length/1")]


def test_unknown_guardrail_metric_and_bad_confidence_are_422(
    client: TestClient, keys, model_id: int
) -> None:  # type: ignore[no-untyped-def]
    bad = client.post(
        "/v1/plans/p1/versions",
        json={
            "model_id": model_id,
            "success_metric": "active_days",
            "guardrails": [{"metric": "nope", "threshold": 0.01}],
        },
        headers=keys.h(keys.analyst),
    )
    assert bad.status_code == 422 and "nope" in bad.json()["detail"]
    bad = client.post(
        "/v1/plans/p1/versions",
        json={
            "model_id": model_id,
            "success_metric": "active_days",
            "guardrails": [{"metric": "cancelled", "threshold": 0.01, "confidence": 0.4}],
        },
        headers=keys.h(keys.analyst),
    )
    assert bad.status_code == 422
    bad = client.post(
        "/v1/plans/p1/versions",
        json={
            "model_id": model_id,
            "success_metric": "active_days",
            "guardrails": [{"metric": "cancelled", "threshold": -0.01}],
        },
        headers=keys.h(keys.analyst),
    )
    assert bad.status_code == 422
    assert client.get("/v1/plans/p1", headers=keys.h(keys.reader)).status_code == 404


def test_approved_version_can_never_change(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    approve(client, keys, 1)
    from apportion.store import plans as repo

    db = client.app.state.services.db  # type: ignore[attr-defined]
    with pytest.raises(ImmutableVersion):
        with db.write() as s:
            row = repo.get_version(session=s, plan="lesson-length", version=1)
            row.allocation = {**row.allocation, "matrix": [[1.0, 0, 0, 0]]}
    with db.read() as s:
        assert repo.get_version(session=s, plan="lesson-length", version=1).allocation[
            "matrix"
        ] != [[1.0, 0, 0, 0]]


def test_assign_without_live_version_is_404(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/plans/lesson-length/assign",
        json={"member_id": "m", "features": {}},
        headers=keys.h(keys.reader),
    )
    assert r.status_code == 404 and r.headers["content-type"].startswith("application/problem+json")


def test_wrong_feature_type_is_422(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    launch(client, keys, 1)
    r = client.post(
        "/v1/plans/lesson-length/assign",
        json={"member_id": "m", "features": {"tenure_days": "long"}},
        headers=keys.h(keys.reader),
    )
    assert r.status_code == 422 and "tenure_days" in r.json()["detail"]
    r = client.post(
        "/v1/plans/lesson-length/assign/batch",
        json={"members": [{"member_id": f"m{i}", "features": {}} for i in range(5)]},
        headers=keys.h(keys.reader),
    )
    assert r.status_code == 200 and len(r.json()["assignments"]) == 5
