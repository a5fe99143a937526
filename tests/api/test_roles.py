"""Role matrix: every route with every role and with no key. Roles are ordered
reader < analyst < approver < admin; a key below the route's role gets 403, no key 401."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

ROLES = ["reader", "analyst", "approver", "admin"]
RANK = {r: i for i, r in enumerate(ROLES)}
ROUTES = [
    ("GET", "/v1/experiments/x", "reader"),
    ("POST", "/v1/experiments", "analyst"),
    ("POST", "/v1/experiments/x/readouts", "analyst"),
    ("GET", "/v1/experiments/x/readouts/1", "reader"),
    ("POST", "/v1/experiments/x/models", "analyst"),
    ("GET", "/v1/models/1", "reader"),
    ("GET", "/v1/jobs/x", "reader"),
    ("GET", "/v1/plans", "reader"),
    ("POST", "/v1/plans/p/versions", "analyst"),
    ("GET", "/v1/plans/p", "reader"),
    ("GET", "/v1/plans/p/versions/1", "reader"),
    ("POST", "/v1/plans/p/versions/1/approve", "approver"),
    ("POST", "/v1/plans/p/versions/1/reject", "approver"),
    ("POST", "/v1/plans/p/activate", "approver"),
    ("POST", "/v1/plans/p/rollback", "approver"),
    ("POST", "/v1/plans/p/assign", "reader"),
    ("POST", "/v1/plans/p/assign/batch", "reader"),
    ("POST", "/v1/plans/p/monitor", "analyst"),
    ("GET", "/v1/plans/p/watch", "reader"),
    ("POST", "/v1/plans/p/auto-rollback", "approver"),
    ("GET", "/v1/audit", "reader"),
    ("GET", "/v1/audit/verify", "admin"),
    ("POST", "/v1/keys", "admin"),
    ("DELETE", "/v1/keys/1", "admin"),
]


def test_matrix_covers_every_v1_route(app) -> None:  # type: ignore[no-untyped-def]
    declared = {
        (m, p)
        for r in app.routes
        if getattr(r, "path", "").startswith("/v1/") and r.path != "/v1/bare"
        for m in r.methods - {"HEAD"}
        for p in [r.path]
    }
    import re

    covered = set()
    for method, concrete, _ in ROUTES:
        for m, p in declared:
            if m == method and re.fullmatch(re.sub(r"\{[^}]+\}", "[^/]+", p), concrete):
                covered.add((m, p))
    assert declared - covered == set()


@pytest.mark.parametrize("method,path,needed", ROUTES, ids=[f"{m} {p}" for m, p, _ in ROUTES])
def test_role_matrix(client: TestClient, keys, method: str, path: str, needed: str) -> None:  # type: ignore[no-untyped-def]
    secrets = {
        "reader": keys.reader,
        "analyst": keys.analyst,
        "approver": keys.approver,
        "admin": keys.admin,
    }
    assert client.request(method, path, json={}).status_code == 401
    for role in ROLES:
        status = client.request(method, path, json={}, headers=keys.h(secrets[role])).status_code
        if RANK[role] < RANK[needed]:
            assert status == 403, (role, status)
        else:
            assert status not in (401, 403), (role, status)
