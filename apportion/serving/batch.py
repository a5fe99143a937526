"""The batch lookup: many members at once, on the compiled tree's flat arrays (`serving/compile.py`).

Values become integer codes per feature column, the walk is vectorised over members (a few numpy
gathers per tree level), the draws are hashed member by member, and the answers are grouped so a
batch builds one immutable `Assignment` per distinct answer. Each member's answer equals the single
lookup's (apportion/lookup.py's walk); tests/serving/test_index.py checks the two against each
other. This module is the service's hot path for batches: keep it on arrays.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import fields
from itertools import compress, repeat
from operator import itemgetter
from typing import TYPE_CHECKING, Any

import numpy as np

from apportion.errors import InvalidInput
from apportion.lookup import Answer as Assignment
from apportion.serving.checks import categorical_value, normalise_ids, numeric_value
from apportion.serving.compile import FlatTree
from apportion.serving.hashing import uniforms_from_state

if TYPE_CHECKING:
    from apportion.serving.index import CompiledPlan

_NoneType = type(None)
MAX_CACHED_ANSWERS = 65_536  # distinct batch answers kept per plan version (cleared when full)
# A numeric feature with at most this many distinct thresholds is coded by comparing every
# member's value with every threshold (counts fit uint8); members go in chunks, so the (cuts,
# members) comparison table stays under 64 * 65,536 bytes.
BROADCAST_CUTS = 64
BROADCAST_CHUNK = 65_536


def new_assignment(
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


_FIELDS = tuple(f.name for f in fields(Assignment))
if _FIELDS != ("arm", "cohort", "plan_version", "holdout", "defaults_used"):  # kept in step
    raise RuntimeError(f"new_assignment does not fill the fields {_FIELDS} of Assignment")


def batch_compact(
    cp: CompiledPlan, member_ids: Sequence[Any], features: Sequence[Mapping[str, Any]]
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
    keys = cp.feature_keys
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
    return columns_compact(cp, member_ids, columns)


def columns_compact(
    cp: CompiledPlan, member_ids: Sequence[Any], columns: Mapping[str, Sequence[Any]]
) -> tuple[list[Assignment], np.ndarray]:
    """`CompiledPlan.assign_columns` as (distinct answers (k,), index (n,) intp), see
    `batch_compact`."""
    n = len(member_ids)
    members = normalise_ids(member_ids)
    for key, col in columns.items():
        if key in cp.feature_specs and len(col) != n:
            raise InvalidInput(
                f"column '{key}' has {len(col)} values for {n} members",
                errors=[{"field": f"features.{key}", "expected": n, "got": len(col)}],
            )
    if n == 0:
        return [], np.zeros(0, dtype=np.intp)
    cohort, used = _walk(cp.tree, _encode_columns(cp, members, columns, n), n)

    encoded = list(map(str.encode, members))  # UTF-8
    arm = np.full(n, cp.holdout_index, dtype=np.intp)
    if cp.holdout_share > 0.0:
        holdout = uniforms_from_state(cp.holdout_state, encoded) < cp.holdout_share
        draw = ~holdout
    else:
        holdout = np.zeros(n, dtype=bool)
        draw = np.ones(n, dtype=bool)
    # A cohort whose cumulative shares are all 0 or 1 (one arm takes it all, as most cohorts
    # of an LP's vertex solution do) gives that arm whatever the draw, (u >= cum).sum() being
    # the count of its zeros for every u in [0, 1): its members need no arm draw.
    cum_all = cp.cumulative
    one_arm = ((cum_all == 0.0) | (cum_all == 1.0)).all(axis=1)
    if one_arm.any():
        fixed = np.where(one_arm, (cum_all == 0.0).sum(axis=1), -1)[cohort]
        pure = draw & (fixed >= 0)
        arm[pure] = fixed[pure]
        draw &= ~pure
    rest = np.flatnonzero(draw)
    if rest.size:
        plan_ids: Any = encoded if rest.size == n else compress(encoded, draw.tolist())
        u2 = uniforms_from_state(cp.arm_state, plan_ids)
        cum_t = cum_all.T[:, cohort[rest]]  # (J, r): summed over the first axis, row by row
        arm[rest] = (u2 >= cum_t).sum(axis=0)  # = bisect_right per member

    return _distinct(cp, arm, cohort, holdout, used, n)


def _encode_columns(
    cp: CompiledPlan, members: list[str], columns: Mapping[str, Sequence[Any]], n: int
) -> np.ndarray:
    """(F, n) codes of every plan feature's values (see `serving/compile.py`; `missing_code` for
    missing, NaN or unknown), checking every value's type."""
    miss = cp.tree.missing_code
    out = np.full((len(cp.feature_keys), n), miss, dtype=np.intp)
    for fi, (key, numeric) in enumerate(cp.checks):
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
                x = np.array([numeric_value(key, v, members[i], i) for i, v in enumerate(col)])
            row = out[fi]
            cuts = cp.tree.cuts[fi]
            if cuts.size <= BROADCAST_CUTS:
                # count of cuts at or below x, by one comparison per (cut, member): a few
                # cuts against every member at once is 6 times faster than a binary search
                # per member (`searchsorted`, whose branches random values mispredict), and
                # equal to it for every value but NaN, which is then set to missing
                for lo in range(0, n, BROADCAST_CHUNK):
                    xs = x[lo : lo + BROADCAST_CHUNK]
                    row[lo : lo + xs.size] = (cuts[:, None] <= xs).sum(axis=0, dtype=np.uint8)
            else:
                row[:] = np.searchsorted(cuts, x, side="right")
            row[np.isnan(x)] = miss
        else:
            # levels the plan knows are str, so only a value the table does not know
            # (missing, unknown, or of another type) needs a look at its type
            lut = cp.tree.level_codes[fi]
            row = out[fi]
            try:
                if miss < 256:  # codes fit a byte: bytes() packs them faster than fromiter
                    row[:] = np.frombuffer(bytes(map(lut.get, col, repeat(miss, n))), np.uint8)
                else:
                    row[:] = np.fromiter(map(lut.get, col, repeat(miss, n)), np.intp, n)
            except TypeError:  # an unhashable value (a list, an object): check them all
                vals = [categorical_value(key, v, members[i], i) for i, v in enumerate(col)]
                row[:] = np.fromiter(map(lut.get, vals, repeat(miss, n)), np.intp, n)  # type: ignore[arg-type]
            for i in np.flatnonzero(row == miss).tolist():
                v = col[i]
                if v is not None and type(v) is not str:
                    v = categorical_value(key, v, members[i], i)  # raises unless NaN or str
                    row[i] = miss if v is None else lut.get(v, miss)
    return out


