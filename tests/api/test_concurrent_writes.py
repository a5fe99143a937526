"""Concurrent writers in one process (threads through the HTTP app), on SQLite and PostgreSQL:
every request gets its correct answer (never a 5xx), numbers never
collide, the same content is stored once, and the audit chain holds one entry per transition.

The two-process version of these races is tests/races/; these are the fast reproducers."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from support import EXPERIMENT, rows_csv
from writers import CSV, PLAN, activate, approved_versions, audit_entries, burst, small_model

from apportion.demo.postlaunch import post_launch_csv

EXP = EXPERIMENT["key"]


def _verify(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    v = client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()
    assert v["intact"], v


def _actions(client: TestClient, keys, action: str) -> list[dict]:  # type: ignore[no-untyped-def]
    return [e for e in audit_entries(client, keys) if e["action"] == action]


def _upload(client: TestClient, keys, body: bytes):  # type: ignore[no-untyped-def]
    return lambda: client.post(
        f"/v1/experiments/{EXP}/readouts", content=body, headers={**keys.h(keys.analyst), **CSV}
    )


def test_distinct_readouts_uploaded_at_once_each_get_their_own_version(
    client: TestClient, keys
) -> None:  # type: ignore[no-untyped-def]
    assert (
        client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst)).status_code
        == 201
    )
    bodies = [rows_csv(300, seed=10 + i) for i in range(5)]
    answers = burst([_upload(client, keys, b) for b in bodies])
    assert [r.status_code for r in answers] == [201] * 5, [r.text for r in answers]
    assert sorted(r.json()["version"] for r in answers) == [1, 2, 3, 4, 5]
    listed = client.get(f"/v1/experiments/{EXP}", headers=keys.h(keys.reader)).json()["readouts"]
    assert len(listed) == 5
    assert len(_actions(client, keys, "readout.upload")) == 5
    _verify(client, keys)


def test_the_same_bytes_from_five_threads_store_one_version(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    assert (
        client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst)).status_code
        == 201
    )
    for round_ in range(3):
        body = rows_csv(300, seed=40 + round_)
        answers = burst([_upload(client, keys, body) for _ in range(5)])
        codes = sorted(r.status_code for r in answers)
        assert codes == [200, 200, 200, 200, 201], [r.text for r in answers]
        assert {r.json()["version"] for r in answers} == {round_ + 1}
    assert len(_actions(client, keys, "readout.upload")) == 3
    _verify(client, keys)


def test_concurrent_fits_of_one_experiment_get_distinct_model_versions(
    client: TestClient, keys
) -> None:  # type: ignore[no-untyped-def]
    client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert _upload(client, keys, rows_csv(400, seed=2))().status_code == 201
    fit = {"readout_version": 1, "method": "global"}
    answers = burst(
        [
            lambda: client.post(
                f"/v1/experiments/{EXP}/models", json=fit, headers=keys.h(keys.analyst)
            )
            for _ in range(4)
        ]
    )
    assert [r.status_code for r in answers] == [202] * 4, [r.text for r in answers]
    assert sorted(r.json()["version"] for r in answers) == [1, 2, 3, 4]
    _verify(client, keys)


def test_concurrent_comparisons_of_one_experiment_get_distinct_numbers(
    client: TestClient, keys
) -> None:  # type: ignore[no-untyped-def]
    client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert _upload(client, keys, rows_csv(400, seed=2))().status_code == 201
    body = {"readout_version": 1, "success_metric": "spend", "candidates": ["global/deterministic"],
            "folds": 2}  # fmt: skip
    answers = burst(
        [
            lambda: client.post(
                f"/v1/experiments/{EXP}/comparisons", json=body, headers=keys.h(keys.analyst)
            )
            for _ in range(4)
        ]
    )
    assert [r.status_code for r in answers] == [202] * 4, [r.text for r in answers]
    assert sorted(r.json()["number"] for r in answers) == [1, 2, 3, 4]
    assert len(_actions(client, keys, "comparison.start")) == 4
    _verify(client, keys)


@pytest.fixture
def three_approved(client: TestClient, keys) -> int:  # type: ignore[no-untyped-def]
    model = small_model(client, keys)
    approved_versions(client, keys, model, 3)
    return model


def test_watch_uploads_racing_activations_never_fail_or_share_a_number(
    client: TestClient, keys, three_approved
) -> None:  # type: ignore[no-untyped-def]
    assert activate(client, keys, 1, 0).status_code == 200
    services = client.app.state.services  # type: ignore[attr-defined]
    revision, live, won = 1, 1, 0
    uploads_ok = 0
    for round_ in range(3):
        compiled = services.plans.get(PLAN)
        bodies = [
            post_launch_csv(compiled, 300, seed=100 + 10 * round_ + i, id_prefix=f"r{round_}x{i}-")
            for i in range(3)
        ]
        targets = [v for v in (1, 2, 3) if v != live]
        calls = [
            (
                lambda b=b, v=live: client.post(
                    f"/v1/plans/{PLAN}/monitor",
                    params={"version": v},  # the version whose lookup made the rows
                    content=b,
                    headers={**keys.h(keys.analyst), **CSV},
                )
            )
            for b in bodies
        ] + [(lambda v=v, rev=revision: activate(client, keys, v, rev)) for v in targets]
        answers = burst(calls)
        codes = [r.status_code for r in answers]
        assert codes[:3] == [200, 200, 200], [r.text for r in answers[:3]]
        assert sorted(codes[3:]) == [200, 409], [r.text for r in answers[3:]]
        uploads_ok += 3
        won += 1
        winner = next(r for r in answers[3:] if r.status_code == 200).json()
        revision, live = winner["revision"], winner["to_version"]
    # upload numbers are unique per version and run 1..k with no gaps
    entries = audit_entries(client, keys)
    by_version: dict[str, list[int]] = {}
    for e in entries:
        if e["action"] == "watch.upload":
            by_version.setdefault(e["entity_id"], []).append(e["payload"]["upload"])
    for seqs in by_version.values():
        assert sorted(seqs) == list(range(1, len(seqs) + 1)), by_version
    assert sum(len(s) for s in by_version.values()) == uploads_ok
    assert sum(e["action"] == "plan.activate" for e in entries) == 1 + won
    _verify(client, keys)


def test_two_approvals_of_one_draft_exactly_one_wins(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.scenario import GUARDRAILS, SUCCESS

    model = small_model(client, keys)
    body = {"model_id": model, "success_metric": SUCCESS, "guardrails": GUARDRAILS, "draws": 20}
    assert (
        client.post(
            f"/v1/plans/{PLAN}/versions", json=body, headers=keys.h(keys.analyst)
        ).status_code
        == 201
    )
    answers = burst(
        [
            (
                lambda k=k: client.post(
                    f"/v1/plans/{PLAN}/versions/1/approve", json={"reason": "ok"}, headers=keys.h(k)
                )
            )
            for k in (keys.approver, keys.approver2)
        ]
    )
    assert sorted(r.status_code for r in answers) == [200, 409], [r.text for r in answers]
    assert len(_actions(client, keys, "plan.approve")) == 1
    _verify(client, keys)


def test_first_drafts_of_a_new_plan_at_once_get_versions_one_to_three(
    client: TestClient, keys
) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.scenario import GUARDRAILS, SUCCESS

    model = small_model(client, keys)
    body = {"model_id": model, "success_metric": SUCCESS, "guardrails": GUARDRAILS, "draws": 20}
    answers = burst(
        [
            lambda: client.post(
                "/v1/plans/fresh-plan/versions", json=body, headers=keys.h(keys.analyst)
            )
            for _ in range(3)
        ]
    )
    assert [r.status_code for r in answers] == [201] * 3, [r.text for r in answers]
    assert sorted(r.json()["version"] for r in answers) == [1, 2, 3]
    _verify(client, keys)
