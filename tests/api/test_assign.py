"""The lookup routes through the app (LookupGateway): the documented schema enforced exactly, body
limits, hostile JSON, errors as problem+json, counters; and the portable compiled-plan route.

The lookup path never touches the database, so these run on SQLite only; the plan is compiled by
the server's own compiler and swapped into the registry the way an activation does."""

from __future__ import annotations

import json
from collections.abc import Iterator

import numpy as np
import pytest
from fastapi.testclient import TestClient
from serving.serving_helpers import hand_partition
from support import Keys, make_keys, make_settings

from apportion.lookup import Plan
from apportion.observability import REGISTRY
from apportion.serving.index import PlanParts, compile_plan

PLAN = "lesson-length"
ARMS = ("five", "ten", "fifteen", "adaptive")
PROBLEM = "application/problem+json"


def _compiled(version: int = 1, revision: int = 1):  # type: ignore[no-untyped-def]
    alloc = np.array([[0.5, 0.0, 0.5, 0.0], [0.0, 0.0, 0.0, 1.0], [0.25, 0.25, 0.25, 0.25]])
    return compile_plan(
        PlanParts(
            plan=PLAN,
            version=version,
            partition=hand_partition(),
            allocation=alloc,
            arm_keys=ARMS,
            holdout_share=0.1,
            holdout_arm="ten",
            salt=f"salt-{version}",
            revision=revision,
        )
    )


@pytest.fixture
def live(tmp_path) -> Iterator[tuple[TestClient, Keys]]:  # type: ignore[no-untyped-def]
    from apportion.app import create_app

    settings = make_settings(
        f"sqlite:///{tmp_path}/a.db",
        poll_interval_seconds=3600,  # the poller runs once at start and leaves the swap alone
        max_assign_bytes=16_384,
        max_assign_batch_bytes=200_000,
    )
    app = create_app(settings)
    with TestClient(app, raise_server_exceptions=False) as c:
        services = app.state.services
        keys = make_keys(services)
        services.keys.refresh()
        import time

        deadline = time.monotonic() + 10
        while services.plans.last_refresh is None and time.monotonic() < deadline:
            time.sleep(0.01)
        services.plans.swap(PLAN, _compiled())
        yield c, keys


def _post(c: TestClient, keys: Keys, body: bytes | str, batch: bool = False, **headers: str):  # type: ignore[no-untyped-def]
    path = f"/v1/plans/{PLAN}/assign" + ("/batch" if batch else "")
    h = {**keys.h(keys.reader), "content-type": "application/json", **headers}
    return c.post(path, content=body, headers=h)


def _problem(r, status: int, *words: str) -> dict:  # type: ignore[no-untyped-def]
    assert r.status_code == status, r.text
    assert r.headers["content-type"].startswith(PROBLEM)
    body = r.json()
    assert body["status"] == status and body["request_id"] == r.headers["x-request-id"]
    text = json.dumps(body)
    for w in words:
        assert w in text, (w, text)
    return body