def _walk(t: FlatTree, codes: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Cohort per member (n,) and the (F, n) mask of features whose default was taken: per
    step, each member's node and the code of the node's feature pick the next node."""
    if t.next_node is None:
        return _walk_compare(t, codes, n)
    node = np.zeros(n, dtype=np.intp)
    used_flat = np.zeros(codes.size, dtype=bool)
    ar = np.arange(n, dtype=np.intp)
    flat = codes.reshape(-1)
    width, nxt, defaulted = t.width, t.next_node, t.defaulted
    assert defaulted is not None  # built with the table (compile.py)
    row_start = t.node_feature * n  # where each node's feature column starts in `flat`
    taken: list[np.ndarray] = []  # per step, the flat (feature, member) cells that defaulted
    for _ in range(t.depth):
        cell = row_start.take(node)
        cell += ar
        idx = node * width
        idx += flat.take(cell)
        d = defaulted.take(idx)
        if d.any():
            taken.append(cell[d])
        node = nxt.take(idx)
    if taken:  # marked once for all steps
        used_flat[np.concatenate(taken)] = True
    return t.node_cohort.take(node), used_flat.reshape(codes.shape)


def _walk_compare(t: FlatTree, codes: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """`_walk` for trees whose (node, code) table would be too large: a numeric node
    compares the code with its rank, a categorical one looks the code up in its row."""
    node = np.zeros(n, dtype=np.intp)
    used = np.zeros(codes.shape, dtype=bool)
    ar = np.arange(n, dtype=np.intp)
    flat = codes.reshape(-1)
    miss = t.missing_code
    feat, is_num, rank = t.node_feature, t.node_is_numeric, t.node_rank
    dirs_flat, lw = t.node_directions.reshape(-1), t.node_directions.shape[1] - 1
    dleft, child = t.node_default_left, t.children
    for _ in range(t.depth):
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
    return t.node_cohort.take(node), used


def _distinct(
    cp: CompiledPlan,
    arm: np.ndarray,
    cohort: np.ndarray,
    holdout: np.ndarray,
    used: np.ndarray,
    n: int,
) -> tuple[list[Assignment], np.ndarray]:
    """Distinct Assignment objects (ascending by (defaults pattern, cohort, holdout, arm))
    and each member's index into them: a batch builds only as many immutable objects as it
    has distinct answers, and equal answers share one object. Integer codes are grouped
    with a dense table (O(n)) when their range is small, else with np.unique."""
    keys = cp.feature_keys
    nf = len(keys)
    names: list[tuple[str, ...]] | None = [()]
    pattern = np.zeros(n, dtype=np.intp)
    bits: np.ndarray | None = np.zeros(1, dtype=np.int64)  # each pattern's bits, if packed
    if used.any():
        rows = np.packbits(used, axis=0, bitorder="little")  # (ceil(F / 8), n) uint8
        if rows.shape[0] <= 7:  # the bit pattern as one int64: bit j = feature j
            packed = rows[0].astype(np.int64)
            for b in range(1, rows.shape[0]):
                packed |= rows[b].astype(np.int64) << (8 * b)
            bits, pattern = _group(packed, 1 << nf)
            names = None  # made below for the answers no earlier batch had
        else:
            bits = None
            _, first_p, pattern = np.unique(used.T, axis=0, return_index=True, return_inverse=True)
            pattern = pattern.reshape(-1)
            names = [
                tuple(keys[j] for j in np.flatnonzero(used[:, i]).tolist())
                for i in first_p.tolist()
            ]
    n_arms, n_cohorts = len(cp.arm_keys), cp.n_cohorts
    code = ((pattern * n_cohorts + cohort) * 2 + holdout) * n_arms + arm
    n_patterns = len(names) if names is not None else len(bits)  # type: ignore[arg-type]
    vals, inverse = _group(code, n_patterns * n_cohorts * 2 * n_arms)
    rest, a_of = np.divmod(vals, n_arms)  # undo the code: arm, holdout, cohort, pattern
    rest, h_of = np.divmod(rest, 2)
    p_of, c_of = np.divmod(rest, n_cohorts)
    # The same answers recur from batch to batch: they are kept on the plan under a code
    # that does not depend on the batch (the pattern's bits instead of its index here), so
    # a batch builds objects only for answers no earlier batch had.
    cache = cp.answers
    if bits is not None and nf < 62 - (n_cohorts * 2 * n_arms).bit_length():
        stable = (((bits[p_of] * n_cohorts + c_of) * 2 + h_of) * n_arms + a_of).tolist()
        objs: list[Any] = list(map(cache.get, stable))
    else:
        stable, objs = None, [None] * vals.size
    todo = [i for i, o in enumerate(objs) if o is None]
    if todo:
        arm_keys, version = cp.arm_keys, cp.version
        a_l, c_l, h_l, p_l = a_of.tolist(), c_of.tolist(), h_of.tolist(), p_of.tolist()
        if stable is not None and len(cache) + len(todo) > MAX_CACHED_ANSWERS:
            cache.clear()
        if names is None:  # packed patterns: the names of bit j set = feature j
            assert bits is not None
            b_l, needed = bits.tolist(), {p_l[i] for i in todo}
            names = [
                tuple(keys[j] for j in range(nf) if b >> j & 1) if p in needed else ()
                for p, b in enumerate(b_l)
            ]
        for i in todo:
            a = new_assignment(arm_keys[a_l[i]], c_l[i], version, h_l[i] == 1, names[p_l[i]])
            objs[i] = a
            if stable is not None:
                cache[stable[i]] = a
    return objs, inverse


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


def expand(distinct: list[Assignment], index: np.ndarray) -> list[Assignment]:
    """[distinct[i] for i in index], gathered by numpy on an object array."""
    table = np.empty(len(distinct), dtype=object)
    table[:] = distinct
    out: list[Assignment] = table.take(index).tolist()  # object array: the Assignments themselves
    return out
