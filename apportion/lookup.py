"""Assign members from a portable compiled plan, exactly as the server does, with nothing but the
Python standard library (hashlib, json).

The document comes from `GET /v1/plans/{plan}/compiled`; its format is specified in
docs/compiled-plan.md. This module imports nothing from the rest of the service, so a calling
system can copy this one file (`apportion/lookup.py`).

    plan = Plan.from_json(document_bytes)
    answer = plan.assign("member-17", {"tenure_days": 12, "level": "beginner"})
    answer.arm, answer.cohort, answer.holdout, answer.defaults_used

A draw is u = (first 8 bytes, big-endian, of BLAKE2b(member id in UTF-8) with digest size 8, the
document's 16-byte `salt` parameter and the purpose as `person`) >> 11, times 2**-53 (RFC 7693
BLAKE2b parameter block). Member ids are stripped of the whitespace `str.strip` removes; a
member is in the holdout when u("holdout") < share; otherwise the arm is the first j with
cumulative[cohort][j] > u("arm"). Both comparisons are made on the digest bytes themselves: u < t holds
exactly when the 8 digest bytes, read big-endian, are below ceil(t * 2**53) * 2**11, so each
threshold is turned once into such a bound (`digest_bound`) and a draw costs one BLAKE2b and one
bytes comparison (or a bisection over a row's bounds), with no integer or float made per call.

The server's single lookup (`apportion.serving.index.CompiledPlan.assign`) runs this very module:
it builds a `Plan` from its own portable document, so the two cannot drift apart. Tests: tests/serving/test_portable.py checks this module against
the server's own `CompiledPlan` on 100,000 generated members for each golden plan.
"""

from __future__ import annotations

import hashlib
import json
import math
from bisect import bisect_right
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

__all__ = [
    "FORMAT",
    "FORMAT_VERSION",
    "Answer",
    "LookupError",
    "Node",
    "Plan",
    "digest_bound",
    "draw",
    "hash_state",
]

FORMAT = "apportion-compiled-plan"
FORMAT_VERSION = 1
_SCALE = 2.0**-53
_EXACT_INT = 2**53
_NoneType = type(None)
_MAX_CACHED = 4096  # answers with defaults kept per plan (cleared when full)


class LookupError(ValueError):  # noqa: A001  (a ValueError subclass, named for this module)
    """A document this module cannot read, or a member it cannot assign (wrong value type)."""


@dataclass(frozen=True)
class Answer:
    """The answer to one lookup. Immutable, so equal answers are shared between calls."""

    arm: str
    cohort: int
    plan_version: int
    holdout: bool
    defaults_used: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "arm": self.arm,
            "cohort": self.cohort,
            "plan_version": self.plan_version,
            "holdout": self.holdout,
            "defaults_used": list(self.defaults_used),
        }


# ---- the draws ---------------------------------------------------------------------------------
def hash_state(salt_param: bytes, purpose: str) -> Any:
    """An empty BLAKE2b state (digest 8 bytes, `salt` = the 16-byte salt parameter, `person` =
    the purpose); callers `.copy()` it and add the UTF-8 member id."""
    return hashlib.blake2b(digest_size=8, salt=salt_param, person=purpose.encode("utf-8"))


def draw(state: Any, member: bytes) -> float:
    """u in [0, 1): the top 53 bits of the digest times 2**-53."""
    h = state.copy()
    h.update(member)
    return (int.from_bytes(h.digest(), "big") >> 11) * _SCALE


def digest_bound(t: float) -> bytes:
    """A bytes value b with `digest < b` exactly when u < t, for every 8-byte digest.

    u = (x >> 11) * 2**-53 with x the digest read big-endian. t * 2**53 is exact (a power-of-two
    scaling), so for the integer m = x >> 11: m * 2**-53 < t  <=>  m < K = ceil(t * 2**53)  <=>
    x < K * 2**11. Equal-length bytes compare as big-endian integers; K * 2**11 = 2**64 (t = 1)
    becomes a 9-byte value above every 8-byte digest, and t <= 0 the empty bytes, below all."""
    if not t > 0.0:
        return b""
    bound = math.ceil(min(t, 1.0) * 2.0**53) << 11
    return bound.to_bytes(8, "big") if bound < 1 << 64 else b"\xff" * 8 + b"\x00"


