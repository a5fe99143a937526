"""The kill -9 suite, on SQLite and PostgreSQL: a server process is killed with SIGKILL
while readout uploads stream in, a fit job runs and activations and rollbacks race; after each
restart the audit chain verifies, nothing is half-stored (tests/writers.py `assert_consistent`),
every request that was answered with success is stored, and the interrupted job and its model
end readable: the first interruption is picked up again and finishes, the second exhausts the
job's attempts and the model ends `failed` with the job's error (item 5)."""

from __future__ import annotations

import threading
import time
from typing import Any

import httpx
import pytest
from servers import NO_POSTGRES, PG_URL, Server, fresh_database, prepare
from support import EXPERIMENT, Keys, rows_csv, wait_job
from writers import CSV, PLAN, activate, approved_versions, assert_consistent, small_model

STALE = "1.0"  # job_stale_seconds: a restarted server reclaims the killed fit at once


@pytest.mark.parametrize(
    "backend",
    [
        "sqlite",
        pytest.param("postgresql", marks=pytest.mark.skipif(not PG_URL, reason=NO_POSTGRES)),
    ],
)
def test_kill9_during_uploads_a_fit_and_activations(backend: str, tmp_path) -> None:  # type: ignore[no-untyped-def]
    url = fresh_database(backend, tmp_path)
    keys = prepare(url)
    server = Server(url, tmp_path / "server.log", env={"APPORTION_JOB_STALE_SECONDS": STALE})
    server.start()
    stored: dict[str, Any] = {"readouts": set(), "revisions": set()}
    try:
        with server.client() as c:
            approved_versions(c, keys, small_model(c, keys), 2)
            assert activate(c, keys, 1, 0).status_code == 200
            assert (
                c.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst)).status_code
                == 201
            )
            fit = _start_slow_fit(c, keys)
        for attempt in (1, 2):
            _wait_running(server, keys, fit["job"], attempt)
            _storm_then_kill(server, keys, stored, seed=1000 * attempt)
            assert_consistent(url, settled=False)  # as the kill left it, before any recovery
            server.start()
        with server.client() as c:
            job = wait_job(c, keys, fit["job"], timeout=60)
            model = c.get(fit["model"], headers=keys.h(keys.reader)).json()
            # two interruptions exhaust the attempts: the job and its model end failed, readable
            assert job["status"] == "failed" and job["attempts"] == 2, job
            assert model["status"] == "failed" and model["error"] == job["error"], model
            _answered_are_stored(c, keys, stored)
            listed = c.get(f"/v1/experiments/{EXPERIMENT['key']}", headers=keys.h(keys.reader))
            assert listed.status_code == 200
        counts = assert_consistent(url)
        assert counts["readouts"] >= len(stored["readouts"]) + 1
    finally:
        server.stop()
    errors = [line[:400] for line in server.log().splitlines() if "unexpected error" in line]
    assert not errors, errors


def _start_slow_fit(c: httpx.Client, keys: Keys) -> dict[str, Any]:
    """A fit that outlasts a storm on a quiet machine too: 40,000 learners, a deep tree with small
    leaves and 20-fold pruning (about 7 s on an idle core; a depth-4 tree took 0.5 s, so a re-run
    attempt could finish before the test saw it running)."""
    from apportion.demo.scenario import EXPERIMENT_KEY, simulate, to_csv_bytes

    r = c.post(
        f"/v1/experiments/{EXPERIMENT_KEY}/readouts",
        content=to_csv_bytes(simulate(40_000, seed=9)),
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.status_code == 201, r.text
    body = {
        "readout_version": r.json()["version"],
        "method": "causal_tree",
        "params": {"max_depth": 12, "min_units_per_arm": 5, "cv_folds": 20},
    }
    r = c.post(f"/v1/experiments/{EXPERIMENT_KEY}/models", json=body, headers=keys.h(keys.analyst))
    assert r.status_code == 202, r.text
    return r.json()


def _wait_running(server: Server, keys: Keys, job_url: str, attempt: int) -> None:
    with server.client() as c:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            job = c.get(job_url, headers=keys.h(keys.reader)).json()
            if job["status"] == "running" and job["attempts"] == attempt:
                return
            assert job["status"] in ("queued", "running"), job
            time.sleep(0.02)
    raise AssertionError(f"the fit did not start attempt {attempt}")


def _storm_then_kill(server: Server, keys: Keys, stored: dict[str, Any], seed: int) -> None:
    """Uploads and activations from four threads; SIGKILL once both kinds have been answered
    (so requests are in flight at every stage), while the fit is running."""
    stop = threading.Event()
    answered = {"uploads": 0, "switches": 0}
    wrong: list[str] = []

    def uploads(k: int) -> None:
        i = 0
        with server.client() as c:
            while not stop.is_set():
                body = rows_csv(200, seed=seed + 10 * k + i)
                i += 1
                try:
                    r = c.post(
                        f"/v1/experiments/{EXPERIMENT['key']}/readouts",
                        content=body,
                        headers={**keys.h(keys.analyst), **CSV},
                    )
                except httpx.HTTPError:
                    return  # the server died mid-request
                if r.status_code not in (200, 201):
                    wrong.append(r.text)
                    return
                stored["readouts"].add(r.json()["content_hash"])
                answered["uploads"] += 1

    def switches(k: int) -> None:
        with server.client() as c:
            while not stop.is_set():
                try:
                    plan = c.get(f"/v1/plans/{PLAN}", headers=keys.h(keys.reader)).json()
                    target = 2 if plan["live_version"] == 1 else 1
                    r = activate(c, keys, target, plan["revision"])
                except httpx.HTTPError:
                    return
                if r.status_code not in (200, 409):
                    wrong.append(r.text)
                    return
                if r.status_code == 200:
                    stored["revisions"].add(r.json()["revision"])
                    answered["switches"] += 1

    threads = [threading.Thread(target=uploads, args=(k,)) for k in range(2)]
    threads += [threading.Thread(target=switches, args=(k,)) for k in range(2)]
    for t in threads:
        t.start()
    deadline = time.monotonic() + 30
    while time.monotonic() < deadline and not (
        answered["uploads"] >= 2 and answered["switches"] >= 2
    ):
        time.sleep(0.02)
    server.kill9()
    stop.set()
    for t in threads:
        t.join(timeout=30)
    assert not wrong, wrong
    assert answered["uploads"] >= 2 and answered["switches"] >= 2, answered


def _answered_are_stored(c: httpx.Client, keys: Keys, stored: dict[str, Any]) -> None:
    """Every upload and activation that got a success answer survived the kill."""
    exp = c.get(f"/v1/experiments/{EXPERIMENT['key']}", headers=keys.h(keys.reader)).json()
    assert stored["readouts"] <= {r["content_hash"] for r in exp["readouts"]}
    plan = c.get(f"/v1/plans/{PLAN}", headers=keys.h(keys.reader)).json()
    assert stored["revisions"] <= {a["revision"] for a in plan["activations"]}
