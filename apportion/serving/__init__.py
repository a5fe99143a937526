"""The low-latency assignment path: compiled plan index, salted hashing, registry and poller.

Pure Python + numpy; never touches the database (DEVELOPERS.md, layers). `compile_plan` turns a plan
version into an immutable `CompiledPlan`; `PlanRegistry` holds the active ones per process and
`RevisionPoller` keeps them in step with the store.
"""

from apportion.serving.index import (
    Assignment,
    CompiledPlan,
    PlanParts,
    compile_plan,
    new_salt,
    unit_uniform,
)
from apportion.serving.registry import PlanRegistry, RevisionPoller

__all__ = [
    "Assignment",
    "CompiledPlan",
    "PlanParts",
    "PlanRegistry",
    "RevisionPoller",
    "compile_plan",
    "new_salt",
    "unit_uniform",
]
