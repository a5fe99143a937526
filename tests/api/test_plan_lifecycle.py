"""A plan version's lifecycle through the HTTP API, one behaviour per test: who may approve, one
approval per version, activation against the revision the caller saw, rollback, and rejection.

Every test starts from a copy of one database: the scenario's model, versions 1 (chance) and 2
(deterministic) drafted by the analyst key, and version 3 drafted by the first approver's key."""

from __future__ import annotations

from fastapi.testclient import TestClient
from snapshots import module_snapshot
from support import activate, approve, draft_plan, launch, scenario_model

PLAN = "/v1/plans/lesson-length"


def _three_drafts(client: TestClient, keys) -> dict:  # type: ignore[no-untyped-def]
    model = scenario_model(client, keys)
    draft_plan(client, keys, model)
    draft_plan(client, keys, model, method="deterministic")
    own = client.post(
        f"{PLAN}/versions",
        json={"model_id": model, "success_metric": "active_days", "guardrails": [], "draws": 0},
        headers=keys.h(keys.approver),
    )
    assert own.status_code == 201, own.text
    assert own.json()["version"] == 3
    return {"model": model}


snap, db_url, keys = module_snapshot(_three_drafts)


def _plan(client: TestClient, keys) -> dict:  # type: ignore[no-untyped-def]
    return client.get(PLAN, headers=keys.h(keys.reader)).json()


def test_the_author_may_not_approve_their_own_draft(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        f"{PLAN}/versions/3/approve", json={"reason": "mine"}, headers=keys.h(keys.approver)
    )
    assert r.status_code == 403, r.text
    assert client.get(f"{PLAN}/versions/3", headers=keys.h(keys.reader)).json()["status"] == "draft"


def test_a_version_is_approved_once(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    assert approve(client, keys, 1)["status"] == "approved"
    again = client.post(
        f"{PLAN}/versions/1/approve", json={"reason": "again"}, headers=keys.h(keys.approver2)
    )
    assert again.status_code == 409, again.text


def test_activation_against_a_stale_revision_is_409(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    approve(client, keys, 1)
    approve(client, keys, 2)
    assert activate(client, keys, 1, expected_revision=0)["revision"] == 1
    stale = client.post(
        f"{PLAN}/activate",
        json={"version": 2, "reason": "too soon", "expected_revision": 0},
        headers=keys.h(keys.approver2),
    )
    assert stale.status_code == 409 and stale.json()["current_revision"] == 1
    assert _plan(client, keys)["live_version"] == 1


def test_the_live_version_answers_assignments(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    launch(client, keys, 1)
    a = client.post(
        f"{PLAN}/assign",
        json={"member_id": "m-1", "features": {"level": "advanced"}},
        headers=keys.h(keys.reader),
    ).json()
    # the scenario's arms (apportion/demo/scenario.py)
    assert a["plan_version"] == 1 and a["arm"] in ("five_min", "ten_min", "fifteen_min", "adaptive")


def test_rollback_returns_to_the_previous_live_version(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    launch(client, keys, 1, 2)
    v2 = client.get(f"{PLAN}/versions/2", headers=keys.h(keys.reader)).json()
    assert v2["status"] == "active" and v2["live"] is True
    r = client.post(f"{PLAN}/rollback", json={"reason": "ops drill"}, headers=keys.h(keys.approver))
    assert r.status_code == 200 and r.json()["to_version"] == 1 and r.json()["from_version"] == 2
    plan = _plan(client, keys)
    assert plan["live_version"] == 1
    assert [a["kind"] for a in plan["activations"]] == ["activate", "activate", "rollback"]
    after = client.post(
        f"{PLAN}/assign", json={"member_id": "m-1", "features": {}}, headers=keys.h(keys.reader)
    )
    assert after.json()["plan_version"] == 1
    assert client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()["intact"] is True


def test_a_rejected_version_can_never_go_live(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        f"{PLAN}/versions/3/reject",
        json={"reason": "no guardrails"},
        headers=keys.h(keys.approver2),
    )
    assert r.status_code == 200 and r.json()["status"] == "rejected"
    # the revision is the current one, so the refusal is about the version's status
    r = client.post(
        f"{PLAN}/activate",
        json={"version": 3, "reason": "too soon", "expected_revision": 0},
        headers=keys.h(keys.approver),
    )
    assert r.status_code == 409, r.text
    assert _plan(client, keys)["live_version"] is None
