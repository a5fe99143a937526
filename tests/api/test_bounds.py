"""Every request field declares the bounds the service can honour: integers fit a signed 64-bit
column, text holds no NUL, solver options are declared per plan method. A value outside them is a
422 problem+json from the schema itself on every backend, never a 500 from the database driver.

The 64-bit bound is a fact of the trade (PostgreSQL BIGINT and SQLite INTEGER are signed 64-bit;
PostgreSQL documents that text values cannot contain the NUL character)."""

from __future__ import annotations

import json
import re
from typing import Any

import pytest
from fastapi.testclient import TestClient

from apportion.openapi_export import render
from apportion.schemas.common import INT64_MAX

BIG = INT64_MAX + 1


def _walk(node: Any, doc: dict, seen: set[str]) -> list[dict]:
    """Every schema reachable from `node`, following $refs once."""
    out: list[dict] = []
    if isinstance(node, dict):
        ref = node.get("$ref")
        if isinstance(ref, str) and ref not in seen:
            seen.add(ref)
            target: Any = doc
            for part in ref.lstrip("#/").split("/"):
                target = target.get(part, {}) if isinstance(target, dict) else {}
            out += _walk(target, doc, seen)  # an unresolvable $ref is the OpenAPI test's concern
        if "type" in node:
            out.append(node)
        for v in node.values():
            out += _walk(v, doc, seen)
    elif isinstance(node, list):
        for v in node:
            out += _walk(v, doc, seen)
    return out


def _request_schemas() -> list[tuple[str, dict]]:
    doc = json.loads(render())
    found = []
    for path, ops in doc["paths"].items():
        for method, op in ops.items():
            where = f"{method.upper()} {path}"
            for p in op.get("parameters", []):
                found += [(f"{where} {p['name']}", s) for s in _walk(p["schema"], doc, set())]
            body = op.get("requestBody", {}).get("content", {}).get("application/json")
            if body:
                found += [(f"{where} body", s) for s in _walk(body["schema"], doc, set())]
    return found


def test_every_request_integer_fits_64_bits() -> None:
    ints = [(w, s) for w, s in _request_schemas() if s.get("type") == "integer"]
    assert len(ints) >= 15  # versions, ids, revisions, counts, seeds: the walk found them
    # FastAPI's OpenAPI models hold bounds as floats: 2**63 - 1 is written as 2.0**63
    unbounded = [w for w, s in ints if s.get("maximum", float("inf")) > float(INT64_MAX)]
    assert unbounded == []


def test_every_request_body_text_refuses_nul() -> None:
    """Each free-text or key field of a JSON body has a pattern that a NUL cannot match (the
    lookup routes are the lookup path's own business and are left out)."""
    texts = [
        (w, s)
        for w, s in _request_schemas()
        if w.endswith("body") and "/assign" not in w
        and s.get("type") == "string" and "enum" not in s and "const" not in s
    ]  # fmt: skip
    assert len(texts) >= 10
    open_text = [w for w, s in texts if re.search(s.get("pattern", ""), "ok\x00ok") is not None]
    assert open_text == []


@pytest.mark.parametrize(
    "method, path, body",
    [
        ("GET", f"/v1/experiments/checkout-copy/readouts/{BIG}", None),
        ("GET", f"/v1/models/{BIG}", None),
        ("GET", f"/v1/plans/p/versions/{BIG}", None),
        ("POST", f"/v1/plans/p/versions/{BIG}/approve", {"reason": "ok"}),
        ("POST", f"/v1/plans/p/versions/{BIG}/reject", {"reason": "ok"}),
        ("POST", "/v1/plans/p/activate", {"version": BIG, "reason": "ok", "expected_revision": 0}),
        ("POST", "/v1/plans/p/rollback", {"to_version": BIG, "reason": "ok"}),
        ("POST", "/v1/plans/p/versions", {"model_id": BIG, "success_metric": "spend"}),
        ("POST", "/v1/experiments/checkout-copy/models", {"readout_version": BIG}),
        ("DELETE", f"/v1/keys/{BIG}", None),
        ("GET", f"/v1/audit?after={BIG}", None),
        ("GET", f"/v1/plans/p/watch?version={BIG}", None),
        ("GET", f"/ui/fragments/plans/p/versions/{BIG}", None),
        ("GET", "/v1/audit?actor=a%00b", None),
        ("GET", "/v1/audit?since=not-a-time", None),
        ("POST", "/v1/plans/p/rollback", {"reason": "a\x00b"}),
        ("POST", "/v1/plans/p/versions", {"model_id": 1, "success_metric": "a\x00b"}),
    ],
)
def test_out_of_bounds_values_are_422_naming_the_field(
    client: TestClient, keys, method: str, path: str, body: dict | None
) -> None:  # type: ignore[no-untyped-def]
    r = client.request(method, path, json=body, headers=keys.h(keys.admin))
    assert r.status_code == 422, r.text
    assert r.headers["content-type"] == "application/problem+json"
    field = r.json()["errors"][0]["field"]
    assert field and field.split(".")[-1] in r.json()["detail"]


@pytest.mark.parametrize(
    "method, options, named",
    [
        ("stochastic", {"iterations": 10**7}, "iterations"),  # would hold a thread ~11 minutes
        ("stochastic", {"iterations": -5}, "iterations"),  # gave an all-control plan
        ("chance", {"max_iter": "abc"}, "max_iter"),
        ("chance", {"tol": float("nan")}, "tol"),
        ("stochastic", {"tail": 0}, "tail"),
        ("chance", {"iterations": 500}, "iterations"),  # a stochastic option on a chance plan
        ("deterministic", {"max_iter": 5}, "max_iter"),
        ("stochastic", {"sampler": "fast"}, "sampler"),
        ("stochastic", {"batch": 10**6}, "batch"),
    ],
)
def test_solver_options_are_declared_per_method(
    client: TestClient, keys, method: str, options: dict, named: str
) -> None:  # type: ignore[no-untyped-def]
    body = {"model_id": 1, "success_metric": "spend", "method": method, "options": options}
    r = client.post(
        "/v1/plans/p/versions",
        content=json.dumps(body),  # json.dumps writes NaN, as a careless client would
        headers={**keys.h(keys.analyst), "content-type": "application/json"},
    )
    assert r.status_code == 422, r.text
    assert r.json()["errors"][0]["field"] == "options" and named in r.json()["detail"]


@pytest.mark.parametrize(
    "method, options",
    [
        ("deterministic", {"presolve": True}),
        ("chance", {"tol": 0.01, "max_iter": 80, "bind_tol": 0.001}),
        ("stochastic", {"iterations": 2000, "sampler": "cells", "tail": 1.0, "batch": 64}),
    ],
)
def test_declared_options_pass_to_the_use_case(
    client: TestClient, keys, method: str, options: dict
) -> None:  # type: ignore[no-untyped-def]
    body = {"model_id": 1, "success_metric": "spend", "method": method, "options": options}
    r = client.post("/v1/plans/p/versions", json=body, headers=keys.h(keys.analyst))
    assert r.status_code == 404 and "cohort model" in r.json()["detail"], r.text
