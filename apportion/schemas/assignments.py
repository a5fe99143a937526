"""Lookups: which arm for a member (one, or up to 10,000 in order), and the portable compiled plan.

The request shapes are TypedDicts validated by pydantic adapters (the lookup path validates raw
bytes without building model objects); the answers are what the lookup path sends, byte for byte
(a test validates real answers against these models)."""

from __future__ import annotations

from typing import Annotated, Any, NotRequired

from pydantic import BaseModel, ConfigDict, Field, StringConstraints, TypeAdapter
from typing_extensions import TypedDict

MAX_BATCH = 10_000


class AssignIn(TypedDict):
    """One member to assign. Extra keys are ignored."""

    __pydantic_config__ = ConfigDict(extra="ignore")  # type: ignore[misc]
    member_id: Annotated[str, StringConstraints(min_length=1, max_length=200)]
    features: NotRequired[dict[str, Any]]


class BatchIn(TypedDict):
    """Up to 10,000 members, answered in order."""

    __pydantic_config__ = ConfigDict(extra="ignore")  # type: ignore[misc]
    members: Annotated[list[AssignIn], Field(max_length=MAX_BATCH)]


SINGLE = TypeAdapter(AssignIn)
BATCH = TypeAdapter(BatchIn)


class AssignOut(BaseModel):
    """The member's arm, cohort and the live version that decided; `holdout` when the member is
    in the plan's holdout; `defaults_used` names features that were missing or unknown."""

    model_config = ConfigDict(extra="forbid")
    arm: str
    cohort: int
    plan_version: int
    holdout: bool
    defaults_used: list[str]


class BatchOut(BaseModel):
    model_config = ConfigDict(extra="forbid")
    assignments: list[AssignOut]


class CompiledPlanOut(BaseModel):
    """The portable compiled plan (format version 1, docs/compiled-plan.md)."""

    model_config = ConfigDict(extra="forbid")
    format: str
    format_version: int
    plan: str
    plan_version: int
    revision: int
    hashing: dict[str, Any]
    arms: list[str]
    holdout: dict[str, Any]
    features: list[dict[str, str]]
    nodes: list[dict[str, Any]]
    cumulative: list[list[float]]
    content_hash: str
