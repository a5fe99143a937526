"""Plan versions, by job: `drafting` (validate, build and solve, store with the report or its job),
`solve` (the one build-and-solve path the drafting and the report job share), `report_jobs` (the
report and held-out evaluation jobs), `lifecycle` (approve, reject, activate, roll back), `views`
(reading, and the diff against the live version) and `source` (what a plan is built from).
Every transition commits with its audit entry; the serving index is swapped after the commit."""

from apportion.usecases.plans import report_jobs as report_jobs  # registers the job handlers
from apportion.usecases.plans.drafting import INLINE_MAX_DRAWS, draft_version
from apportion.usecases.plans.lifecycle import (
    ACTIVATABLE,
    activate,
    decide,
    rollback,
    rollback_in,
    rollback_target,
)
from apportion.usecases.plans.source import table_columns
from apportion.usecases.plans.views import get_plan, get_version, list_plans, version_view

__all__ = [
    "ACTIVATABLE",
    "INLINE_MAX_DRAWS",
    "activate",
    "decide",
    "draft_version",
    "get_plan",
    "get_version",
    "list_plans",
    "rollback",
    "rollback_in",
    "rollback_target",
    "table_columns",
    "version_view",
]
