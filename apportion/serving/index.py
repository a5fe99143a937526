"""The compiled, immutable lookup index of one plan version: member + features -> assignment.

A `Partition` and its (C, J) allocation compile to two copies of the same tree: nested Python
tuples for the single lookup (straight-line Python, no numpy scalars per node, ~µs per call) and
flat numpy arrays for batches (the walk is vectorised over members; hashing loops per member).
Design §8, Methods §10:

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
from dataclasses import fields
from itertools import compress, repeat
from operator import itemgetter
from types import MappingProxyType
from typing import Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.lookup import Answer
from apportion.lookup import Plan as PortablePlan
from apportion.serving.hashing import (
    check_salt,
    hash_state,
    new_salt,
    normalise_member_id,
    uniforms_from_state,
    unit_uniform,
)
from apportion.serving.portable import compiled_document
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

__all__ = [
    "Assignment",
    "CompiledPlan",
    "compile_plan",
    "new_salt",
    "unit_uniform",
]

_NoneType = type(None)
_EXACT_INT = 2**53  # ints up to this size compare with a float64 threshold as their double does
# The batch walk's (node, code) -> next node table is kept while it has at most this many cells
# (8 bytes each, 16 MiB); beyond, the walk compares numeric codes instead (see _compile_flat).
TABLE_CELLS = 1 << 21
_MAX_CACHED_ANSWERS = 65_536  # distinct batch answers kept per plan version (cleared when full)
_SHARE_TOL = 1e-6  # an allocation row may miss 1 by this much (solver rounding); it is renormalised


# The answer type is the portable evaluator's (apportion/lookup.py): the server's single lookup runs
# that module's walk and draws, so the two evaluators share one implementation.
Assignment = Answer

_FIELDS = tuple(f.name for f in fields(Assignment))


def _new_assignment(
    arm: str, cohort: int, plan_version: int, holdout: bool, defaults_used: tuple[str, ...]
) -> Assignment:
    """`Assignment(...)`, three times cheaper: the frozen dataclass's __init__ sets each field
    through object.__setattr__; this fills the instance dict directly (the batch path builds one
    object per distinct answer, often a thousand)."""
    a = object.__new__(Assignment)
    d = a.__dict__
    d["arm"] = arm
    d["cohort"] = cohort
    d["plan_version"] = plan_version
    d["holdout"] = holdout
    d["defaults_used"] = defaults_used
    return a


if _FIELDS != ("arm", "cohort", "plan_version", "holdout", "defaults_used"):  # kept in step
    raise RuntimeError(f"_new_assignment does not fill the fields {_FIELDS} of Assignment")


# ---- value checks shared by the single and the batch path ---------------------------------------
def _type_error(
    key: str, member: str, expected: str, value: Any, index: int | None
) -> InvalidInput:
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


def _numeric_value(key: str, v: Any, member: str, index: int | None = None) -> float:
    """The value as float (NaN when missing); raises for bools, strings and anything else."""
    if v is None:
        return np.nan
    if isinstance(v, bool | np.bool_) or not isinstance(v, int | float | np.integer | np.floating):
        raise _type_error(key, member, "a number", v, index)
    try:
        return float(v)
    except OverflowError:  # an integer beyond the float64 range
        raise _type_error(key, member, "a number within the float64 range", v, index) from None


def _fix(key: str, numeric: bool, v: Any, member: str) -> Any:
    """The server's `Fix` for the portable evaluator's walk (apportion/lookup.py): a numpy scalar
    or an int that float64 would round is compared as the double the batch path compares; a NaN
    level is missing; anything else of the wrong type raises InvalidInput naming the feature."""
    if numeric:
        return _numeric_value(key, v, member)
    return _categorical_value(key, v, member)


def _categorical_value(key: str, v: Any, member: str, index: int | None = None) -> str | None:
    """The level (None when missing: None or a float NaN); raises for numbers, bools, lists..."""
    if v is None:
        return None
    if isinstance(v, str):
        return str(v)
    if isinstance(v, float | np.floating) and v != v:
        return None
    raise _type_error(key, member, "a string level", v, index)


class CompiledPlan:
    """One plan version ready to answer lookups. Immutable: attributes cannot be set after init.

    Attributes: plan, version, revision, arm_keys (J,), salt, holdout_share, holdout_arm,
    feature_specs (key -> FeatureSpec), n_cohorts, depth, shares (C, J), cumulative (C, J) with
    the last positive-share column onwards set to exactly 1, and the flat node arrays used by the
    batch walk (node_feature, node_threshold, node_directions, node_left, node_right,
    node_default_left, node_cohort).
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
        "node_feature",
        "node_is_numeric",
        "node_threshold",
        "node_directions",
        "node_left",
        "node_right",
        "node_default_left",
        "node_cohort",
        "_feature_keys",
        "_checks",
        "_kernel",
        "_answers",
        "_cum_lists",
        "_holdout_index",
        "_holdout_state",
        "_arm_state",
        "_level_codes",
        "_missing_code",
        "_width",
        "_is_leaf",
        "_cuts",
        "_next",
        "_defaulted",
        "_children",
        "node_rank",
        "_portable",
    )

    def __init__(
        self,
        *,
        plan: str,
        version: int,
        partition: Partition,
        allocation: np.ndarray,
        arm_keys: tuple[str, ...],
        holdout_share: float,
        holdout_arm: str,
        salt: str,
        revision: int = 0,
    ) -> None:
        s = object.__setattr__
        arm_keys = tuple(arm_keys)
        _check_header(plan, version, revision, arm_keys, holdout_share, holdout_arm, salt)
        shares, cum = _check_allocation(allocation, partition.n_cohorts, arm_keys)
        depth = _check_tree(partition)
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
        s(self, "shares", _frozen(shares))
        s(self, "cumulative", _frozen(cum))
        s(self, "_cum_lists", tuple(tuple(row) for row in cum.tolist()))
        s(self, "_holdout_index", arm_keys.index(holdout_arm))
        s(self, "_holdout_state", hash_state(salt, "holdout"))
        s(self, "_arm_state", hash_state(salt, "arm"))
        feats = partition.features
        s(self, "_feature_keys", tuple(f.key for f in feats))
        s(self, "_checks", tuple((f.key, f.kind == "numeric") for f in feats))
        self._compile_flat(partition)
        s(self, "_answers", {})  # the batch path's answers, see _distinct
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

    # ---- compilation ---------------------------------------------------------------------------
    def _compile_flat(self, p: Partition) -> None:
        """Flat arrays for the vectorised walk. Every value becomes a small integer code first:
        a categorical level its index in the feature's level table, a number the count of the
        feature's distinct split thresholds at or below it (so x < threshold k, the k-th
        smallest, is code <= k, `node_rank`), and `_missing_code` (one past the largest code of
        any feature) stands for missing, NaN or an unknown level. When the table is small
        (nodes x codes at most `TABLE_CELLS`), every node, numeric or categorical, is one row of
        a (node, code) -> next node table, and a step of the walk is a few gathers for all
        members at once; a larger tree (many thresholds on one feature) walks with a comparison
        per numeric node instead, in memory linear in the nodes. Leaves send every code to
        themselves, so the walk runs a fixed `depth` steps."""
        s = object.__setattr__
        n = p.n_nodes
        codes: list[dict[str, int]] = []
        for fi, f in enumerate(p.features):
            lut: dict[str, int] = {}
            if f.kind == "categorical":
                for lv in f.levels:
                    lut.setdefault(lv, len(lut))
                for nd in range(n):
                    if int(p.feature[nd]) == fi:
                        for lv in (*p.left_levels[nd], *p.right_levels[nd]):
                            lut.setdefault(lv, len(lut))
            codes.append(lut)
        is_leaf = np.asarray(p.feature) < 0
        cuts = [
            np.unique(np.asarray(p.threshold, dtype=np.float64)[np.asarray(p.feature) == fi])
            if f.kind == "numeric"
            else np.zeros(0)
            for fi, f in enumerate(p.features)
        ]
        levels_width = max((len(c) for c in codes), default=0)  # codes of categorical levels
        missing = max([levels_width] + [len(c) + 1 for c in cuts])
        feat = np.where(is_leaf, 0, p.feature).astype(np.intp)
        is_num = np.zeros(n, dtype=bool)
        thr = np.full(n, np.nan)
        rank = np.zeros(n, dtype=np.intp)
        # categorical directions by level code (1 left, 0 right, -1 default); the last column
        # stands for every code past the levels (missing); leaves send every code left (self)
        dirs = np.full((n, levels_width + 1), -1, dtype=np.int8)
        for nd in range(n):
            if is_leaf[nd]:
                dirs[nd] = 1
                continue
            f = p.features[int(feat[nd])]
            if f.kind == "numeric":
                is_num[nd] = True
                thr[nd] = float(p.threshold[nd])
                rank[nd] = int(np.searchsorted(cuts[int(feat[nd])], thr[nd]))  # cuts[k] == thr
            else:
                lut = codes[int(feat[nd])]
                for lv in p.right_levels[nd]:
                    dirs[nd, lut[lv]] = 0
                for lv in p.left_levels[nd]:
                    dirs[nd, lut[lv]] = 1
        self_idx = np.arange(n, dtype=np.intp)
        left = np.where(is_leaf, self_idx, p.left).astype(np.intp)
        right = np.where(is_leaf, self_idx, p.right).astype(np.intp)
        default_left = np.asarray(p.default_left, dtype=bool).copy()
        width = missing + 1
        if n * width <= TABLE_CELLS:
            code = np.arange(width)[None, :]
            side = np.where(  # (n, width): 1 left, 0 right, -1 default
                is_num[:, None],
                np.where(code == missing, -1, (code <= rank[:, None]).astype(np.int8)),
                dirs[:, np.minimum(code[0], levels_width)],
            )
            default = np.where(default_left, left, right)
            nxt = np.where(
                side == 1, left[:, None], np.where(side == 0, right[:, None], default[:, None])
            )
            s(self, "_next", _frozen(nxt.astype(np.intp).reshape(-1)))
            s(self, "_defaulted", _frozen((side == -1).reshape(-1)))
        else:
            s(self, "_next", None)
            s(self, "_defaulted", None)
        s(self, "_cuts", tuple(_frozen(c) for c in cuts))
        s(self, "_level_codes", tuple(codes))
        s(self, "_missing_code", missing)
        s(self, "_width", width)
        s(self, "_is_leaf", _frozen(is_leaf))
        s(self, "node_feature", _frozen(feat))
        s(self, "node_is_numeric", _frozen(is_num))
        s(self, "node_threshold", _frozen(thr))
        s(self, "node_rank", _frozen(rank))
        s(self, "node_directions", _frozen(dirs))
        s(self, "node_left", _frozen(left))
        s(self, "node_right", _frozen(right))
        s(self, "node_default_left", _frozen(default_left))
        s(self, "node_cohort", _frozen(np.asarray(p.cohort, dtype=np.intp).copy()))
        # children[2 * node + go_left]: right child at even, left child at odd positions
        s(self, "_children", _frozen(np.stack([right, left], axis=1).reshape(-1)))

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
        return self._kernel.answer(member, features, _fix)

    # ---- batch lookups ---------------------------------------------------------------------------
    def assign_batch(
        self, member_ids: Sequence[Any], features: Sequence[Mapping[str, Any]]
    ) -> list[Assignment]:
        """One assignment per member, equal to `assign` member by member (row-wise input)."""
        return _expand(*self.assign_batch_compact(member_ids, features))

    def assign_batch_compact(
        self, member_ids: Sequence[Any], features: Sequence[Mapping[str, Any]]
    ) -> tuple[list[Assignment], np.ndarray]:
        """`assign_batch` as (distinct answers (k,), index (n,) intp): member i's assignment is
        `distinct[index[i]]`. Lets a caller encode or count each distinct answer once."""
        n = len(member_ids)
        if len(features) != n:
            raise InvalidInput(
                f"got {n} member ids but {len(features)} feature objects",
                errors=[{"field": "features", "expected": n, "got": len(features)}],
            )
        rows = features if type(features) is list else list(features)
        keys = self._feature_keys
        if len(keys) > 1 and set(map(type, rows)) <= {dict}:
            # one pass over the dicts (row by row: each dict is touched once, while it is in
            # cache), all keys of a row in one C call; a row lacking a key takes dict.get. The
            # values go into one flat row-major list, so no object per row outlives the loop
            # (10,000 live tuples would set off the garbage collector a dozen times).
            pick, nk = itemgetter(*keys), len(keys)
            flat: list[Any] = []
            extend = flat.extend
            for r in rows:
                if len(r) < nk:  # certainly lacks a key: skip the KeyError
                    extend(map(r.get, keys))
                    continue
                try:
                    extend(pick(r))
                except KeyError:
                    extend(map(r.get, keys))
            columns: Mapping[str, Sequence[Any]] = {k: flat[j::nk] for j, k in enumerate(keys)}
        elif set(map(type, rows)) <= {dict}:
            columns = {k: list(map(dict.get, rows, repeat(k, n))) for k in keys}
        else:
            for i, m in enumerate(rows):
                if not isinstance(m, Mapping):
                    raise InvalidInput(
                        f"features of item {i} (member {member_ids[i]!r}) must be an object, "
                        f"got {type(m).__name__}",
                        errors=[{"field": "features", "index": i}],
                    )
            columns = {k: [m.get(k) for m in rows] for k in keys}
        return self.assign_columns_compact(member_ids, columns)

    def assign_columns(
        self, member_ids: Sequence[Any], columns: Mapping[str, Sequence[Any]]
    ) -> list[Assignment]:
        """The batch path on columnar input: `columns[key][i]` is member i's value (None or NaN
        for missing; an absent column is missing for everyone). Columns not in the plan are
        ignored."""
        return _expand(*self.assign_columns_compact(member_ids, columns))

    def assign_columns_compact(
        self, member_ids: Sequence[Any], columns: Mapping[str, Sequence[Any]]
    ) -> tuple[list[Assignment], np.ndarray]:
        """`assign_columns` as (distinct answers (k,), index (n,) intp), see
        `assign_batch_compact`."""
        n = len(member_ids)
        members = _normalise_ids(member_ids)
        for key, col in columns.items():
            if key in self.feature_specs and len(col) != n:
                raise InvalidInput(
                    f"column '{key}' has {len(col)} values for {n} members",
                    errors=[{"field": f"features.{key}", "expected": n, "got": len(col)}],
                )
        if n == 0:
            return [], np.zeros(0, dtype=np.intp)
        cohort, used = self._walk(self._encode_columns(members, columns, n), n)

        encoded = list(map(str.encode, members))  # UTF-8
        arm = np.full(n, self._holdout_index, dtype=np.intp)
        if self.holdout_share > 0.0:
            holdout = uniforms_from_state(self._holdout_state, encoded) < self.holdout_share
            rest = np.flatnonzero(~holdout)
            plan_ids: Any = compress(encoded, (~holdout).tolist())
        else:
            holdout = np.zeros(n, dtype=bool)
            rest = np.arange(n, dtype=np.intp)
            plan_ids = encoded
        if rest.size:
            u2 = uniforms_from_state(self._arm_state, plan_ids)
            cum = self.cumulative[cohort[rest]]  # (r, J)
            arm[rest] = (u2[:, None] >= cum).sum(axis=1)  # = bisect_right per row

        return self._distinct(arm, cohort, holdout, used, n)

    def _encode_columns(
        self, members: list[str], columns: Mapping[str, Sequence[Any]], n: int
    ) -> np.ndarray:
        """(F, n) codes of every plan feature's values (see `_compile_flat`; `_missing_code` for
        missing, NaN or unknown), checking every value's type."""
        miss = self._missing_code
        out = np.full((len(self._feature_keys), n), miss, dtype=np.intp)
        for fi, (key, numeric) in enumerate(self._checks):
            col = columns.get(key)
            if col is None:
                continue
            if type(col) is not list and type(col) is not tuple:
                col = list(col)
            if numeric:
                x = None
                if set(map(type, col)) <= {float, int, _NoneType}:
                    try:
                        x = np.array(col, dtype=np.float64)  # None -> NaN
                    except OverflowError:
                        pass
                if x is None:
                    x = np.array([_numeric_value(key, v, members[i], i) for i, v in enumerate(col)])
                codes = np.searchsorted(self._cuts[fi], x, side="right")
                codes[np.isnan(x)] = miss
                out[fi] = codes
            else:
                # levels the plan knows are str, so only a value the table does not know
                # (missing, unknown, or of another type) needs a look at its type
                lut = self._level_codes[fi]
                try:
                    codes = np.fromiter(map(lut.get, col, repeat(miss, n)), np.intp, n)
                except TypeError:  # an unhashable value (a list, an object): check them all
                    vals = [_categorical_value(key, v, members[i], i) for i, v in enumerate(col)]
                    codes = np.fromiter(map(lut.get, vals, repeat(miss, n)), np.intp, n)
                for i in np.flatnonzero(codes == miss).tolist():
                    v = col[i]
                    if v is not None and type(v) is not str:
                        v = _categorical_value(key, v, members[i], i)  # raises unless NaN or str
                        codes[i] = miss if v is None else lut.get(v, miss)
                out[fi] = codes
        return out

    def _walk(self, codes: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Cohort per member (n,) and the (F, n) mask of features whose default was taken: per
        step, each member's node and the code of the node's feature pick the next node."""
        if self._next is None:
            return self._walk_compare(codes, n)
        node = np.zeros(n, dtype=np.intp)
        used = np.zeros(codes.shape, dtype=bool)
        ar = np.arange(n, dtype=np.intp)
        flat = codes.reshape(-1)
        feat, width, nxt, defaulted = self.node_feature, self._width, self._next, self._defaulted
        for _ in range(self.depth):
            f = feat.take(node)
            idx = node * width
            idx += flat.take(f * n + ar)
            d = defaulted.take(idx)
            if d.any():
                used[f[d], ar[d]] = True
            node = nxt.take(idx)
        return self.node_cohort.take(node), used

    def _walk_compare(self, codes: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
        """`_walk` for trees whose (node, code) table would be too large: a numeric node
        compares the code with its rank, a categorical one looks the code up in its row."""
        node = np.zeros(n, dtype=np.intp)
        used = np.zeros(codes.shape, dtype=bool)
        ar = np.arange(n, dtype=np.intp)
        flat = codes.reshape(-1)
        miss = self._missing_code
        feat, is_num, rank = self.node_feature, self.node_is_numeric, self.node_rank
        dirs_flat, lw = self.node_directions.reshape(-1), self.node_directions.shape[1] - 1
        dleft, child = self.node_default_left, self._children
        for _ in range(self.depth):
            f = feat.take(node)
            c = flat.take(f * n + ar)
            num = is_num.take(node)
            d = dirs_flat.take(node * (lw + 1) + np.minimum(c, lw))
            known = np.where(num, c != miss, d >= 0)
            go_left = np.where(known, np.where(num, c <= rank.take(node), d == 1), dleft.take(node))
            if not known.all():
                unknown = ~known
                used[f[unknown], ar[unknown]] = True
            node = child.take(2 * node + go_left)
        return self.node_cohort.take(node), used

    def _distinct(
        self, arm: np.ndarray, cohort: np.ndarray, holdout: np.ndarray, used: np.ndarray, n: int
    ) -> tuple[list[Assignment], np.ndarray]:
        """Distinct Assignment objects (ascending by (defaults pattern, cohort, holdout, arm))
        and each member's index into them: a batch builds only as many immutable objects as it
        has distinct answers, and equal answers share one object. Integer codes are grouped
        with a dense table (O(n)) when their range is small, else with np.unique."""
        keys = self._feature_keys
        nf = len(keys)
        names: list[tuple[str, ...]] = [()]
        pattern = np.zeros(n, dtype=np.intp)
        bits: np.ndarray | None = np.zeros(1, dtype=np.int64)  # each pattern's bits, if packed
        if used.any():
            rows = np.packbits(used, axis=0, bitorder="little")  # (ceil(F / 8), n) uint8
            if rows.shape[0] <= 7:  # the bit pattern as one int64: bit j = feature j
                packed = rows[0].astype(np.int64)
                for b in range(1, rows.shape[0]):
                    packed |= rows[b].astype(np.int64) << (8 * b)
                bits, pattern = _group(packed, 1 << nf)
                names = [tuple(keys[j] for j in range(nf) if p >> j & 1) for p in bits.tolist()]
            else:
                bits = None
                _, first_p, pattern = np.unique(
                    used.T, axis=0, return_index=True, return_inverse=True
                )
                pattern = pattern.reshape(-1)
                names = [
                    tuple(keys[j] for j in np.flatnonzero(used[:, i]).tolist())
                    for i in first_p.tolist()
                ]
        n_arms, n_cohorts = len(self.arm_keys), self.n_cohorts
        code = ((pattern * n_cohorts + cohort) * 2 + holdout) * n_arms + arm
        vals, inverse = _group(code, len(names) * n_cohorts * 2 * n_arms)
        rest, a_of = np.divmod(vals, n_arms)  # undo the code: arm, holdout, cohort, pattern
        rest, h_of = np.divmod(rest, 2)
        p_of, c_of = np.divmod(rest, n_cohorts)
        # The same answers recur from batch to batch: they are kept on the plan under a code
        # that does not depend on the batch (the pattern's bits instead of its index here), so
        # a batch builds objects only for answers no earlier batch had.
        cache = self._answers
        if bits is not None and nf < 62 - (n_cohorts * 2 * n_arms).bit_length():
            stable = (((bits[p_of] * n_cohorts + c_of) * 2 + h_of) * n_arms + a_of).tolist()
            objs: list[Any] = list(map(cache.get, stable))
        else:
            stable, objs = None, [None] * vals.size
        todo = [i for i, o in enumerate(objs) if o is None]
        if todo:
            arm_keys, version = self.arm_keys, self.version
            a_l, c_l, h_l, p_l = a_of.tolist(), c_of.tolist(), h_of.tolist(), p_of.tolist()
            if stable is not None and len(cache) + len(todo) > _MAX_CACHED_ANSWERS:
                cache.clear()
            for i in todo:
                a = _new_assignment(arm_keys[a_l[i]], c_l[i], version, h_l[i] == 1, names[p_l[i]])
                objs[i] = a
                if stable is not None:
                    cache[stable[i]] = a
        return objs, inverse


def compile_plan(
    *,
    plan: str,
    version: int,
    partition: Partition,
    allocation: np.ndarray,
    arm_keys: tuple[str, ...],
    holdout_share: float,
    holdout_arm: str,
    salt: str,
    revision: int = 0,
) -> CompiledPlan:
    """Compile a plan version. `allocation`: (n_cohorts, n_arms), rows sum to 1 (to 1e-6).

    Raises InvalidInput for a malformed partition (bad child, cycle, cohort out of range), an
    allocation of the wrong shape or with negative / non-summing rows, an unknown holdout arm, a
    holdout share outside [0, 1), or a bad salt.
    """
    return CompiledPlan(
        plan=plan,
        version=version,
        partition=partition,
        allocation=allocation,
        arm_keys=arm_keys,
        holdout_share=holdout_share,
        holdout_arm=holdout_arm,
        salt=salt,
        revision=revision,
    )


# ---- checks at compile time -------------------------------------------------------------------
def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


def _group(code: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """(ascending distinct values, inverse (n,) intp) of non-negative int codes below `size`:
    `np.unique(code, return_inverse=True)`, in O(n + size) by a table when `size` is small."""
    n = code.shape[0]
    if size <= max(1 << 16, 4 * n):
        seen = np.zeros(size, dtype=bool)
        seen[code] = True
        vals = np.flatnonzero(seen)
        remap = np.zeros(size, dtype=np.intp)
        remap[vals] = np.arange(vals.size, dtype=np.intp)
        return vals, remap.take(code)
    vals, inverse = np.unique(code, return_inverse=True)
    return vals, inverse.reshape(-1).astype(np.intp, copy=False)


def _expand(distinct: list[Assignment], index: np.ndarray) -> list[Assignment]:
    """[distinct[i] for i in index], gathered by numpy on an object array."""
    table = np.empty(len(distinct), dtype=object)
    table[:] = distinct
    return table.take(index).tolist()


def _normalise_ids(member_ids: Sequence[Any]) -> list[str]:
    ids = list(member_ids)
    if set(map(type, ids)) <= {str}:
        out = list(map(str.strip, ids))
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


def _check_header(
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


def _check_allocation(
    allocation: np.ndarray, n_cohorts: int, arm_keys: tuple[str, ...]
) -> tuple[np.ndarray, np.ndarray]:
    """Shares (C, J) renormalised, and cumulative shares with the tail set to exactly 1 from the
    last positive share on, so float rounding can never pick a zero-share arm (Methods §10)."""
    x = np.asarray(allocation, dtype=np.float64)
    if x.shape != (n_cohorts, len(arm_keys)):
        raise InvalidInput(
            f"allocation has shape {x.shape}; expected ({n_cohorts} cohorts, {len(arm_keys)} arms)"
        )
    if not np.isfinite(x).all() or (x < 0).any():
        bad = np.argwhere(~np.isfinite(x) | (x < 0))[0]
        raise InvalidInput(f"allocation[{bad[0]}, {bad[1]}] = {x[tuple(bad)]} is not a share")
    sums = x.sum(axis=1)
    off = np.flatnonzero(np.abs(sums - 1.0) > _SHARE_TOL)
    if off.size:
        raise InvalidInput(f"allocation row {off[0]} sums to {sums[off[0]]:.9g}, not 1")
    x = x / sums[:, None]
    cum = np.cumsum(x, axis=1)
    for c in range(n_cohorts):
        last = int(np.flatnonzero(x[c] > 0)[-1])
        cum[c, last:] = 1.0
    return x, cum


def _check_tree(p: Partition) -> int:
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
