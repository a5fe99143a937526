"""What a running process holds: settings, the database, the in-memory key cache and the live plan
registry. Created once per app; the API reaches it through `api/deps.py`."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from apportion.config import Settings
from apportion.store.db import Database


@dataclass
class Services:
    settings: Settings
    db: Database
    keys: Any = None  # usecases.auth.KeyCache
    plans: Any = None  # serving.registry.PlanRegistry
    poller: Any = None
    jobs: Any = None  # usecases.jobs.JobRunner
    extras: dict[str, Any] = field(default_factory=dict)