# ---- the tree ----------------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Node:
    """One node of the compiled tree. The walk follows `left` / `right` references, not indices;
    a leaf has `key` None and its `cohort`; `levels` maps each level a categorical node saw to
    whether it goes left; `feature` is the index of `key` in the plan's features (for
    `defaults_used`)."""

    key: str | None
    numeric: bool
    threshold: float
    levels: dict[str, bool] | None
    left: Node | None
    right: Node | None
    default_left: bool
    feature: int
    cohort: int


def _leaf(cohort: int) -> Node:
    return Node(None, False, 0.0, None, None, None, True, -1, cohort)


def compile_tree(
    nodes: list[Mapping[str, Any]], features: tuple[tuple[str, bool], ...], n_cohorts: int
) -> Node:
    """The pre-order node list of a document as linked `Node`s, so the walk follows references,
    not indices. Raises LookupError for a malformed tree."""
    built: list[Node | None] = [None] * len(nodes)
    for i in range(len(nodes) - 1, -1, -1):  # pre-order: children come after their parent
        nd = nodes[i]
        if "cohort" in nd:
            c = int(nd["cohort"])
            if not 0 <= c < n_cohorts:
                raise LookupError(f"node {i} has cohort {c}; the plan has {n_cohorts}")
            built[i] = _leaf(c)
            continue
        fi = int(nd["feature"])
        if not 0 <= fi < len(features):
            raise LookupError(f"node {i} refers to feature {fi}; the plan has {len(features)}")
        key, numeric = features[fi]
        li, ri = int(nd["left"]), int(nd["right"])
        if not (i < li < len(nodes) and i < ri < len(nodes)):
            raise LookupError(f"node {i}: children must come after their parent")
        left, right = built[li], built[ri]
        if left is None or right is None:
            raise LookupError(f"node {i}: children must come after their parent")
        levels = None
        if not numeric:
            levels = dict.fromkeys(nd["right_levels"], False)
            levels.update(dict.fromkeys(nd["left_levels"], True))  # left wins
        built[i] = Node(
            key=key,
            numeric=numeric,
            threshold=float(nd["threshold"]) if numeric else 0.0,
            levels=levels,
            left=left,
            right=right,
            default_left=nd["default"] == "left",
            feature=fi,
            cohort=-1,
        )
    if not built or built[0] is None:
        raise LookupError("the document has no nodes")
    return built[0]


# A value that is not one of the common types (float, int within 2**53, str, None) goes to a
# `Fix`: fix(key, is_numeric, value, member) returns the value to compare (a float, a str or
# None) or raises. Each evaluator passes its own (this module's raises LookupError; the server's
# also accepts numpy scalars and raises its 422 error).
Fix = Callable[[str, bool, Any, str], Any]


def refuse(key: str, numeric: bool, v: Any, member: str) -> Any:
    """This module's Fix: an int beyond 2**53 is compared as its double, as the server does; a
    NaN categorical value is missing; a str subclass is its str; anything else is an error."""
    t = type(v)
    if numeric:
        if isinstance(v, bool) or not isinstance(v, int | float):
            raise LookupError(f"feature '{key}' must be a number, got {t.__name__}")
        try:
            return float(v)
        except OverflowError:
            raise LookupError(f"feature '{key}' is beyond the float64 range") from None
    if isinstance(v, str):
        return str(v)
    if isinstance(v, float) and math.isnan(v):
        return None
    raise LookupError(f"feature '{key}' must be a string level, got {t.__name__}")


