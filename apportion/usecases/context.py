"""What a running process holds: settings, the database, the in-memory key cache and the live plan
registry. Created once per app; the API reaches it through `api/deps.py`."""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Hashable
from dataclasses import dataclass, field
from typing import Any

from apportion.config import Settings
from apportion.store.db import Database

PLAN_DIFFS_KEPT = 64  # each entry is a few hundred bytes per cohort; reviewers read few versions


class BoundedCache:
    """A least-recently-used map of at most `maxsize` entries, safe to share between request
    threads (a computation may run twice when two requests miss at once; both store the same
    value)."""

    def __init__(self, maxsize: int) -> None:
        self.maxsize = maxsize
        self._items: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: Hashable) -> Any | None:
        with self._lock:
            if key not in self._items:
                return None
            self._items.move_to_end(key)
            return self._items[key]

    def put(self, key: Hashable, value: Any) -> None:
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.maxsize:
                self._items.popitem(last=False)

    def __len__(self) -> int:
        with self._lock:
            return len(self._items)


@dataclass
class Services:
    settings: Settings
    db: Database
    keys: Any = None  # usecases.auth.KeyCache
    plans: Any = None  # serving.registry.PlanRegistry
    poller: Any = None
    jobs: Any = None  # usecases.jobs.JobRunner
    extras: dict[str, Any] = field(default_factory=dict)
    # per (plan, version, live version): the share of members whose arm would change
    plan_diffs: BoundedCache = field(default_factory=lambda: BoundedCache(PLAN_DIFFS_KEPT))
