"""Registry swaps under concurrent readers, and the revision poller."""

from __future__ import annotations

import sys
import threading
import time

import numpy as np
import pytest
from serving.serving_helpers import hand_partition

from apportion.serving.index import CompiledPlan, PlanParts, compile_plan
from apportion.serving.registry import PlanRegistry, RevisionPoller

ALLOC = np.array([[0.2, 0.5, 0.3], [0.5, 0.25, 0.25], [0.6, 0.4, 0.0]])


def _compiled(version: int, revision: int, plan: str = "lesson-length") -> CompiledPlan:
    return compile_plan(
        PlanParts(
            plan=plan,
            version=version,
            partition=hand_partition(),
            allocation=np.roll(ALLOC, version, axis=1),
            arm_keys=("control", "short", "long"),
            holdout_share=0.05,
            holdout_arm="control",
            salt="reg-salt",
            revision=revision,
        )
    )


def _wait_for(cond, timeout: float = 5.0) -> bool:
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(0.005)
    return cond()


def test_get_swap_and_revisions():
    reg = PlanRegistry()
    assert reg.get("lesson-length") is None and reg.revisions() == {}
    v1 = _compiled(1, 3)
    assert reg.swap("lesson-length", v1)
    assert reg.get("lesson-length") is v1 and reg.revisions() == {"lesson-length": 3}
    assert reg.swap("lesson-length", None, revision=4)  # no active version, revision known
    assert reg.get("lesson-length") is None and reg.revisions() == {"lesson-length": 4}
    assert not reg.swap("lesson-length", v1, expected_revision=3)  # stale compare-and-set
    assert reg.get("lesson-length") is None
    with pytest.raises(ValueError):
        reg.swap("other-plan", v1)
    reg.forget("lesson-length")
    assert reg.revisions() == {}


def test_swap_is_atomic_under_concurrent_readers():
    reg = PlanRegistry()
    versions = {1: _compiled(1, 1), 2: _compiled(2, 2)}
    expected = {v: cp.assign("m-1", {"tenure_days": 5}) for v, cp in versions.items()}
    reg.swap("lesson-length", versions[1])
    stop = threading.Event()
    problems: list[str] = []
    seen: list[set[int]] = []

    def reader():
        mine: set[int] = set()
        while not stop.is_set():
            cp = reg.get("lesson-length")
            # a complete plan of exactly one version: the object we built, answering as that version
            if cp is None or cp is not versions.get(cp.version):
                problems.append(f"unexpected plan {cp!r}")
                return
            a = cp.assign("m-1", {"tenure_days": 5})
            if a != expected[cp.version] or a.plan_version != cp.version:
                problems.append(f"version {cp.version} answered {a}")
                return
            mine.add(cp.version)
        seen.append(mine)

    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # force frequent thread switches so reads interleave with swaps
    try:
        threads = [threading.Thread(target=reader) for _ in range(3)]
        for t in threads:
            t.start()
        for i in range(20_000):
            reg.swap("lesson-length", versions[1 + i % 2])
        stop.set()
        for t in threads:
            t.join(10)
    finally:
        sys.setswitchinterval(old)
    assert problems == []
    assert len(seen) == 3 and all(s == {1, 2} for s in seen)  # readers did see both versions


class _Store:
    """A stand-in for the store: pointer revisions and the active version per plan."""

    def __init__(self):
        self.revs: dict[str, int] = {}
        self.active: dict[str, CompiledPlan | None] = {}
        self.loads: list[str] = []
        self.fail: set[str] = set()
        self.fail_fetch = False

    def fetch(self) -> dict[str, int]:
        if self.fail_fetch:
            raise ConnectionError("store unreachable")
        return dict(self.revs)

    def load(self, plan: str) -> CompiledPlan | None:
        self.loads.append(plan)
        if plan in self.fail:
            raise RuntimeError(f"cannot load {plan}")
        return self.active[plan]

    def publish(self, plan: str, cp: CompiledPlan | None, rev: int):
        self.active[plan], self.revs[plan] = cp, rev