class Plan:
    """One compiled plan version, ready to assign. Build with `from_json` or `from_document`."""

    def __init__(self, doc: Mapping[str, Any]) -> None:
        if doc.get("format") != FORMAT:
            raise LookupError(f"not a compiled plan document: format is {doc.get('format')!r}")
        if doc.get("format_version") != FORMAT_VERSION:
            raise LookupError(
                f"format_version {doc.get('format_version')!r} is not supported "
                f"(this module reads {FORMAT_VERSION})"
            )
        h = doc["hashing"]
        if h["function"] != "blake2b" or h["digest_bytes"] != 8:
            raise LookupError(f"unsupported hashing {h!r}")
        salt = bytes.fromhex(h["salt_hex"])
        self.plan: str = doc["plan"]
        self.version: int = int(doc["plan_version"])
        self.content_hash: str = doc["content_hash"]
        self.arms: tuple[str, ...] = tuple(doc["arms"])
        self.holdout_share = float(doc["holdout"]["share"])
        self.holdout_arm: str = doc["holdout"]["arm"]
        if self.holdout_arm not in self.arms:
            raise LookupError(f"holdout arm {self.holdout_arm!r} is not one of {self.arms}")
        person = h["person"]
        self._holdout_state = hash_state(salt, person["holdout"])
        self._arm_state = hash_state(salt, person["arm"])
        feats = doc["features"]
        self.features: tuple[tuple[str, bool], ...] = tuple(
            (f["key"], f["kind"] == "numeric") for f in feats
        )
        self._keys = tuple(f["key"] for f in feats)
        self._numeric_keys = tuple(k for k, numeric in self.features if numeric)
        self._categorical_keys = tuple(k for k, numeric in self.features if not numeric)
        self._cumulative = tuple(tuple(float(x) for x in row) for row in doc["cumulative"])
        n_cohorts = len(self._cumulative)
        self._root = compile_tree(doc["nodes"], self.features, n_cohorts)
        # per-call work is a walk, two BLAKE2b digests compared as bytes, and a table lookup:
        # the answers without defaults are made here, once
        self._holdout_bound = digest_bound(self.holdout_share)
        self._arm_bounds = tuple(tuple(map(digest_bound, row)) for row in self._cumulative)
        # a cohort whose bounds are all below (b"") or above (t >= 1) every digest gives the
        # same arm for every draw (the count of the former): no arm draw for its members
        top = digest_bound(1.0)
        self._one_arm = tuple(
            row.count(b"") if all(b == b"" or b == top for b in row) else -1
            for row in self._arm_bounds
        )
        self._plain = tuple(
            tuple(Answer(a, c, self.version, False, ()) for a in self.arms)
            for c in range(n_cohorts)
        )
        self._held = tuple(
            Answer(self.holdout_arm, c, self.version, True, ()) for c in range(n_cohorts)
        )
        self._with_defaults: dict[tuple[int, int, tuple[int, ...]], Answer] = {}

    @classmethod
    def from_json(cls, raw: bytes | str) -> Plan:
        return cls(json.loads(raw))

    @classmethod
    def from_document(cls, doc: Mapping[str, Any]) -> Plan:
        return cls(doc)

    def assign(self, member_id: str | int, features: Mapping[str, Any] | None = None) -> Answer:
        """The answer for one member. Raises LookupError for an empty or non-string id and for a
        feature value of the wrong type (a string for a numeric feature, a number for a
        categorical one, a bool for either), as the server answers 422."""
        if type(member_id) is str:
            member = member_id.strip()
        elif isinstance(member_id, str):
            member = str(member_id).strip()
        elif isinstance(member_id, int) and not isinstance(member_id, bool):
            member = str(member_id)
        else:
            raise LookupError(f"member_id must be a string, got {type(member_id).__name__}")
        if not member:
            raise LookupError("member_id must not be empty")
        return self.answer(member, features or {}, refuse)

    def answer(self, member: str, features: Mapping[str, Any], fix: Fix) -> Answer:
        """The answer for an already normalised id (stripped, non-empty). Every plan feature's
        value is checked (on the member's path or not), unusual ones through `fix`."""
        get: Callable[[str], Any] = features.get
        # the common values (float, int within 2**53, None; str, None) pass these two loops;
        # any other value sends the member through `_checked_get`, in the plan's feature order
        for key in self._numeric_keys:
            v = get(key)
            if type(v) is float or v is None:
                continue
            if type(v) is int and -_EXACT_INT <= v <= _EXACT_INT:
                continue
            get = self._checked_get(member, features, fix)
            break
        else:
            for key in self._categorical_keys:
                v = get(key)
                if type(v) is str or v is None:
                    continue
                get = self._checked_get(member, features, fix)
                break

        node = self._root
        defaults: list[int] | None = None
        split_on = node.key
        while split_on is not None:  # a leaf has no key
            v = get(split_on)
            if node.numeric:  # x < threshold goes left; missing or NaN take the default
                if v is not None and v == v:
                    node = node.left if v < node.threshold else node.right  # type: ignore[assignment]  # not a leaf
                    split_on = node.key
                    continue
            else:  # categorical: a level the node saw; anything else takes the default
                side = node.levels.get(v)  # type: ignore[union-attr]  # a split has levels
                if side is not None:
                    node = node.left if side else node.right  # type: ignore[assignment]  # not a leaf
                    split_on = node.key
                    continue
            if defaults is None:
                defaults = [node.feature]
            else:
                defaults.append(node.feature)
            node = node.left if node.default_left else node.right  # type: ignore[assignment]
            split_on = node.key
        cohort = node.cohort

        encoded = member.encode("utf-8")
        if self._holdout_bound:
            h = self._holdout_state.copy()
            h.update(encoded)
            held = h.digest() < self._holdout_bound
        else:
            held = False
        if held:
            arm = -1
        else:
            arm = self._one_arm[cohort]
            if arm < 0:
                h = self._arm_state.copy()
                h.update(encoded)
                arm = bisect_right(self._arm_bounds[cohort], h.digest())  # first j: cum[j] > u
        if defaults is None:
            return self._held[cohort] if held else self._plain[cohort][arm]
        return self._defaults_answer(cohort, arm, defaults)

    def _checked_get(
        self, member: str, features: Mapping[str, Any], fix: Fix
    ) -> Callable[[str], Any]:
        """The getter of the values to compare when some value is not of a common type: every
        feature checked in the plan's order (so the first wrong one is the one reported),
        unusual values through `fix`."""
        get = features.get
        fixed: dict[str, Any] | None = None
        for key, numeric in self.features:
            v = get(key)
            if v is None:
                continue
            t = type(v)
            if numeric:
                if t is float or (t is int and -_EXACT_INT <= v <= _EXACT_INT):
                    continue
            elif t is str:
                continue
            x = fix(key, numeric, v, member)
            fixed = {key: x} if fixed is None else {**fixed, key: x}
        if fixed is None:
            return get
        return {**features, **fixed}.get  # compare the fixed values (a double, a str, None)

    def _defaults_answer(self, cohort: int, arm: int, defaults: list[int]) -> Answer:
        """The answer of a member whose walk took defaults at the features `defaults` (indices,
        possibly repeated), shared between calls; arm -1 is the holdout."""
        used = tuple(sorted(set(defaults)))
        key = (cohort, arm, used)
        a = self._with_defaults.get(key)
        if a is None:
            names = tuple(self._keys[i] for i in used)
            if arm < 0:
                a = Answer(self.holdout_arm, cohort, self.version, True, names)
            else:
                a = Answer(self.arms[arm], cohort, self.version, False, names)
            if len(self._with_defaults) >= _MAX_CACHED:
                self._with_defaults.clear()
            self._with_defaults[key] = a
        return a
