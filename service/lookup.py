"""Assign members from a portable compiled plan, exactly as the server does, with nothing but the
Python standard library (hashlib, json).

The document comes from `GET /v1/plans/{plan}/compiled`; its format is specified in
docs/compiled-plan.md. This module imports nothing from the rest of the service, so a calling
system can copy this one file (it lives at `service/lookup.py` until the package is renamed).

    plan = Plan.from_json(document_bytes)
    answer = plan.assign("member-17", {"tenure_days": 12, "level": "beginner"})
    answer.arm, answer.cohort, answer.holdout, answer.defaults_used

A draw is u = (first 8 bytes, big-endian, of BLAKE2b(member id in UTF-8) with digest size 8, the
document's 16-byte `salt` parameter and the purpose as `person`) >> 11, times 2**-53 (RFC 7693
BLAKE2b parameter block). Member ids are stripped of the whitespace `str.strip` removes; a
member is in the holdout when u("holdout") < share; otherwise the arm is the first j with
cumulative[cohort][j] > u("arm"). Tests: tests/serving/test_portable.py checks this module against
the server's own `CompiledPlan` on 100,000 generated members for each golden plan.
"""

from __future__ import annotations

import hashlib
import json
import math
from bisect import bisect_right
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["FORMAT", "FORMAT_VERSION", "Answer", "LookupError", "Plan"]

FORMAT = "apportion-compiled-plan"
FORMAT_VERSION = 1
_SCALE = 2.0**-53
_EXACT_INT = 2**53


class LookupError(ValueError):  # noqa: A001  (a ValueError subclass, named for this module)
    """A document this module cannot read, or a member it cannot assign (wrong value type)."""


@dataclass(frozen=True)
class Answer:
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


def _leaf(cohort: int) -> tuple[Any, ...]:
    return (None, False, 0.0, None, None, None, True, -1, cohort)


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
        self._holdout_index = self.arms.index(self.holdout_arm)
        person = h["person"]
        self._holdout_state = hashlib.blake2b(
            digest_size=8, salt=salt, person=person["holdout"].encode()
        )
        self._arm_state = hashlib.blake2b(digest_size=8, salt=salt, person=person["arm"].encode())
        feats = doc["features"]
        self.features: tuple[tuple[str, bool], ...] = tuple(
            (f["key"], f["kind"] == "numeric") for f in feats
        )
        self._keys = tuple(f["key"] for f in feats)
        self._cumulative = tuple(tuple(float(x) for x in row) for row in doc["cumulative"])
        self._root = self._build(doc["nodes"])

    @classmethod
    def from_json(cls, raw: bytes | str) -> Plan:
        return cls(json.loads(raw))

    @classmethod
    def from_document(cls, doc: Mapping[str, Any]) -> Plan:
        return cls(doc)

    def _build(self, nodes: list[Mapping[str, Any]]) -> tuple[Any, ...]:
        """Nested tuples (key, is_numeric, threshold, level->goes_left, left, right,
        default_left, feature_index, cohort), children before parents."""
        built: list[tuple[Any, ...] | None] = [None] * len(nodes)
        for i in range(len(nodes) - 1, -1, -1):  # pre-order: children come after their parent
            nd = nodes[i]
            if "cohort" in nd:
                c = int(nd["cohort"])
                if not 0 <= c < len(self._cumulative):
                    raise LookupError(
                        f"node {i} has cohort {c}; the plan has {len(self._cumulative)}"
                    )
                built[i] = _leaf(c)
                continue
            fi = int(nd["feature"])
            key, numeric = self.features[fi]
            left, right = built[nd["left"]], built[nd["right"]]
            if left is None or right is None or nd["left"] <= i or nd["right"] <= i:
                raise LookupError(f"node {i}: children must come after their parent")
            levels = None
            if not numeric:
                levels = dict.fromkeys(nd["right_levels"], False)
                levels.update(dict.fromkeys(nd["left_levels"], True))  # left wins
            built[i] = (
                key,
                numeric,
                float(nd["threshold"]) if numeric else 0.0,
                levels,
                left,
                right,
                nd["default"] == "left",
                fi,
                -1,
            )
        root = built[0]
        assert root is not None
        return root

    def assign(self, member_id: str | int, features: Mapping[str, Any] | None = None) -> Answer:
        """The answer for one member. Raises LookupError for an empty or non-string id and for a
        feature value of the wrong type (a string for a numeric feature, a number for a
        categorical one, a bool for either), as the server answers 422."""
        if isinstance(member_id, str):
            member = member_id.strip()
        elif isinstance(member_id, int) and not isinstance(member_id, bool):
            member = str(member_id)
        else:
            raise LookupError(f"member_id must be a string, got {type(member_id).__name__}")
        if not member:
            raise LookupError("member_id must not be empty")
        features = features or {}
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
                if isinstance(v, bool) or not isinstance(v, int | float):
                    raise LookupError(f"feature '{key}' must be a number, got {t.__name__}")
                try:  # an int beyond 2**53 is compared as its double, as the server does
                    x: Any = float(v)
                except OverflowError:
                    raise LookupError(f"feature '{key}' is beyond the float64 range") from None
            elif t is str:
                continue
            elif isinstance(v, str):
                x = str(v)
            elif isinstance(v, float) and math.isnan(v):
                x = None
            else:
                raise LookupError(f"feature '{key}' must be a string level, got {t.__name__}")
            fixed = {key: x} if fixed is None else {**fixed, key: x}
        if fixed is not None:
            get = {**features, **fixed}.get

        node = self._root
        defaults: list[int] | None = None
        while True:
            key = node[0]
            if key is None:
                break
            v = get(key)
            if node[1]:  # numeric: x < threshold goes left; missing or NaN take the default
                side = None if v is None or v != v else v < node[2]
            else:  # categorical: a level the node saw; anything else takes the default
                side = node[3].get(v)
            if side is None:
                side = node[6]
                if defaults is None:
                    defaults = [node[7]]
                else:
                    defaults.append(node[7])
            node = node[4] if side else node[5]
        cohort = node[8]
        used = () if defaults is None else tuple(self._keys[i] for i in sorted(set(defaults)))
        encoded = member.encode("utf-8")
        if self.holdout_share > 0.0:
            h = self._holdout_state.copy()
            h.update(encoded)
            if (int.from_bytes(h.digest(), "big") >> 11) * _SCALE < self.holdout_share:
                return Answer(self.holdout_arm, cohort, self.version, True, used)
        h = self._arm_state.copy()
        h.update(encoded)
        u = (int.from_bytes(h.digest(), "big") >> 11) * _SCALE
        arm = bisect_right(self._cumulative[cohort], u)  # the first j with cumulative > u
        return Answer(self.arms[arm], cohort, self.version, False, used)
