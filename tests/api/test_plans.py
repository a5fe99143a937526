"""Plan versions and their lifecycle through the HTTP API (issues 4 and 5)."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from support import draft_plan, scenario_model

from apportion.store.plans import ImmutableVersion


@pytest.fixture
def model_id(client: TestClient, keys) -> int:  # type: ignore[no-untyped-def]
    return scenario_model(client, keys)


def test_draft_has_allocation_report_and_audit(client: TestClient, keys, model_id: int) -> None:  # type: ignore[no-untyped-def]
    v = draft_plan(client, keys, model_id)
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


def test_lifecycle_approve_activate_rollback(client: TestClient, keys, model_id: int) -> None:  # type: ignore[no-untyped-def]
    h_app, h_app2 = keys.h(keys.approver), keys.h(keys.approver2)
    draft_plan(client, keys, model_id)
    draft_plan(client, keys, model_id, method="deterministic")
    # the author may not approve (analyst role is too low anyway: use an approver-authored draft)
    own = client.post(
        "/v1/plans/lesson-length/versions",
        json={"model_id": model_id, "success_metric": "active_days", "guardrails": [], "draws": 0},
        headers=h_app,
    ).json()
    assert (
        client.post(
            f"/v1/plans/lesson-length/versions/{own['version']}/approve",
            json={"reason": "mine"},
            headers=h_app,
        ).status_code
        == 403
    )
    # approve 1 and 2, activate 1
    for v in (1, 2):
        r = client.post(
            f"/v1/plans/lesson-length/versions/{v}/approve",
            json={"reason": "looks safe"},
            headers=h_app,
        )
        assert r.status_code == 200 and r.json()["status"] == "approved"
    assert (
        client.post(
            "/v1/plans/lesson-length/versions/1/approve", json={"reason": "again"}, headers=h_app2
        ).status_code
        == 409
    )
    r = client.post(
        "/v1/plans/lesson-length/activate",
        json={"version": 1, "reason": "launch", "expected_revision": 0},
        headers=h_app,
    )
    assert r.status_code == 200 and r.json()["revision"] == 1
    stale = client.post(
        "/v1/plans/lesson-length/activate",
        json={"version": 2, "reason": "too soon", "expected_revision": 0},
        headers=h_app2,
    )
    assert stale.status_code == 409 and stale.json()["current_revision"] == 1
    a = client.post(
        "/v1/plans/lesson-length/assign",
        json={"member_id": "m-1", "features": {"level": "advanced"}},
        headers=keys.h(keys.reader),
    ).json()
    assert a["plan_version"] == 1 and a["arm"] in ("five_min", "ten_min", "fifteen_min", "adaptive")
    assert (
        client.post(
            "/v1/plans/lesson-length/activate",
            json={"version": 2, "reason": "v2", "expected_revision": 1},
            headers=h_app,
        ).status_code
        == 200
    )
    v2 = client.get("/v1/plans/lesson-length/versions/2", headers=keys.h(keys.reader)).json()
    assert v2["status"] == "active" and v2["live"] is True
    r = client.post("/v1/plans/lesson-length/rollback", json={"reason": "ops drill"}, headers=h_app)
    assert r.status_code == 200 and r.json()["to_version"] == 1 and r.json()["from_version"] == 2
    plan = client.get("/v1/plans/lesson-length", headers=keys.h(keys.reader)).json()
    assert plan["live_version"] == 1 and [a["kind"] for a in plan["activations"]] == [
        "activate",
        "activate",
        "rollback",
    ]
    assert (
        client.post(
            "/v1/plans/lesson-length/assign",
            json={"member_id": "m-1", "features": {}},
            headers=keys.h(keys.reader),
        ).json()["plan_version"]
        == 1
    )
    # rejected versions can never go live
    assert (
        client.post(
            f"/v1/plans/lesson-length/versions/{own['version']}/reject",
            json={"reason": "no guardrails"},
            headers=h_app2,
        ).json()["status"]
        == "rejected"
    )
    r = client.post(
        "/v1/plans/lesson-length/activate",
        json={"version": own["version"], "reason": "too soon", "expected_revision": 3},
        headers=h_app,
    )
    assert r.status_code == 409
    assert client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()["intact"] is True


def test_approved_version_can_never_change(client: TestClient, keys, model_id: int) -> None:  # type: ignore[no-untyped-def]
    draft_plan(client, keys, model_id)
    client.post(
        "/v1/plans/lesson-length/versions/1/approve",
        json={"reason": "ok"},
        headers=keys.h(keys.approver),
    )
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


def test_assign_without_live_version_is_404(client: TestClient, keys, model_id: int) -> None:  # type: ignore[no-untyped-def]
    draft_plan(client, keys, model_id)
    r = client.post(
        "/v1/plans/lesson-length/assign",
        json={"member_id": "m", "features": {}},
        headers=keys.h(keys.reader),
    )
    assert r.status_code == 404 and r.headers["content-type"].startswith("application/problem+json")


def test_wrong_feature_type_is_422(client: TestClient, keys, model_id: int) -> None:  # type: ignore[no-untyped-def]
    draft_plan(client, keys, model_id)
    client.post(
        "/v1/plans/lesson-length/versions/1/approve",
        json={"reason": "ok"},
        headers=keys.h(keys.approver),
    )
    client.post(
        "/v1/plans/lesson-length/activate",
        json={"version": 1, "reason": "go", "expected_revision": 0},
        headers=keys.h(keys.approver),
    )
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
