"""The race suite: two server processes on one PostgreSQL database, requests released
together by a barrier and spread over both processes. Readout uploads (distinct files and the same
bytes), guardrail-watch uploads, activations and rollbacks of one plan: 0 answers of 5xx, exactly
one winner wherever callers compete for the same revision, and the audit chain holds exactly one
entry per successful transition and verifies. Runs where PostgreSQL is configured (CI sets it);
SQLite serializes every writer in one file, so the cross-process races are PostgreSQL's."""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager

import pytest
from servers import NO_POSTGRES, PG_URL, Server, fresh_database, prepare
from support import EXPERIMENT, Keys, rows_csv
from writers import CSV, PLAN, activate, approved_versions, audit_entries, burst, small_model

from apportion.demo.postlaunch import post_launch_csv
from apportion.store.db import Database
from apportion.usecases import live

pytestmark = pytest.mark.skipif(not PG_URL, reason=NO_POSTGRES)

ROUNDS = 4  # plan rounds: each races 4 watch uploads against 2 activations and a rollback


@pytest.fixture(scope="module")
def two(tmp_path_factory) -> Iterator[tuple[Server, Server, Keys, str]]:  # type: ignore[no-untyped-def]
    tmp = tmp_path_factory.mktemp("races")
    url = fresh_database("postgresql", tmp)
    keys = prepare(url)
    a, b = Server(url, tmp / "a.log").launch(), Server(url, tmp / "b.log").launch()
    a.wait_ready(), b.wait_ready()
    try:
        yield a, b, keys, url
    finally:
        a.stop()
        b.stop()
    for s in (a, b):  # no request may have reached the unexpected-error handler
        errors = [line[:400] for line in s.log().splitlines() if "unexpected error" in line]
        assert not errors, errors


@contextmanager
def _database(url: str) -> Iterator[Database]:
    db = Database.connect(url, pool_size=2)
    try:
        yield db
    finally:
        db.dispose()


def _no_5xx(answers) -> None:  # type: ignore[no-untyped-def]
    bad = [(r.status_code, r.text[:300]) for r in answers if r.status_code >= 500]
    assert not bad, bad


def test_readout_uploads_through_two_servers(two) -> None:  # type: ignore[no-untyped-def]
    a, b, keys, _ = two
    with a.client() as ca, b.client() as cb:
        assert (
            ca.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst)).status_code
            == 201
        )
        distinct = [rows_csv(300, seed=200 + i) for i in range(6)]
        same = rows_csv(300, seed=299)
        bodies = distinct + [same] * 6
        clients = [ca, cb] * 6

        def post(c, body):  # type: ignore[no-untyped-def]
            return lambda: c.post(
                f"/v1/experiments/{EXPERIMENT['key']}/readouts",
                content=body,
                headers={**keys.h(keys.analyst), **CSV},
            )

        answers = burst([post(c, body) for c, body in zip(clients, bodies, strict=True)])
        _no_5xx(answers)
        assert [r.status_code for r in answers[:6]] == [201] * 6, [r.text for r in answers[:6]]
        same_codes = Counter(r.status_code for r in answers[6:])
        assert same_codes == {201: 1, 200: 5}, same_codes  # exactly one winner for one content
        versions = [r.json()["version"] for r in answers]
        assert sorted(set(versions)) == list(range(1, 8)) and len(set(versions[6:])) == 1
        uploads = [
            e
            for e in audit_entries(ca, keys)
            if e["action"] == "readout.upload" and e["entity_id"].startswith("checkout-copy/")
        ]
        assert len(uploads) == 7  # one entry per stored version, none for the repeats


def test_watch_uploads_activations_and_rollbacks_through_two_servers(two) -> None:  # type: ignore[no-untyped-def]
    a, b, keys, url = two
    with _database(url) as db, a.client() as ca, b.client() as cb:
        approved_versions(ca, keys, small_model(ca, keys), 4)
        first = activate(ca, keys, 1, 0)
        assert first.status_code == 200, first.text
        revision, live_version = 1, 1
        transitions, watch_ok, codes = 1, 0, Counter()
        for round_ in range(ROUNDS):
            compiled = live.load_compiled(db, PLAN)
            assert compiled is not None and compiled.version == live_version
            bodies = [
                post_launch_csv(
                    compiled, 400, seed=300 + 10 * round_ + i, id_prefix=f"w{round_}-{i}-"
                )
                for i in range(4)
            ]
            uploads = [
                (
                    lambda c=c, body=body, v=live_version: c.post(
                        f"/v1/plans/{PLAN}/monitor",
                        params={"version": v},
                        content=body,
                        headers={**keys.h(keys.analyst), **CSV},
                    )
                )
                for c, body in zip([ca, cb, ca, cb], bodies, strict=True)
            ]
            targets = [v for v in (1, 2, 3, 4) if v != live_version][:2]
            contenders = [
                lambda v=targets[0], rev=revision: activate(ca, keys, v, rev),
                lambda v=targets[1], rev=revision: activate(cb, keys, v, rev),
            ]
            if round_ > 0:  # there is an earlier live version to go back to
                contenders.append(
                    lambda rev=revision: cb.post(
                        f"/v1/plans/{PLAN}/rollback",
                        json={"reason": "race", "expected_revision": rev},
                        headers=keys.h(keys.approver2),
                    )
                )
            answers = burst(uploads + contenders)
            _no_5xx(answers)
            codes.update(r.status_code for r in answers)
            assert [r.status_code for r in answers[:4]] == [200] * 4, [r.text for r in answers[:4]]
            watch_ok += 4
            won = [r for r in answers[4:] if r.status_code == 200]
            assert len(won) == 1, [(r.status_code, r.text[:200]) for r in answers[4:]]
            assert all(r.status_code == 409 for r in answers[4:] if r is not won[0])
            transitions += 1
            revision, live_version = won[0].json()["revision"], won[0].json()["to_version"]
        entries = [e for e in audit_entries(ca, keys) if e["entity_id"].startswith(PLAN)]
        switches = [e for e in entries if e["action"] in ("plan.activate", "plan.rollback")]
        assert len(switches) == transitions
        assert [e["payload"]["revision"] for e in switches] == list(range(1, transitions + 1))
        seqs: dict[str, list[int]] = {}
        for e in entries:
            if e["action"] == "watch.upload":
                seqs.setdefault(e["entity_id"], []).append(e["payload"]["upload"])
        assert sum(len(s) for s in seqs.values()) == watch_ok
        for got in seqs.values():  # upload numbers never collide and never skip
            assert sorted(got) == list(range(1, len(got) + 1)), seqs
        plan = ca.get(f"/v1/plans/{PLAN}", headers=keys.h(keys.reader)).json()
        assert len(plan["activations"]) == transitions and plan["revision"] == revision
        verify = ca.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()
        assert verify["intact"], verify
