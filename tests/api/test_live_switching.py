"""Concurrency and rollback under load: racing activations, switching the live version
back and forth while assignments flow, and a second server process sharing the database."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import threading
import time

import httpx
import pytest
from fastapi.testclient import TestClient
from snapshots import module_snapshot
from support import approve, draft_plan, scenario_model

from apportion.domain import Actor
from apportion.errors import Conflict
from apportion.schemas.plans import ActivateIn, Switched
from apportion.usecases import plans as uc

POLL = 0.5  # seconds: the second process's poll interval (the in-process app swaps right after its commit)


def _approved_pair(client: TestClient, keys) -> dict:  # type: ignore[no-untyped-def]
    """Versions 1 (chance) and 2 (deterministic) drafted and approved, neither live yet."""
    model = scenario_model(client, keys)
    draft_plan(client, keys, model)
    draft_plan(client, keys, model, method="deterministic", holdout={"share": 0.2})
    for v in (1, 2):
        approve(client, keys, v)
    return {}


# one fit, two drafts and two approvals for the module; each test gets its own copy
snap, db_url, keys = module_snapshot(_approved_pair)


def test_two_activations_with_the_same_revision_exactly_one_wins(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    services = client.app.state.services  # type: ignore[attr-defined]
    barrier = threading.Barrier(2)
    results: list[object] = []

    def go(version: int, who: str) -> None:
        barrier.wait()
        try:
            results.append(
                uc.activate(
                    services,
                    plan="lesson-length",
                    command=ActivateIn(version=version, reason="race", expected_revision=0),
                    actor=Actor(who, "approver"),
                )
            )
        except Conflict as exc:
            results.append(exc)

    threads = [
        threading.Thread(target=go, args=(1, "a")),
        threading.Thread(target=go, args=(2, "b")),
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    wins = [r for r in results if isinstance(r, Switched)]
    losses = [r for r in results if isinstance(r, Conflict)]
    assert len(wins) == 1 and len(losses) == 1
    plan = client.get("/v1/plans/lesson-length", headers=keys.h(keys.reader)).json()
    assert plan["revision"] == 1 and plan["live_version"] == wins[0].to_version


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
def second_server(client: TestClient, db_url: str):  # type: ignore[no-untyped-def]
    port = _free_port()
    env = {
        **os.environ,
        "APPORTION_DATABASE_URL": db_url,
        "APPORTION_POLL_INTERVAL_SECONDS": str(POLL),
        "APPORTION_LOG_LEVEL": "WARNING",
        "APPORTION_RUN_JOBS_IN_PROCESS": "false",
    }
    log = open(
        os.path.join(
            os.path.dirname(db_url.split("///")[-1]) if db_url.startswith("sqlite") else "/tmp",
            f"server-{port}.log",
        ),
        "w+b",
    )
    proc = subprocess.Popen(
        [sys.executable, "-m", "apportion.cli", "serve", "--port", str(port)],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=log,
    )
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 120  # a cold start takes ~3 s quiet, ~30 s on a loaded box
    while time.monotonic() < deadline:
        try:
            if httpx.get(url + "/healthz", timeout=0.5).status_code == 200:
                break
        except httpx.HTTPError:
            time.sleep(0.1)
    else:
        proc.kill()
        proc.wait()
        log.seek(0)
        text = log.read().decode()
        log.close()
        raise AssertionError(text or "server did not start")
    yield url
    proc.terminate()
    proc.wait(timeout=10)
    log.close()


def test_switching_under_load_never_fails_and_reaches_the_second_process(
    client: TestClient, keys, second_server: str
) -> None:  # type: ignore[no-untyped-def]
    h = keys.h(keys.approver)
    assert (
        client.post(
            "/v1/plans/lesson-length/activate",
            json={"version": 1, "reason": "go", "expected_revision": 0},
            headers=h,
        ).status_code
        == 200
    )
    with httpx.Client(base_url=second_server, headers=keys.h(keys.reader), timeout=5) as remote:
        _switch_under_load(client, keys, remote, h)
    assert client.get("/v1/audit/verify", headers=keys.h(keys.admin)).json()["intact"] is True


def _switch_under_load(client: TestClient, keys, remote: httpx.Client, h: dict) -> None:  # type: ignore[no-untyped-def]
    # wait until the second process serves version 1
    deadline = time.monotonic() + 5
    while (
        remote.post(
            "/v1/plans/lesson-length/assign", json={"member_id": "probe", "features": {}}
        ).status_code
        != 200
    ):
        assert time.monotonic() < deadline
        time.sleep(0.05)

    timeline: list[tuple[float, float, int]] = [
        (0.0, time.monotonic(), 1)
    ]  # (switch started, switch returned, new live)
    answers: list[tuple[float, float, int, str]] = []  # (sent, received, version, where)
    failures: list[str] = []
    stop = threading.Event()

    def load(where: str) -> None:
        c = remote if where == "remote" else None
        i = 0
        while not stop.is_set() and i < 3000:
            i += 1
            sent = time.monotonic()
            body = {"member_id": f"m{i}", "features": {"level": "advanced", "streak_days": 9}}
            r = (
                c.post("/v1/plans/lesson-length/assign", json=body)
                if c
                else client.post(
                    "/v1/plans/lesson-length/assign", json=body, headers=keys.h(keys.reader)
                )
            )
            got = time.monotonic()
            if r.status_code != 200:
                failures.append(f"{where}: {r.status_code} {r.text}")
            else:
                answers.append((sent, got, r.json()["plan_version"], where))

    workers = [threading.Thread(target=load, args=(w,)) for w in ("local", "remote")]
    for w in workers:
        w.start()
    reached: list[float] = []
    for k in range(6):
        target = 2 if k % 2 == 0 else 1
        t0 = time.monotonic()
        if target == 2:
            rev = client.get("/v1/plans/lesson-length", headers=keys.h(keys.reader)).json()[
                "revision"
            ]
            r = client.post(
                "/v1/plans/lesson-length/activate",
                json={"version": 2, "reason": "switch", "expected_revision": rev},
                headers=h,
            )
        else:
            r = client.post(
                "/v1/plans/lesson-length/rollback", json={"reason": "switch back"}, headers=h
            )
        assert r.status_code == 200, r.text
        t1 = time.monotonic()
        timeline.append((t0, t1, target))
        # the second process serves the new version within two poll intervals
        while True:
            v = remote.post(
                "/v1/plans/lesson-length/assign", json={"member_id": "probe", "features": {}}
            ).json()["plan_version"]
            if v == target:
                reached.append(time.monotonic() - t1)
                break
            assert time.monotonic() - t1 < 2 * POLL, (
                f"second process still serves {v} after {time.monotonic() - t1:.2f} s"
            )
            time.sleep(0.01)
        time.sleep(0.15)
    stop.set()
    for w in workers:
        w.join()
    assert failures == []
    assert len(answers) > 50

    def live_during(sent: float, got: float, version: int, lag: float) -> bool:
        # the version was live at some instant in [sent - lag, got]; a switch's instant lies in [t0, t1]
        for i, (t0, _t1, v) in enumerate(timeline):
            end = timeline[i + 1][1] if i + 1 < len(timeline) else float("inf")
            if v == version and t0 <= got and end >= sent - lag:
                return True
        return False

    bad = [
        a
        for a in answers
        if not live_during(a[0], a[1], a[2], 0.0 if a[3] == "local" else 2 * POLL)
    ]
    assert bad == []
    assert max(reached) < 2 * POLL