def test_assign_answers_as_the_compiled_plan_does(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    cp = _compiled()
    members = [(f"m-{i}", {"tenure_days": i % 60, "level": "beginner"}) for i in range(50)]
    for m, f in members:
        r = _post(c, keys, json.dumps({"member_id": m, "features": f}), **{"x-request-id": "r-1"})
        assert r.status_code == 200 and r.headers["x-request-id"] == "r-1"
        assert r.json() == cp.assign(m, f).to_dict()
    batch = {"members": [{"member_id": m, "features": f} for m, f in members]}
    r = _post(c, keys, json.dumps(batch), batch=True)
    assert r.status_code == 200
    assert r.json()["assignments"] == [cp.assign(m, f).to_dict() for m, f in members]
    # features may be left out (the schema does not require them): every default is taken
    r = _post(c, keys, '{"member_id": "m-1"}')
    assert r.status_code == 200 and r.json()["defaults_used"]


def test_member_id_longer_than_the_schema_allows_is_422(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    ok = _post(c, keys, json.dumps({"member_id": "x" * 200, "features": {}}))
    assert ok.status_code == 200
    body = _problem(_post(c, keys, json.dumps({"member_id": "x" * 201})), 422, "member_id")
    assert body["errors"][0]["type"] == "string_too_long"
    batch = {"members": [{"member_id": "a"}, {"member_id": "y" * 201}]}
    _problem(_post(c, keys, json.dumps(batch), batch=True), 422, "members.1.member_id")


def test_types_the_schema_does_not_declare_are_422(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    _problem(_post(c, keys, '{"member_id": 17}'), 422, "member_id", "string_type")
    _problem(_post(c, keys, '{"member_id": ""}'), 422, "member_id")
    _problem(_post(c, keys, '{"member_id": "m", "features": [1]}'), 422, "features")
    _problem(_post(c, keys, '["m"]'), 422)
    _problem(_post(c, keys, '{"members": {}}', batch=True), 422, "members")
    too_many = {"members": [{"member_id": "m"}] * 10_001}
    r = c.post(
        f"/v1/plans/{PLAN}/assign/batch",
        content=json.dumps(too_many),
        headers={**keys.h(keys.reader), "content-type": "application/json"},
    )
    assert r.status_code in (413, 422)  # 10,001 tiny members: over the test's byte limit too


def test_bodies_over_the_configured_limit_are_413(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    big = json.dumps({"member_id": "m", "features": {"pad": "x" * 20_000}})
    _problem(_post(c, keys, big), 413, "16384")
    big_batch = json.dumps({"members": [{"member_id": f"m{i}"} for i in range(20_000)]})
    _problem(_post(c, keys, big_batch, batch=True), 413, "200000")

    def chunked():  # type: ignore[no-untyped-def]  # no content-length: counted while read
        for _ in range(10):
            yield b" " * 2000

    r = c.post(
        f"/v1/plans/{PLAN}/assign",
        content=chunked(),
        headers={**keys.h(keys.reader), "content-type": "application/json"},
    )
    _problem(r, 413)


@pytest.mark.parametrize(
    "body",
    [
        '{"member_id": "m", "features": {"x": ' + "[" * 1500 + "]" * 1500 + "}}",
        '{"member_id": "m", "features": {"x": ' + '{"a":' * 1500 + "1" + "}" * 1500 + "}}",
        '{"member_id": "m\\ud800", "features": {}}',
        '{"member_id": "m", "features": {"level": "\\udc00"}}',
        '{"member_id": "m", "features": {"\\ud800": 1}}',
        '{"member_id": "m", "features": {"tenure_days": 1' + "0" * 5000 + "}}",
        '{"member_id": "m"',
        "",
    ],
    ids=[
        "deep-arrays",
        "deep-objects",
        "surrogate-id",
        "surrogate-value",
        "surrogate-key",
        "huge-int",
        "truncated",
        "empty",
    ],
)
def test_hostile_json_is_422_never_500(live, body: str) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    _problem(_post(c, keys, body.encode()), 422, "invalid")
    inner = body[len('{"member_id": ') : -1] if body.startswith('{"member_id"') else body
    batch = '{"members": [{"member_id": ' + inner + "}]}" if inner != body else body
    _problem(_post(c, keys, batch.encode(), batch=True), 422)


def test_numbers_beyond_float64_are_422(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    huge = "1" + "0" * 400  # a valid JSON integer that no double holds
    body = '{"member_id": "m", "features": {"tenure_days": ' + huge + "}}"
    _problem(_post(c, keys, body), 422, "tenure_days")
    _problem(_post(c, keys, '{"members": [' + body + "]}", batch=True), 422, "tenure_days")


def test_authentication_comes_before_the_body(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    r = c.post(f"/v1/plans/{PLAN}/assign", content=b"{not json")
    _problem(r, 401)
    assert r.headers["www-authenticate"] == "Bearer"
    r = c.post(
        f"/v1/plans/{PLAN}/assign", content=b"{not json", headers={"authorization": "Bearer nope"}
    )
    _problem(r, 401)
    r = c.post(
        "/v1/plans/none-live/assign", content=b'{"member_id": "m"}', headers=keys.h(keys.reader)
    )
    _problem(r, 404, "fallback")


def test_lookups_are_counted_by_route_and_arm(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live

    def count(status: str) -> float:
        v = REGISTRY.get_sample_value(
            "apportion_http_requests_total",
            {"route": "/v1/plans/{plan}/assign", "method": "POST", "status": status},
        )
        return v or 0.0

    def arms() -> float:
        return sum(
            REGISTRY.get_sample_value(
                "apportion_assignments_total", {"plan": PLAN, "version": "1", "arm": a}
            )
            or 0.0
            for a in ARMS
        )

    ok0, bad0, arms0 = count("200"), count("422"), arms()
    for i in range(7):
        assert _post(c, keys, json.dumps({"member_id": f"c-{i}"})).status_code == 200
    assert _post(c, keys, '{"member_id": 1}').status_code == 422
    assert (count("200") - ok0, count("422") - bad0, arms() - arms0) == (7, 1, 7)


# ---- the portable compiled plan ------------------------------------------------------------
def test_compiled_document_etag_and_304(live) -> None:  # type: ignore[no-untyped-def]
    c, keys = live
    url = f"/v1/plans/{PLAN}/compiled"
    _problem(c.get(url), 401)
    r = c.get(url, headers=keys.h(keys.reader))
    assert r.status_code == 200 and r.headers["content-type"] == "application/json"
    doc = r.json()
    etag = r.headers["etag"]
    assert etag == f'"{doc["content_hash"]}"' and doc["format_version"] == 1
    assert (doc["plan"], doc["plan_version"], doc["revision"]) == (PLAN, 1, 1)
    same = c.get(url, headers={**keys.h(keys.reader), "if-none-match": etag})
    assert same.status_code == 304 and same.content == b"" and same.headers["etag"] == etag
    other = c.get(url, headers={**keys.h(keys.reader), "if-none-match": '"sha256:0"'})
    assert other.status_code == 200
    # the document assigns exactly as the server does
    plan = Plan.from_json(r.content)
    for i in range(300):
        m, f = f"doc-{i}", {"tenure_days": i % 45, "region": ("east", "west", None)[i % 3]}
        assert (
            plan.assign(m, f).to_dict()
            == _post(c, keys, json.dumps({"member_id": m, "features": f})).json()
        )
    # a new live version: a new ETag, and the old one no longer answers 304
    c.app.state.services.plans.swap(PLAN, _compiled(version=2, revision=2))  # type: ignore[attr-defined]
    r2 = c.get(url, headers={**keys.h(keys.reader), "if-none-match": etag})
    assert r2.status_code == 200 and r2.headers["etag"] != etag
    assert r2.json()["plan_version"] == 2
    _problem(c.get("/v1/plans/none-live/compiled", headers=keys.h(keys.reader)), 404)


def test_declared_routes_answer_as_the_gateway_does(live) -> None:  # type: ignore[no-untyped-def]
    """The FastAPI operations behind the gateway (what the OpenAPI document describes) give the
    same answers and problems when called without the gateway in front."""
    from functools import partial

    from fastapi import FastAPI

    c, keys = live
    inner = TestClient(partial(FastAPI.__call__, c.app), raise_server_exceptions=False)
    h = {**keys.h(keys.reader), "content-type": "application/json"}
    for body in ('{"member_id": "m-7", "features": {"tenure_days": 3}}', '{"member_id": 7}'):
        a = _post(c, keys, body)
        b = inner.post(f"/v1/plans/{PLAN}/assign", content=body, headers=h)
        assert (a.status_code, a.json().get("arm")) == (b.status_code, b.json().get("arm"))
    batch = '{"members": [{"member_id": "a"}, {"member_id": "b"}]}'
    b = inner.post(f"/v1/plans/{PLAN}/assign/batch", content=batch, headers=h)
    assert b.json() == _post(c, keys, batch, batch=True).json()


def _documented(c: TestClient, path: str, method: str) -> dict:  # type: ignore[type-arg]
    """The 200 answer's JSON schema of an operation as the app's OpenAPI document states it, with
    the document's components beside it so that its `$ref`s resolve."""
    doc = c.get("/openapi.json").json()
    schema = doc["paths"][path][method]["responses"]["200"]["content"]["application/json"]["schema"]
    return {**schema, "components": doc["components"]}


def _fields(schema: dict, components: dict) -> set[str]:  # type: ignore[type-arg]
    while "$ref" in schema:
        schema = components["schemas"][schema["$ref"].rsplit("/", 1)[1]]
    return set(schema["properties"])


def test_the_fast_lookup_answers_are_exactly_the_documented_schema(live) -> None:  # type: ignore[no-untyped-def]
    """The lookup path writes its own bytes, so its documented answer is checked against real
    answers three ways: jsonschema (an outside implementation of JSON Schema 2020-12, which
    OpenAPI 3.1 uses) validates each answer against the document's schema; the documented fields
    are exactly the answer's keys; and the answer models (which forbid undeclared keys) parse
    the raw bytes."""
    from jsonschema import Draft202012Validator

    from apportion.schemas.assignments import AssignOut, BatchOut, CompiledPlanOut

    c, keys = live
    members = [
        {"member_id": f"m-{i}", "features": {"tenure_days": i, "level": "beginner"}}
        for i in range(20)
    ]
    singles = [_post(c, keys, json.dumps(m)) for m in members] + [
        _post(c, keys, '{"member_id": "x"}')
    ]
    batch = _post(c, keys, json.dumps({"members": members}), batch=True)
    compiled = c.get(f"/v1/plans/{PLAN}/compiled", headers=keys.h(keys.reader))
    cases = [("/v1/plans/{plan}/assign", AssignOut, r) for r in singles] + [
        ("/v1/plans/{plan}/assign/batch", BatchOut, batch),
        ("/v1/plans/{plan}/compiled", CompiledPlanOut, compiled),
    ]
    for path, model, r in cases:
        assert r.status_code == 200, r.text
        schema = _documented(c, path, "get" if path.endswith("compiled") else "post")
        body = r.json()
        errors = [e.message for e in Draft202012Validator(schema).iter_errors(body)]
        assert errors == [], (path, errors)
        assert _fields(schema, schema["components"]) == set(body), path
        model.model_validate_json(r.content)
    one = batch.json()["assignments"][0]
    assert _fields(
        {"$ref": "#/components/schemas/AssignOut"},
        _documented(c, "/v1/plans/{plan}/assign", "post")["components"],
    ) == set(one)
    # a planted extra key is refused: the check above can fail
    with pytest.raises(ValueError, match="extra"):
        AssignOut.model_validate({**one, "surprise": 1})