def test_poll_once_loads_only_changed_plans():
    store, reg = _Store(), PlanRegistry()
    store.publish("lesson-length", _compiled(1, 1), 1)
    store.publish("reminder-time", _compiled(1, 1, plan="reminder-time"), 1)
    poller = RevisionPoller(reg, fetch_revisions=store.fetch, load=store.load)
    assert poller.poll_once() == ["lesson-length", "reminder-time"]
    assert reg.last_refresh is not None and reg.refresh_age() >= 0
    assert poller.poll_once() == [] and len(store.loads) == 2  # nothing moved, nothing loaded
    store.publish("lesson-length", _compiled(2, 2), 2)
    assert poller.poll_once() == ["lesson-length"]
    assert reg.get("lesson-length").version == 2 and store.loads[-1] == "lesson-length"
    # rollback: an older version under a newer pointer revision
    store.publish("lesson-length", _compiled(1, 3), 3)
    assert poller.poll_once() == ["lesson-length"] and reg.get("lesson-length").version == 1
    # deactivated: no active version; the revision is remembered so it is not reloaded
    store.publish("reminder-time", None, 2)
    assert poller.poll_once() == ["reminder-time"] and reg.get("reminder-time") is None
    n = len(store.loads)
    assert poller.poll_once() == [] and len(store.loads) == n
    # pointer deleted: forgotten
    del store.revs["reminder-time"]
    assert poller.poll_once() == ["reminder-time"] and "reminder-time" not in reg.revisions()


def test_poll_reports_load_errors_and_keeps_the_last_good_version():
    store, reg, errors = _Store(), PlanRegistry(), []
    store.publish("lesson-length", _compiled(1, 1), 1)
    poller = RevisionPoller(
        reg, fetch_revisions=store.fetch, load=store.load, on_error=errors.append
    )
    poller.poll_once()
    stamp = reg.last_refresh
    store.publish("lesson-length", _compiled(2, 2), 2)
    store.fail.add("lesson-length")
    assert poller.poll_once() == []
    assert isinstance(errors[-1], RuntimeError) and reg.get("lesson-length").version == 1
    assert reg.last_refresh == stamp  # a poll with a failed load is not a good poll
    store.fail_fetch = True
    assert poller.poll_once() == [] and isinstance(errors[-1], ConnectionError)
    store.fail_fetch = False
    store.fail.clear()
    assert poller.poll_once() == ["lesson-length"] and reg.get("lesson-length").version == 2


def test_slow_poll_does_not_undo_a_newer_local_swap():
    store, reg = _Store(), PlanRegistry()
    store.publish("lesson-length", _compiled(1, 1), 1)
    newer = _compiled(2, 2)

    def load_then_race(plan):
        cp = store.load(plan)
        reg.swap(plan, newer)  # a use case commits and swaps while this poll is loading
        return cp

    poller = RevisionPoller(reg, fetch_revisions=store.fetch, load=load_then_race)
    assert poller.poll_once() == []
    assert reg.get("lesson-length") is newer


def test_background_poller_follows_changes_and_survives_errors():
    store, reg, errors = _Store(), PlanRegistry(), []
    store.publish("lesson-length", _compiled(1, 1), 1)

    def bad_handler(e):
        errors.append(e)
        raise ValueError("the handler itself fails")  # must not end the thread either

    poller = RevisionPoller(
        reg, fetch_revisions=store.fetch, load=store.load, interval=0.01, on_error=bad_handler
    )
    poller.start()
    try:
        assert _wait_for(lambda: reg.get("lesson-length") is not None)
        store.fail.add("lesson-length")
        store.publish("lesson-length", _compiled(2, 2), 2)
        assert _wait_for(lambda: len(errors) >= 2)
        assert poller.running and reg.get("lesson-length").version == 1
        store.fail.clear()
        assert _wait_for(lambda: reg.get("lesson-length").version == 2)
    finally:
        poller.stop()
    assert not poller.running


def test_poller_rejects_a_non_positive_interval():
    with pytest.raises(ValueError):
        RevisionPoller(PlanRegistry(), fetch_revisions=dict, load=lambda p: None, interval=0)
