"""Separation of duties by key owner, and the last admin key."""

from __future__ import annotations

import threading

import pytest
from fastapi.testclient import TestClient
from support import draft_plan, scenario_model


def _issue(client: TestClient, keys, name: str, owner: str, role: str) -> dict:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/keys", json={"name": name, "owner": owner, "role": role}, headers=keys.h(keys.admin)
    )
    assert r.status_code == 201, r.text
    return r.json()


def test_a_key_needs_an_owner_distinct_from_its_name(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/keys", json={"name": "k", "role": "reader"}, headers=keys.h(keys.admin))
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "owner"
    made = _issue(client, keys, "ci-reader", "build@systems", "reader")
    assert (made["name"], made["owner"]) == ("ci-reader", "build@systems")


def test_one_owner_with_two_keys_cannot_approve_their_own_draft(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    """The reproducer: the person who drafted with an analyst key gets an approver key under
    another name and approves. Before owners, the author rule compared key names and let it."""
    model = scenario_model(client, keys, n=8000)
    analyst = _issue(client, keys, "dana-drafting", "dana@people", "analyst")
    approver = _issue(client, keys, "dana-reviewing", "dana@people", "approver")
    v = draft_plan(client, _Keys(analyst["secret"]), model)
    url = f"/v1/plans/lesson-length/versions/{v['version']}/approve"
    r = client.post(url, json={"reason": "looks good"}, headers=keys.h(approver["secret"]))
    assert r.status_code == 403, r.text
    assert "'dana@people' drafted" in r.json()["detail"]
    after = client.get(
        f"/v1/plans/lesson-length/versions/{v['version']}", headers=keys.h(keys.reader)
    )
    assert after.json()["status"] == "draft" and after.json()["author_owner"] == "dana@people"
    # another person's approver key may
    r = client.post(url, json={"reason": "looks good"}, headers=keys.h(keys.approver))
    assert r.status_code == 200, r.text


class _Keys:
    """draft_plan reads `keys.h(keys.analyst)`: a stand-in holding one analyst secret."""

    def __init__(self, analyst: str) -> None:
        self.analyst = analyst

    @staticmethod
    def h(secret: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {secret}"}


def _active_admins(client: TestClient, keys) -> int:  # type: ignore[no-untyped-def]
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        from apportion.store import keys as store

        return sum(
            1 for k in store.all_keys(session=s) if k.role == "admin" and k.revoked_at is None
        )


def test_the_last_active_admin_key_cannot_be_revoked(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    me = client.get("/v1/audit", headers=keys.h(keys.admin))
    assert me.status_code == 200
    second = _issue(client, keys, "ops-2", "ops2@people", "admin")
    assert client.delete(f"/v1/keys/{second['id']}", headers=keys.h(keys.admin)).status_code == 200
    assert _active_admins(client, keys) == 1
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        from apportion.store import keys as store

        (mine,) = [k.id for k in store.all_keys(session=s) if k.name == "t-admin"]
    r = client.delete(f"/v1/keys/{mine}", headers=keys.h(keys.admin))
    assert r.status_code == 409, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "last active admin key" in r.json()["detail"]
    assert _active_admins(client, keys) == 1
    assert client.get("/v1/audit/verify", headers=keys.h(keys.admin)).status_code == 200


@pytest.mark.parametrize("attempt", range(3))
def test_two_admins_revoking_each_other_at_once_leave_one(
    client: TestClient, keys, attempt: int
) -> None:  # type: ignore[no-untyped-def]
    """Both requests race; the row lock taken before counting lets exactly one through."""
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        from apportion.store import keys as store

        (first,) = [k.id for k in store.all_keys(session=s) if k.name == "t-admin"]
    other = _issue(client, keys, f"ops-{attempt}", f"ops{attempt}@people", "admin")
    plan = [(keys.admin, other["id"]), (other["secret"], first)]
    codes: list[int] = []
    barrier = threading.Barrier(2)

    def revoke(secret: str, key_id: int) -> None:
        barrier.wait()
        codes.append(client.delete(f"/v1/keys/{key_id}", headers=keys.h(secret)).status_code)

    threads = [threading.Thread(target=revoke, args=p) for p in plan]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert _active_admins(client, keys) == 1
    # one revocation wins; the other is refused (409: the key it targets is now the last admin
    # key) or, when it authenticates after the winner committed, finds its own key revoked (401)
    assert sorted(codes) in ([200, 401], [200, 409]), codes
