"""The compiled, immutable lookup index of one plan version: member + features -> assignment.

A `Partition` and its (C, J) allocation compile to two copies of the same tree: linked `Node`s
for the single lookup (apportion/lookup.py: straight-line Python, no numpy scalars per node, ~µs
per call) and flat numpy arrays for batches (serving/compile.py and serving/batch.py: the walk is
vectorised over members; hashing loops per member). The checks both share are in
serving/checks.py. Salted hashing for stable assignment is common practice in online
experimentation (Kohavi, Tang and Xu, "Trustworthy Online Controlled Experiments", 2020, ch. 4):

    u1 = U(salt, member, "holdout");  u1 < holdout_share  -> holdout arm
    cohort = walk(partition, features)                     (also for holdout members, see below)
    u2 = U(salt, member, "arm");  arm = first j with cum[cohort, j] > u2,  cum[cohort, -1] = 1

Holdout members still get their cohort from the walk, so the watch can compare plan and holdout
members cohort by cohort; `holdout=True` tells them apart. `defaults_used` lists, in the plan's
feature order, the features at which the walk took a node's default direction (missing key, None,
NaN, or a categorical level the node did not see); features not on the member's path are not
listed even when absent. A value of the wrong type for any of the plan's features (checked for all
of them, on the path or not, so the answer to "is this request valid" does not depend on the
route) raises InvalidInput naming the feature and the member. bool is not numeric.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.lookup import Answer
from apportion.lookup import Plan as PortablePlan
from apportion.serving import batch
from apportion.serving.checks import check_allocation, check_header, check_tree, fix
from apportion.serving.compile import FlatTree, compile_tree, frozen
from apportion.serving.hashing import hash_state, new_salt, normalise_member_id, unit_uniform
from apportion.serving.portable import compiled_document
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

__all__ = [
    "Assignment",
    "CompiledPlan",
    "PlanParts",
    "compile_plan",
    "new_salt",
    "unit_uniform",
]

# The answer type is the portable evaluator's (apportion/lookup.py): the server's single lookup runs
# that module's walk and draws, so the two evaluators share one implementation.
Assignment = Answer


@dataclass(frozen=True, slots=True, kw_only=True)
class PlanParts:
    """What a plan version compiles from (`compile_plan`): its identity (plan, version and the
    pointer's revision), the model's partition, the (C, J) allocation over `arm_keys`, the
    holdout (share and arm) and the hashing salt. Checked when compiled, not here."""

    plan: str
    version: int
    partition: Partition
    allocation: np.ndarray
    arm_keys: tuple[str, ...]
    holdout_share: float
    holdout_arm: str
    salt: str
    revision: int = 0


class CompiledPlan:
    """One plan version ready to answer lookups. Immutable: attributes cannot be set after init.

    Attributes: plan, version, revision, arm_keys (J,), salt, holdout_share, holdout_arm,
    feature_specs (key -> FeatureSpec), n_cohorts, depth, shares (C, J), cumulative (C, J) with
    the last positive-share column onwards set to exactly 1, and `tree`, the flat node arrays of
    the batch walk (a `FlatTree`, serving/compile.py). feature_keys, checks ((key, is_numeric)
    per feature), holdout_index, holdout_state, arm_state and answers (the batch path's answers
    kept between batches) are what serving/batch.py reads.
    """

    __slots__ = (
        "plan",
        "version",
        "revision",
        "arm_keys",
        "salt",
        "holdout_share",
        "holdout_arm",
        "feature_specs",
        "n_cohorts",
        "depth",
        "shares",
        "cumulative",
        "tree",
        "feature_keys",
        "checks",
        "answers",
        "holdout_index",
        "holdout_state",
        "arm_state",
        "_kernel",
        "_cum_lists",
        "_portable",
    )

    plan: str
    version: int
    revision: int
    arm_keys: tuple[str, ...]
    salt: str
    holdout_share: float
    holdout_arm: str
    n_cohorts: int
    depth: int
    shares: np.ndarray
    cumulative: np.ndarray
    tree: FlatTree
    feature_keys: tuple[str, ...]
    checks: tuple[tuple[str, bool], ...]
    feature_specs: Mapping[str, FeatureSpec]
    answers: dict[int, Assignment]
    holdout_index: int
    holdout_state: Any  # a hashlib.blake2b state, copied per draw
    arm_state: Any
    _kernel: PortablePlan
    _cum_lists: tuple[tuple[float, ...], ...]
    _portable: list[tuple[bytes, str]]

    def __init__(self, parts: PlanParts) -> None:
        s = object.__setattr__
        plan, version, revision, partition = (
            parts.plan,
            parts.version,
            parts.revision,
            parts.partition,
        )
        holdout_share, holdout_arm, salt = parts.holdout_share, parts.holdout_arm, parts.salt
        allocation, arm_keys = parts.allocation, tuple(parts.arm_keys)
        check_header(plan, version, revision, arm_keys, holdout_share, holdout_arm, salt)
        shares, cum = check_allocation(allocation, partition.n_cohorts, arm_keys)
        depth = check_tree(partition)
        s(self, "plan", plan)
        s(self, "version", int(version))
        s(self, "revision", int(revision))
        s(self, "arm_keys", arm_keys)
        s(self, "salt", salt)
        s(self, "holdout_share", float(holdout_share))
        s(self, "holdout_arm", holdout_arm)
        s(self, "feature_specs", MappingProxyType({f.key: f for f in partition.features}))
        s(self, "n_cohorts", int(partition.n_cohorts))
        s(self, "depth", depth)
        s(self, "shares", frozen(shares))
        s(self, "cumulative", frozen(cum))
        s(self, "_cum_lists", tuple(tuple(row) for row in cum.tolist()))
        s(self, "holdout_index", arm_keys.index(holdout_arm))
        s(self, "holdout_state", hash_state(salt, "holdout"))
        s(self, "arm_state", hash_state(salt, "arm"))
        feats = partition.features
        s(self, "feature_keys", tuple(f.key for f in feats))
        s(self, "checks", tuple((f.key, f.kind == "numeric") for f in feats))
        s(self, "tree", compile_tree(partition, depth))
        s(self, "answers", {})  # the batch path's answers, see batch._distinct
        s(self, "_portable", [])  # the portable document, made on first request (portable.py)
        # the single lookup: the portable evaluator reading this version's own document
        s(self, "_kernel", PortablePlan.from_document(compiled_document(self)))

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError(f"CompiledPlan is immutable; cannot set {name!r}")

    def __repr__(self) -> str:
        return (
            f"CompiledPlan(plan={self.plan!r}, version={self.version}, revision={self.revision}, "
            f"cohorts={self.n_cohorts}, arms={self.arm_keys}, holdout={self.holdout_share})"
        )

    # ---- single lookup ---------------------------------------------------------------------------
    def assign(self, member_id: str, features: Mapping[str, Any]) -> Assignment:
        """The assignment of one member. Raises InvalidInput for a bad id or a wrongly typed value."""
        # the common case (a str id, a dict) without the general checks' isinstance calls
        member = member_id.strip() if type(member_id) is str else ""
        if not member:
            member = normalise_member_id(member_id)
        if type(features) is not dict and not isinstance(features, Mapping):
            raise InvalidInput(
                f"features of member '{member}' must be an object, got {type(features).__name__}",
                errors=[{"field": "features", "member_id": member}],
            )
        return self._kernel.answer(member, features, fix)

    # ---- batch lookups (serving/batch.py) --------------------------------------------------------
    def assign_batch(
        self, member_ids: Sequence[Any], features: Sequence[Mapping[str, Any]]
    ) -> list[Assignment]:
        """One assignment per member, equal to `assign` member by member (row-wise input)."""
        return batch.expand(*batch.batch_compact(self, member_ids, features))

    def assign_batch_compact(
        self, member_ids: Sequence[Any], features: Sequence[Mapping[str, Any]]
    ) -> tuple[list[Assignment], np.ndarray]:
        """`assign_batch` as (distinct answers (k,), index (n,) intp): member i's assignment is
        `distinct[index[i]]`. Lets a caller encode or count each distinct answer once."""
        return batch.batch_compact(self, member_ids, features)

    def assign_columns(
        self, member_ids: Sequence[Any], columns: Mapping[str, Sequence[Any]]
    ) -> list[Assignment]:
        """The batch path on columnar input: `columns[key][i]` is member i's value (None or NaN
        for missing; an absent column is missing for everyone). Columns not in the plan are
        ignored."""
        return batch.expand(*batch.columns_compact(self, member_ids, columns))

    def assign_columns_compact(
        self, member_ids: Sequence[Any], columns: Mapping[str, Sequence[Any]]
    ) -> tuple[list[Assignment], np.ndarray]:
        """`assign_columns` as (distinct answers (k,), index (n,) intp), see
        `assign_batch_compact`."""
        return batch.columns_compact(self, member_ids, columns)


def compile_plan(parts: PlanParts) -> CompiledPlan:
    """Compile a plan version. `parts.allocation`: (n_cohorts, n_arms), rows sum to 1 (to 1e-6).

    Raises InvalidInput for a malformed partition (bad child, cycle, cohort out of range), an
    allocation of the wrong shape or with negative / non-summing rows, an unknown holdout arm, a
    holdout share outside [0, 1), or a bad salt.
    """
    return CompiledPlan(parts)
