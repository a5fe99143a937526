"""The per-process registry of compiled plans and the poller that keeps it current.

Readers never lock: the registry holds one immutable mapping (plan -> CompiledPlan) and a swap
replaces it with a new mapping in a single attribute assignment, which is atomic in CPython, so
a lookup sees either the old or the new mapping, never a half-built one. Writers (a use case
after its commit, the poller) serialise on a lock among themselves only.

The poller asks the store for every plan pointer's revision (cheap), loads and compiles only the
plans whose revision moved, and swaps them in. A failing load is reported to `on_error` and
retried on the next poll; the serving index keeps the last good version meanwhile.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Mapping
from types import MappingProxyType
from typing import Any

from apportion.serving.index import CompiledPlan

log = logging.getLogger(__name__)

_ANY: Any = object()


class PlanRegistry:
    """Active compiled plans of this process, keyed by plan name. Thread-safe."""

    def __init__(self) -> None:
        self._plans: Mapping[str, CompiledPlan] = MappingProxyType({})
        self._revisions: Mapping[str, int] = MappingProxyType({})
        self._lock = threading.Lock()
        self.last_refresh: float | None = None  # wall time (time.time()) of the last good poll
        self.last_refresh_monotonic: float | None = None  # the same on the monotonic clock

    def get(self, plan: str) -> CompiledPlan | None:
        """The active compiled version of `plan`, or None (no active version: the route's 404)."""
        return self._plans.get(plan)

    def plans(self) -> Mapping[str, CompiledPlan]:
        """A consistent snapshot of every loaded plan (read-only)."""
        return self._plans

    def revisions(self) -> dict[str, int]:
        """Pointer revision per known plan, including plans known to have no active version."""
        return dict(self._revisions)

    def swap(
        self,
        plan: str,
        compiled: CompiledPlan | None,
        *,
        revision: int | None = None,
        expected_revision: Any = _ANY,
    ) -> bool:
        """Atomically make `compiled` the active version of `plan` (None: no active version).

        `revision` is the pointer revision this state reflects; it defaults to
        `compiled.revision`. With `expected_revision` (an int, or None for "not known yet") the
        swap happens only if the registry still holds that revision, so a slow poll cannot undo
        a newer swap made meanwhile by a use case; returns whether it swapped.
        """
        if compiled is not None and compiled.plan != plan:
            raise ValueError(f"compiled plan is {compiled.plan!r}, not {plan!r}")
        rev = compiled.revision if revision is None and compiled is not None else revision
        with self._lock:
            if expected_revision is not _ANY and self._revisions.get(plan) != expected_revision:
                return False
            plans = dict(self._plans)
            revs = dict(self._revisions)
            if compiled is None:
                plans.pop(plan, None)
            else:
                plans[plan] = compiled
            if rev is None:
                revs.pop(plan, None)
            else:
                revs[plan] = int(rev)
            # two independent assignments; a reader needs only `_plans` to be whole
            self._plans = MappingProxyType(plans)
            self._revisions = MappingProxyType(revs)
        return True

    def forget(self, plan: str) -> None:
        """Drop a plan entirely (its pointer no longer exists)."""
        self.swap(plan, None, revision=None)

    def mark_refreshed(self) -> None:
        self.last_refresh = time.time()
        self.last_refresh_monotonic = time.monotonic()

    def refresh_age(self) -> float | None:
        """Seconds since the last good poll (monotonic), or None before the first one."""
        if self.last_refresh_monotonic is None:
            return None
        return time.monotonic() - self.last_refresh_monotonic


class RevisionPoller:
    """A daemon thread that calls `poll_once` every `interval` seconds until `stop()`.

    fetch_revisions() -> {plan: pointer revision} for every plan pointer in the store.
    load(plan) -> the compiled active version (its `.revision` set), or None when the plan has
    no active version. Exceptions from either go to `on_error` (default: logged) and never end
    the thread.
    """

    def __init__(
        self,
        registry: PlanRegistry,
        *,
        fetch_revisions: Callable[[], dict[str, int]],
        load: Callable[[str], CompiledPlan | None],
        interval: float = 1.0,
        on_error: Callable[[Exception], None] | None = None,
    ) -> None:
        if not interval > 0:
            raise ValueError(f"interval must be positive, got {interval!r}")
        self.registry = registry
        self.fetch_revisions = fetch_revisions
        self.load = load
        self.interval = float(interval)
        self.on_error = on_error
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._poll_lock = threading.Lock()

    def _report(self, exc: Exception) -> None:
        try:
            if self.on_error is None:
                log.error("plan poll failed: %s", exc, exc_info=exc)
            else:
                self.on_error(exc)
        except Exception:  # an error handler must not end the poller
            log.exception("plan poll error handler failed")

    def poll_once(self) -> list[str]:
        """Reload plans whose revision moved; returns the plans swapped, in name order.

        The poll counts as good (updates `registry.last_refresh`) only when fetching and every
        needed load succeeded.
        """
        with self._poll_lock:
            try:
                remote = dict(self.fetch_revisions())
            except Exception as e:
                self._report(e)
                return []
            local = self.registry.revisions()
            changed: list[str] = []
            ok = True
            for plan in sorted(remote):
                rev = int(remote[plan])
                seen = local.get(plan)
                if seen == rev:
                    continue
                try:
                    compiled = self.load(plan)
                except Exception as e:
                    ok = False
                    self._report(e)
                    continue
                swapped = self.registry.swap(
                    plan,
                    compiled,
                    revision=compiled.revision if compiled is not None else rev,
                    expected_revision=seen,
                )
                if swapped:
                    changed.append(plan)
            for plan in sorted(set(local) - set(remote)):
                if self.registry.swap(plan, None, revision=None, expected_revision=local[plan]):
                    changed.append(plan)
            if ok:
                self.registry.mark_refreshed()
            return changed

    def _run(self) -> None:
        while not self._stop.is_set():
            try:
                self.poll_once()
            except Exception as e:  # poll_once reports its own; this is a last guard
                self._report(e)
            self._stop.wait(self.interval)

    def start(self) -> None:
        if self._thread is not None and self._thread.is_alive():
            return
        self._stop.clear()
        self._thread = threading.Thread(target=self._run, name="plan-revision-poller", daemon=True)
        self._thread.start()

    def stop(self, timeout: float | None = 5.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
            self._thread = None

    @property
    def running(self) -> bool:
        return self._thread is not None and self._thread.is_alive()
