"""Builders and checks shared by the concurrency suites (in-process threads, two server processes,
kill -9): a small live plan reached through any HTTP client, a barrier burst, and the store-wide
consistency check that says nothing is half-stored."""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any

from support import approve, scenario_model

PLAN = "lesson-length"
CSV = {"content-type": "text/csv"}


def burst(calls: list[Callable[[], Any]]) -> list[Any]:
    """Run every call in its own thread, released together by a barrier; returns the results in
    call order (an exception is returned in place of its result, never swallowed)."""
    barrier = threading.Barrier(len(calls))
    out: list[Any] = [None] * len(calls)

    def run(i: int) -> None:
        barrier.wait()
        try:
            out[i] = calls[i]()
        except BaseException as exc:  # noqa: BLE001 - the caller asserts on it
            out[i] = exc

    threads = [threading.Thread(target=run, args=(i,)) for i in range(len(calls))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    return out


def small_model(client: Any, keys: Any) -> int:
    """The invented scenario at a small size with a shallow tree: enough for a plan, fast to fit."""
    return scenario_model(
        client, keys, n=4000, seed=3, params={"max_depth": 2, "min_units_per_arm": 100}
    )


def approved_versions(client: Any, keys: Any, model_id: int, count: int) -> None:
    """Draft `count` versions of the plan (20 report draws, holdout 20 %) and approve each."""
    from apportion.demo.scenario import GUARDRAILS, SUCCESS

    for i in range(count):
        body = {
            "model_id": model_id,
            "success_metric": SUCCESS,
            "guardrails": GUARDRAILS,
            "method": "chance" if i % 2 == 0 else "deterministic",
            "draws": 20,
            "holdout": {"share": 0.2},
        }
        r = client.post(f"/v1/plans/{PLAN}/versions", json=body, headers=keys.h(keys.analyst))
        assert r.status_code == 201, r.text
        approve(client, keys, r.json()["version"], plan=PLAN)


def activate(client: Any, keys: Any, version: int, expected_revision: int) -> Any:
    """The raw activation answer (racers assert on 200 or 409 themselves; support.activate
    asserts the 200)."""
    return client.post(
        f"/v1/plans/{PLAN}/activate",
        json={"version": version, "reason": "go", "expected_revision": expected_revision},
        headers=keys.h(keys.approver),
    )


def audit_entries(client: Any, keys: Any) -> list[dict[str, Any]]:
    """Every audit entry, paging through the listing."""
    out: list[dict[str, Any]] = []
    after = 0
    while True:
        page = client.get(
            "/v1/audit", params={"after": after, "limit": 500}, headers=keys.h(keys.reader)
        )
        assert page.status_code == 200, page.text
        entries = page.json()["entries"]
        if not entries:
            return out
        out.extend(entries)
        after = entries[-1]["id"]


def assert_consistent(db_url: str, *, settled: bool = True) -> dict[str, int]:
    """Nothing half-stored, read straight from the tables: the audit chain verifies; every readout,
    watch upload, plan version, model and activation has exactly its audit entry and every such
    entry its row; stored bytes are present; each plan's pointer agrees with its activation history
    and exactly its live version is `active`; no job is left `running` and a failed job's model is
    failed with the job's error (`settled`: checked once a server has reclaimed and run the jobs;
    right after a kill a job may still read `running`). Returns the row counts."""
    import json
    from collections import Counter

    from sqlalchemy import select

    from apportion.store import audit as audit_store
    from apportion.store.db import Database
    from apportion.store.tables import (
        AuditEntry,
        Blob,
        CohortModel,
        Experiment,
        Job,
        PlanActivation,
        PlanPointer,
        PlanVersion,
        Readout,
        WatchUpload,
    )

    db = Database.connect(db_url, pool_size=2)
    try:
        with db.read() as s:
            verdict = audit_store.verify(s)
            assert verdict.intact, verdict
            entries = s.execute(select(AuditEntry).order_by(AuditEntry.id)).scalars().all()
            by_action: dict[str, Counter[str]] = {}
            for e in entries:
                by_action.setdefault(e.action, Counter())[e.entity_id] += 1
            blobs = set(s.execute(select(Blob.sha256)).scalars())
            exp_key = dict(s.execute(select(Experiment.id, Experiment.key)).all())

            readouts = s.execute(select(Readout)).scalars().all()
            assert Counter(
                f"{exp_key[r.experiment_id]}/{r.version}" for r in readouts
            ) == by_action.get("readout.upload", Counter())
            assert all(r.blob_sha256 in blobs for r in readouts)
            for key_id in exp_key:  # versions 1..n without a gap
                vs = sorted(r.version for r in readouts if r.experiment_id == key_id)
                assert vs == list(range(1, len(vs) + 1)), vs

            uploads = s.execute(select(WatchUpload)).scalars().all()
            assert Counter(f"{u.plan}/{u.version}" for u in uploads) == by_action.get(
                "watch.upload", Counter()
            )
            assert all(u.blob_sha256 in blobs for u in uploads)

            models = s.execute(select(CohortModel)).scalars().all()
            assert Counter(str(m.id) for m in models) == by_action.get("model.fit", Counter())
            jobs = {j.id: j for j in s.execute(select(Job)).scalars()}
            if settled:
                assert not [j.id for j in jobs.values() if j.status == "running"]
            for m in models:
                job = jobs[m.job_id]
                if m.status == "done":
                    assert job.status == "done" and m.result["estimation_mask_blob"] in blobs
                if job.status == "failed":
                    assert m.status == "failed" and m.result == {"error": job.error}, (
                        m.status,
                        m.result,
                    )

            versions = s.execute(select(PlanVersion)).scalars().all()
            assert Counter(f"{v.plan}/{v.version}" for v in versions) == by_action.get(
                "plan.draft", Counter()
            )
            acts = s.execute(select(PlanActivation).order_by(PlanActivation.id)).scalars().all()
            switches = [e for e in entries if e.action in ("plan.activate", "plan.rollback")]
            for ptr in s.execute(select(PlanPointer)).scalars():
                mine = [a for a in acts if a.plan == ptr.plan]
                audited = [json.loads(e.payload) for e in switches if e.entity_id == ptr.plan]
                assert [a.revision for a in mine] == list(range(1, ptr.revision + 1))
                got = [(p["revision"], p["to_version"]) for p in audited]
                assert got == [(a.revision, a.version) for a in mine], (got, mine)
                assert ptr.active_version == (mine[-1].version if mine else None)
                active = [
                    v.version for v in versions if v.plan == ptr.plan and v.status == "active"
                ]
                assert active == ([ptr.active_version] if ptr.active_version else [])
            return {
                "audit_entries": len(entries),
                "readouts": len(readouts),
                "watch_uploads": len(uploads),
                "models": len(models),
                "activations": len(acts),
            }
    finally:
        db.dispose()
