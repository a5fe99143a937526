"""The checks of the serving index: a plan version's header, allocation and tree at compile time,
and each lookup value's type (shared by the single and the batch path, so both reject the same
requests with the same 422 problem)."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.serving.hashing import check_salt, normalise_member_id
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

SHARE_TOL = 1e-6  # an allocation row may miss 1 by this much (solver rounding); it is renormalised


# ---- value checks at lookup time ----------------------------------------------------------------
def type_error(key: str, member: str, expected: str, value: Any, index: int | None) -> InvalidInput:
    where = f"member '{member}'" if index is None else f"member '{member}' (item {index})"
    err: dict[str, Any] = {
        "field": f"features.{key}",
        "member_id": member,
        "expected": expected,
        "got": type(value).__name__,
    }
    if index is not None:
        err["index"] = index
    try:
        shown = f"{value!r:.60}"
    except ValueError:  # an int too long for str() (Python's digit limit)
        shown = "(too many digits to show)"
    return InvalidInput(
        f"feature '{key}' of {where} must be {expected}, got {type(value).__name__} {shown}",
        errors=[err],
    )


def numeric_value(key: str, v: Any, member: str, index: int | None = None) -> float:
    """The value as float (NaN when missing); raises for bools, strings and anything else."""
    if v is None:
        return np.nan
    if isinstance(v, bool | np.bool_) or not isinstance(v, int | float | np.integer | np.floating):
        raise type_error(key, member, "a number", v, index)
    try:
        return float(v)
    except OverflowError:  # an integer beyond the float64 range
        raise type_error(key, member, "a number within the float64 range", v, index) from None


def fix(key: str, numeric: bool, v: Any, member: str) -> Any:
    """The server's `Fix` for the portable evaluator's walk (apportion/lookup.py): a numpy scalar
    or an int that float64 would round is compared as the double the batch path compares; a NaN
    level is missing; anything else of the wrong type raises InvalidInput naming the feature."""
    if numeric:
        return numeric_value(key, v, member)
    return categorical_value(key, v, member)


def categorical_value(key: str, v: Any, member: str, index: int | None = None) -> str | None:
    """The level (None when missing: None or a float NaN); raises for numbers, bools, lists..."""
    if v is None:
        return None
    if isinstance(v, str):
        return str(v)
    if isinstance(v, float | np.floating) and v != v:
        return None
    raise type_error(key, member, "a string level", v, index)


def normalise_ids(member_ids: Sequence[Any]) -> list[str]:
    """Every id normalised as `normalise_member_id` does; InvalidInput names the first bad item."""
    ids = member_ids if type(member_ids) is list else list(member_ids)
    try:  # all strings (or str subclasses, which strip to str): one C-level pass, no type scan
        out = list(map(str.strip, ids))
    except TypeError:  # an integer id (or a wrong type): the general path below
        pass
    else:
        if all(out):
            return out
    out = []
    for i, m in enumerate(ids):
        try:
            out.append(normalise_member_id(m))
        except InvalidInput as e:
            raise InvalidInput(
                f"item {i}: {e.detail}", errors=[{**e.errors[0], "index": i}]
            ) from None
    return out


# ---- checks at compile time -------------------------------------------------------------------
def check_header(
    plan: str,
    version: int,
    revision: int,
    arm_keys: tuple[str, ...],
    holdout_share: float,
    holdout_arm: str,
    salt: str,
) -> None:
    if not isinstance(plan, str) or not plan:
        raise InvalidInput(f"plan must be a non-empty string, got {plan!r}")
    if not arm_keys or len(set(arm_keys)) != len(arm_keys):
        raise InvalidInput(f"arm_keys must be distinct and non-empty, got {arm_keys!r}")
    if holdout_arm not in arm_keys:
        raise InvalidInput(f"holdout arm '{holdout_arm}' is not one of the arms {list(arm_keys)}")
    h = float(holdout_share)
    if not 0.0 <= h < 1.0:
        raise InvalidInput(f"holdout_share must be in [0, 1), got {holdout_share!r}")
    check_salt(salt)


def check_allocation(
    allocation: np.ndarray, n_cohorts: int, arm_keys: tuple[str, ...]
) -> tuple[np.ndarray, np.ndarray]:
    """Shares (C, J) renormalised, and cumulative shares with the tail set to exactly 1 from the
    last positive share on, so float rounding can never pick a zero-share arm (a share of 0 must never be drawn)."""
    x = np.asarray(allocation, dtype=np.float64)
    if x.shape != (n_cohorts, len(arm_keys)):
        raise InvalidInput(
            f"allocation has shape {x.shape}; expected ({n_cohorts} cohorts, {len(arm_keys)} arms)"
        )
    if not np.isfinite(x).all() or (x < 0).any():
        bad = np.argwhere(~np.isfinite(x) | (x < 0))[0]
        raise InvalidInput(f"allocation[{bad[0]}, {bad[1]}] = {x[tuple(bad)]} is not a share")
    sums = x.sum(axis=1)
    off = np.flatnonzero(np.abs(sums - 1.0) > SHARE_TOL)
    if off.size:
        raise InvalidInput(f"allocation row {off[0]} sums to {sums[off[0]]:.9g}, not 1")
    x = x / sums[:, None]
    cum = np.cumsum(x, axis=1)
    for c in range(n_cohorts):
        last = int(np.flatnonzero(x[c] > 0)[-1])
        cum[c, last:] = 1.0
    return x, cum


def check_tree(p: Partition) -> int:
    """The depth of the tree reachable from the root; InvalidInput on a malformed tree."""
    n = p.n_nodes
    if n == 0:
        raise InvalidInput("partition has no nodes")
    seen = np.zeros(n, dtype=bool)
    depth = 0
    stack = [(0, 0)]
    while stack:
        nd, d = stack.pop()
        if not 0 <= nd < n or seen[nd]:
            raise InvalidInput(f"partition node {nd} is out of range or reached twice")
        seen[nd] = True
        fi = int(p.feature[nd])
        if fi < 0:
            c = int(p.cohort[nd])
            if not 0 <= c < p.n_cohorts:
                raise InvalidInput(f"leaf {nd} has cohort {c}; expected 0..{p.n_cohorts - 1}")
            depth = max(depth, d)
            continue
        if fi >= len(p.features):
            raise InvalidInput(f"node {nd} refers to feature {fi}; only {len(p.features)} exist")
        f: FeatureSpec = p.features[fi]
        if f.kind == "numeric" and not np.isfinite(p.threshold[nd]):
            raise InvalidInput(f"numeric node {nd} on '{f.key}' has threshold {p.threshold[nd]}")
        if f.kind not in ("numeric", "categorical"):
            raise InvalidInput(f"feature '{f.key}' has unknown kind {f.kind!r}")
        stack.extend(((int(p.left[nd]), d + 1), (int(p.right[nd]), d + 1)))
    return depth
