"""The audit chain."""

from __future__ import annotations

from fastapi.testclient import TestClient
from sqlalchemy import update

from apportion.store.tables import AuditEntry


def _make_entries(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    for i in range(4):
        client.post(
            "/v1/keys",
            json={"name": f"k{i}", "owner": f"k{i}@people", "role": "reader"},
            headers=keys.h(keys.admin),
        )


def test_entries_carry_who_what_when_and_hashes(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _make_entries(client, keys)
    entries = client.get(
        "/v1/audit", params={"entity": "api_key", "actor": "t-admin"}, headers=keys.h(keys.reader)
    ).json()["entries"]
    assert len(entries) == 4
    e = entries[0]
    assert (
        e["actor_name"] == "t-admin" and e["actor_role"] == "admin" and e["action"] == "key.create"
    )
    assert e["payload"] == {"name": "k0", "owner": "k0@people", "role": "reader"}
    assert entries[1]["prev_hash"] == entries[0]["hash"]


def test_verify_intact(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _make_entries(client, keys)
    r = client.get("/v1/audit/verify", headers=keys.h(keys.admin))
    assert r.json() == {"intact": True, "entries": 9, "first_broken": None, "problem": None}
    assert client.get("/v1/audit/verify", headers=keys.h(keys.approver)).status_code == 403


def test_edit_behind_the_service_breaks_verify_at_that_row(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _make_entries(client, keys)
    db = client.app.state.services.db  # type: ignore[attr-defined]
    with db.write() as s:
        s.execute(
            update(AuditEntry)
            .where(AuditEntry.id == 7)
            .values(payload='{"name":"k1","role":"admin"}')
        )
    r = client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()
    assert r["intact"] is False and r["first_broken"] == 7 and "hash" in r["problem"]


def test_deleted_row_breaks_verify(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _make_entries(client, keys)
    db = client.app.state.services.db  # type: ignore[attr-defined]
    from sqlalchemy import delete

    with db.write() as s:
        s.execute(delete(AuditEntry).where(AuditEntry.id == 3))
    r = client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()
    assert r["intact"] is False and r["first_broken"] == 3


def test_since_filter(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _make_entries(client, keys)
    all_entries = client.get("/v1/audit", headers=keys.h(keys.reader)).json()["entries"]
    cut = all_entries[6]["at"]
    later = client.get("/v1/audit", params={"since": cut}, headers=keys.h(keys.reader)).json()[
        "entries"
    ]
    assert [e["id"] for e in later] == [e["id"] for e in all_entries if e["at"] >= cut]
