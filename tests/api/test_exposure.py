"""What the service shows without a key: /metrics labels are configurable,
no benchmark route ships, /docs is off by default, and a request without a valid key gets 401
before its body is looked at."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from support import make_keys, make_settings

from apportion.app import create_app
from apportion.observability import BUSINESS_LABELS, show_labels


def test_no_benchmark_route_in_the_app(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    for method in ("GET", "POST"):
        assert client.request(method, "/v1/bare", headers=keys.h(keys.reader)).status_code in (
            401,
            404,
        )
    assert not [r for r in client.app.routes if getattr(r, "path", "") == "/v1/bare"]  # type: ignore[attr-defined]


def test_docs_are_off_by_default_and_the_schema_stays(client: TestClient) -> None:
    assert client.get("/docs").status_code == 404
    assert client.get("/openapi.json").status_code == 200


def test_docs_can_be_turned_on(tmp_path) -> None:  # type: ignore[no-untyped-def]
    app = create_app(make_settings(f"sqlite:///{tmp_path}/d.db", api_docs=True))
    with TestClient(app) as c:
        assert c.get("/docs").status_code == 200


@pytest.mark.parametrize(
    ("method", "path", "body"),
    [
        ("POST", "/v1/experiments", b"{not json"),
        ("POST", "/v1/plans/p/versions", b"\xff\xfe"),
        ("POST", "/v1/keys", b'{"name": 1}'),
        ("POST", "/v1/plans/p/activate", b"[[[["),
        ("POST", "/v1/experiments/e/models", b""),
    ],
)
def test_without_a_key_the_body_is_not_examined(
    client: TestClient, keys, method: str, path: str, body: bytes
) -> None:  # type: ignore[no-untyped-def]
    """Malformed JSON used to get 422 (naming the schema) before the key was checked."""
    for headers in ({}, {"Authorization": "Bearer apk_unknown"}):
        r = client.request(
            method, path, content=body, headers={**headers, "Content-Type": "application/json"}
        )
        assert r.status_code == 401, (path, r.text)
        assert r.headers["content-type"].startswith("application/problem+json")
    # with a key the same body is judged on its content
    r = client.request(
        method,
        path,
        content=body,
        headers={**keys.h(keys.admin), "Content-Type": "application/json"},
    )
    assert r.status_code == 422, r.text


def test_metric_labels_can_be_redacted(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A plan name, its version and arms appear in /metrics only when configured to."""
    from apportion.observability import LIVE_VERSION

    try:
        app = create_app(make_settings(f"sqlite:///{tmp_path}/m.db", metrics_labels=["arm"]))
        with TestClient(app) as c:
            make_keys(app.state.services)
            LIVE_VERSION.labels("hidden-plan-x").set(3)
            text = c.get("/metrics").text
        assert "hidden-plan-x" not in text
        assert 'apportion_live_plan_version{plan="redacted"} 3.0' in text
    finally:
        show_labels(BUSINESS_LABELS)
    LIVE_VERSION.labels("shown-plan-y").set(2)
    assert 'plan="shown-plan-y"' in TestClient(app).get("/metrics").text


def test_unknown_metric_labels_are_refused() -> None:
    with pytest.raises(ValueError, match="unknown metric labels"):
        show_labels(["member_id"])
