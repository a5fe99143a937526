"""Lookups: which arm for a member (one, or up to 10,000 in order), and the portable compiled plan.

The request shapes are TypedDicts validated by pydantic adapters (the lookup path validates raw
bytes without building model objects); the answers are what the lookup path sends, byte for byte
(a test validates real answers against these models)."""

from __future__ import annotations

from typing import Annotated, Any, Literal, NotRequired

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


# ---- the portable compiled plan: docs/compiled-plan.md, field for field ------------------------


class _Doc(BaseModel):
    model_config = ConfigDict(extra="forbid")


class HashPersons(_Doc):
    holdout: str = Field(description="BLAKE2b `personal` of the holdout draw (UTF-8, 0-padded)")
    arm: str = Field(description="BLAKE2b `personal` of the arm draw")


class Hashing(_Doc):
    function: Literal["blake2b"]
    digest_bytes: Literal[8]
    salt_hex: str = Field(description="16 bytes, hex: BLAKE2b's `salt` for every draw")
    person: HashPersons


class CompiledHoldout(_Doc):
    share: float = Field(description="the share of members in the holdout (0 when off)")
    arm: str = Field(description="the arm holdout members get")


class CompiledFeature(_Doc):
    key: str
    kind: Literal["numeric", "categorical"]


class LeafNode(_Doc):
    cohort: int


class _Split(_Doc):
    feature: int = Field(description="index into `features`")
    left: int = Field(description="index into `nodes`")
    right: int = Field(description="index into `nodes`")
    default: Literal["left", "right"] = Field(description="where missing or unlisted values go")


class NumericSplit(_Split):
    threshold: float = Field(description="a present value x goes left when x < threshold")


class CategoricalSplit(_Split):
    left_levels: list[str] = Field(description="levels that go left (listed on both: left)")
    right_levels: list[str]


class CompiledPlanOut(_Doc):
    """The portable compiled plan (format version 1, docs/compiled-plan.md). A node is a leaf
    (`cohort` only), a numeric split (`threshold`) or a categorical split (`left_levels` and
    `right_levels`); their keys tell them apart, as the document's readers do."""

    format: Literal["apportion-compiled-plan"]
    format_version: Literal[1]
    plan: str
    plan_version: int
    revision: int = Field(description="the plan pointer's revision")
    hashing: Hashing
    arms: list[str] = Field(description="arm keys; the columns of `cumulative`")
    holdout: CompiledHoldout
    features: list[CompiledFeature]
    nodes: list[LeafNode | NumericSplit | CategoricalSplit] = Field(
        description="the decision tree in pre-order; node 0 is the root"
    )
    cumulative: list[list[float]] = Field(description="per cohort, cumulative arm shares")
    content_hash: str = Field(description="'sha256:' and the hex digest; the ETag")
