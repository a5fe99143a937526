"""JSON bodies have a configurable size limit (APPORTION_MAX_JSON_BYTES): a larger body gets 413
problem+json before it is read whole, on every route except raw uploads (their own limit) and the
lookup routes (their own rules); a body within the limit is served as before."""

from __future__ import annotations

import json

import pytest
from fastapi.testclient import TestClient
from support import EXPERIMENT, make_keys, make_settings

from apportion.app import create_app

LIMIT = 4096


@pytest.fixture
def small(db_url: str):  # type: ignore[no-untyped-def]
    app = create_app(make_settings(db_url, max_json_bytes=LIMIT))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c, make_keys(app.state.services)


def _big_declaration() -> dict:
    return {**EXPERIMENT, "name": "x" * 100, "features": [
        {"key": f"f{i}", "kind": "categorical", "levels": [f"level-{j}" for j in range(40)]}
        for i in range(20)
    ]}  # fmt: skip


def test_a_json_body_over_the_limit_is_413_and_nothing_is_stored(small) -> None:  # type: ignore[no-untyped-def]
    client, keys = small
    body = json.dumps(_big_declaration()).encode()
    assert len(body) > LIMIT
    r = client.post(
        "/v1/experiments",
        content=body,
        headers={**keys.h(keys.analyst), "content-type": "application/json"},
    )
    assert r.status_code == 413, r.text
    assert r.headers["content-type"] == "application/problem+json"
    assert f"limit is {LIMIT} bytes" in r.json()["detail"]
    assert (
        client.get("/v1/experiments/checkout-copy", headers=keys.h(keys.reader)).status_code == 404
    )
    entries = client.get("/v1/audit", headers=keys.h(keys.reader)).json()["entries"]
    assert [e for e in entries if e["entity"] == "experiment"] == []


def test_a_chunked_body_without_length_is_counted(small) -> None:  # type: ignore[no-untyped-def]
    client, keys = small

    def chunks():  # a generator body is sent with Transfer-Encoding: chunked, no Content-Length
        for _ in range(10):
            yield b" " * 1000

    r = client.post(
        "/v1/plans/p/rollback",
        content=chunks(),
        headers={**keys.h(keys.approver), "content-type": "application/json"},
    )
    assert r.status_code == 413 and "exceeds the limit" in r.json()["detail"], r.text


def test_a_body_within_the_limit_is_served(small) -> None:  # type: ignore[no-untyped-def]
    client, keys = small
    r = client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert r.status_code == 201, r.text


def test_uploads_keep_their_own_limit(small) -> None:  # type: ignore[no-untyped-def]
    from support import rows_csv

    client, keys = small
    client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    body = rows_csv(400)
    assert len(body) > LIMIT
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=body,
        headers={**keys.h(keys.analyst), "content-type": "text/csv"},
    )
    assert r.status_code == 201, r.text
