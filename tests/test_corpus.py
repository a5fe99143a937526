"""The standing corpus of bad inputs (tests/corpus/cases, one JSON file per case; request bodies in
tests/corpus/bodies, the large ones gzipped). Every case must get its 4xx as problem+json whose
detail names the problem, and leave the store exactly as it was: the row count of every table
(readouts, models, plans, jobs, keys, blobs, audit entries, ...) is compared before and after.

It runs on SQLite and, with APPORTION_TEST_DATABASE_URL, on PostgreSQL, against one seeded service
per backend: the invented scenario's experiment with a readout, a fitted model and a live plan.

Case file fields: id, class (what kind of bad input), why, method, path, as (the key's role, or
null for none), json (a JSON body) or body_file (raw bytes) with content_type, status (the 4xx
expected) and detail (substrings the problem's detail must contain)."""

from __future__ import annotations

import gzip
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import inspect, text
from support import (
    Keys,
    draft_plan,
    launch,
    make_keys,
    make_settings,
    reset_postgres,
    scenario_model,
)

from apportion.app import create_app

CORPUS = Path(__file__).resolve().parent / "corpus"
CASES = sorted((CORPUS / "cases").glob("*.json"))


def _load(path: Path) -> dict[str, Any]:
    return json.loads(path.read_text())


@pytest.fixture(scope="module")
def seeded(backend: str, tmp_path_factory) -> Iterator[tuple[TestClient, Keys]]:  # type: ignore[no-untyped-def]
    """One service per backend: readout 1 of 'lesson-length', model 1, plan 'lesson-length'
    version 1 approved and live (revision 1)."""
    if backend == "sqlite":
        url = f"sqlite:///{tmp_path_factory.mktemp('corpus')}/apportion.db"
    else:
        url = reset_postgres("corpus")
    app = create_app(make_settings(url))
    with TestClient(app, raise_server_exceptions=False) as client:
        keys = make_keys(app.state.services)
        model = scenario_model(
            client, keys, n=3000, seed=11, params={"max_depth": 1, "min_units_per_arm": 100}
        )
        assert model == 1
        draft_plan(client, keys, model, method="deterministic", draws=10, guardrails=[])
        launch(client, keys, 1)
        yield client, keys


def _stored(client: TestClient) -> dict[str, int]:
    engine = client.app.state.services.db.engine  # type: ignore[attr-defined]
    with engine.connect() as conn:
        return {
            t: int(conn.execute(text(f'SELECT count(*) FROM "{t}"')).scalar_one())
            for t in inspect(engine).get_table_names()
        }


def _request(case: dict[str, Any], keys: Keys) -> dict[str, Any]:
    headers = keys.h(getattr(keys, case["as"])) if case["as"] else {}
    kwargs: dict[str, Any] = {"headers": headers}
    if "json" in case:
        kwargs["json"] = case["json"]
    if "body_file" in case:
        raw = (CORPUS / case["body_file"]).read_bytes()
        kwargs["content"] = gzip.decompress(raw) if case["body_file"].endswith(".gz") else raw
    if "content_type" in case:
        headers["content-type"] = case["content_type"]
    return kwargs


def test_the_corpus_is_large_and_well_formed() -> None:
    assert len(CASES) >= 100
    ids = [_load(p)["id"] for p in CASES]
    assert len(set(ids)) == len(ids)
    for p in CASES:
        case = _load(p)
        assert 400 <= case["status"] < 500 and case["why"] and case["class"], p.name
        assert ("json" in case) + ("body_file" in case) <= 1, p.name
        assert "body_file" not in case or (CORPUS / case["body_file"]).exists(), p.name


@pytest.mark.parametrize("path", CASES, ids=[p.stem for p in CASES])
def test_bad_input_gets_its_problem_and_stores_nothing(seeded, path: Path) -> None:  # type: ignore[no-untyped-def]
    client, keys = seeded
    case = _load(path)
    before = _stored(client)
    r = client.request(case["method"], case["path"], **_request(case, keys))
    assert r.status_code == case["status"], r.text[:2000]
    assert r.headers["content-type"] == "application/problem+json", r.text[:500]
    problem = r.json()
    assert problem["status"] == case["status"] and problem["title"]
    for words in case["detail"]:
        assert words in problem["detail"], (words, problem["detail"][:2000])
    assert _stored(client) == before
