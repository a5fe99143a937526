"""The compiled index: same cohorts as the reference walk, realised shares as planned, defaults,
type checks, batch = single, determinism across processes and stability across versions."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats
from serving.serving_helpers import (
    FEATURES,
    build,
    coded,
    hand_partition,
    random_partition,
    random_rows,
    route_features,
)

from apportion.errors import InvalidInput
from apportion.serving.index import Assignment, PlanParts, compile_plan
from apportion.stats.partition import Partition
from apportion.stats.table import FeatureSpec

ROOT = Path(__file__).resolve().parents[2]
ARMS = ("control", "short", "long")
HAND_ALLOC = np.array([[0.2, 0.5, 0.3], [1 / 3, 1 / 3, 1 / 3], [0.6, 0.4, 0.0]])


def _plan(partition=None, alloc=HAND_ALLOC, *, salt="test-salt", holdout=0.1, version=1, **kw):
    return compile_plan(
        PlanParts(
            plan="lesson-length",
            version=version,
            partition=hand_partition() if partition is None else partition,
            allocation=alloc,
            arm_keys=ARMS,
            holdout_share=holdout,
            holdout_arm="control",
            salt=salt,
            **kw,
        )
    )


def _members(rng, n):
    return [f"member-{i}" for i in range(n)], random_rows(rng, n)


# ---- the walk -------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "features, cohort, defaults",
    [
        ({"tenure_days": 10, "level": "beginner"}, 0, ()),
        ({"tenure_days": 10.0, "level": "advanced"}, 1, ()),
        ({"tenure_days": 10, "level": "expert"}, 1, ("level",)),  # unseen level -> default right
        ({"level": "beginner"}, 0, ("tenure_days",)),  # missing key -> default left
        ({"tenure_days": float("nan"), "level": "beginner"}, 0, ("tenure_days",)),
        ({"tenure_days": None, "level": None}, 1, ("tenure_days", "level")),
        ({}, 1, ("tenure_days", "level")),
        ({"tenure_days": 30}, 2, ("region",)),  # not < 30 -> right; region missing -> left
        ({"tenure_days": 45, "region": "west"}, 2, ("region",)),  # unseen at the node -> left
        ({"tenure_days": 45, "region": "east"}, 1, ()),  # two leaves share cohort 1
        ({"tenure_days": 45, "region": "south", "level": "nonsense"}, 2, ()),  # level off path
        ({"tenure_days": float("inf"), "region": "north"}, 2, ()),
        ({"tenure_days": np.float32(10.5), "level": np.str_("beginner")}, 0, ()),
        ({"tenure_days": np.int64(45), "region": "east", "unrelated": [1, 2]}, 1, ()),
    ],
)
def test_hand_partition_cohorts_and_defaults(features, cohort, defaults):
    # Expected cohorts worked out by hand from the tree drawn in serving_helpers.hand_partition
    a = _plan().assign("m-1", features)
    assert (a.cohort, a.defaults_used) == (cohort, defaults)
    b = _plan().assign_batch(["m-1"], [features])[0]
    assert b == a


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4, 5])
def test_compiled_walk_equals_partition_route(seed):
    rng = np.random.default_rng(seed)
    p = random_partition(rng, depth=6 + seed % 3, n_cohorts=7)
    cp = _plan(p, rng.dirichlet(np.ones(3), size=7))
    ids, rows = _members(rng, 3000)
    ref, _ = p.route(
        coded(rows), route_features()
    )  # the reference walk (apportion.stats.partition)
    single = [cp.assign(i, r) for i, r in zip(ids, rows, strict=True)]
    batch = cp.assign_batch(ids, rows)
    np.testing.assert_array_equal([a.cohort for a in single], ref)
    assert batch == single  # batch equals single for every member, defaults included
    assert any(a.defaults_used for a in single)  # the data exercised default directions


def test_defaults_used_lists_exactly_the_defaulted_features_on_the_path():
    rng = np.random.default_rng(9)
    p = random_partition(rng, depth=7, n_cohorts=5)
    cp = _plan(p, rng.dirichlet(np.ones(3), size=5))
    ids, rows = _members(rng, 1500)
    for mid, row in zip(ids, rows, strict=True):
        # an independent walk over Partition's own arrays, recording where defaults are taken
        node, took = 0, set()
        while p.feature[node] >= 0:
            f = p.features[int(p.feature[node])]
            v = row.get(f.key)
            if f.kind == "numeric":
                known = v is not None and v == v
                left = known and v < p.threshold[node]
            else:
                known = v in p.left_levels[node] or v in p.right_levels[node]
                left = v in p.left_levels[node]
            if not known:
                took.add(f.key)
                left = bool(p.default_left[node])
            node = int(p.left[node] if left else p.right[node])
        a = cp.assign(mid, row)
        assert a.cohort == p.cohort[node]
        assert a.defaults_used == tuple(f.key for f in FEATURES if f.key in took)


def test_single_cohort_partition_has_no_defaults():
    cp = _plan(Partition.single(FEATURES), np.array([[0.5, 0.25, 0.25]]))
    a = cp.assign("x", {})
    assert a.cohort == 0 and a.defaults_used == ()


# ---- types ------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "features, key",
    [
        ({"tenure_days": "45"}, "tenure_days"),
        ({"tenure_days": True}, "tenure_days"),  # bool is not numeric
        ({"tenure_days": np.bool_(False)}, "tenure_days"),
        ({"tenure_days": [45]}, "tenure_days"),
        ({"level": 3}, "level"),
        ({"level": True}, "level"),
        ({"level": 2.5}, "level"),
        ({"region": ["north"]}, "region"),
        ({"sessions": "many"}, "sessions"),  # a plan feature off this member's path
        ({"sessions": "many", "level": 2.5}, "level"),  # two wrong: the first in plan order
    ],
)
def test_wrong_types_raise_invalid_input_naming_feature_and_member(features, key):
    cp = _plan()
    with pytest.raises(InvalidInput) as e:
        cp.assign(" learner-7 ", {"tenure_days": 10, **features})
    assert key in e.value.detail and "learner-7" in e.value.detail
    assert e.value.errors[0]["field"] == f"features.{key}"
    with pytest.raises(InvalidInput) as eb:
        cp.assign_batch(["a", "learner-7"], [{}, {"tenure_days": 10, **features}])
    assert key in eb.value.detail and "learner-7" in eb.value.detail
    assert eb.value.errors[0]["index"] == 1


def test_bad_member_ids_and_shapes_raise():
    cp = _plan()
    for bad in ("", "  ", 3.0, None, False):
        with pytest.raises(InvalidInput):
            cp.assign(bad, {})
    with pytest.raises(InvalidInput):
        cp.assign_batch(["a", ""], [{}, {}])
    with pytest.raises(InvalidInput):
        cp.assign_batch(["a", "b"], [{}])
    with pytest.raises(InvalidInput):
        cp.assign("a", [("tenure_days", 3)])
    with pytest.raises(InvalidInput):
        cp.assign_batch(["a"], [[("tenure_days", 3)]])
    with pytest.raises(InvalidInput):
        cp.assign_columns(["a", "b"], {"tenure_days": [1.0]})


def test_columnar_batch_equals_row_batch():
    rng = np.random.default_rng(3)
    cp = _plan(random_partition(rng, depth=6, n_cohorts=4), rng.dirichlet(np.ones(3), size=4))
    ids, rows = _members(rng, 2000)
    cols = {f.key: [r.get(f.key) for r in rows] for f in FEATURES}
    cols["not-a-plan-feature"] = ["ignored"]  # unknown columns are ignored, whatever their length
    assert cp.assign_columns(ids, cols) == cp.assign_batch(ids, rows)
    assert cp.assign_batch([], []) == []


def test_member_id_normalisation_in_assign():
    cp = _plan()
    f = {"tenure_days": 3, "level": "beginner"}
    assert cp.assign(" 77 ", f) == cp.assign(77, f) == cp.assign("77", f)


# ---- realised shares ------------------------------------------------------------------------------
def test_realised_shares_match_plan_per_cohort_and_holdout():
    rng = np.random.default_rng(2024)
    n = 200_000
    ids, rows = _members(rng, n)
    cp = _plan(holdout=0.1)
    out = cp.assign_batch(ids, rows)
    cohort = np.array([a.cohort for a in out])
    hold = np.array([a.holdout for a in out])
    arm = np.array([ARMS.index(a.arm) for a in out])
    assert (arm[hold] == 0).all()
    # holdout share: SRM-style chisquare of [holdout, rest] vs [h, 1 - h] (common practice)
    k = int(hold.sum())
    assert stats.chisquare([k, n - k], [0.1 * n, 0.9 * n]).pvalue > 0.001
    # the holdout does not depend on the cohort: chi2_contingency of holdout x cohort
    table = np.array(
        [[np.sum((cohort == c) & hold), np.sum((cohort == c) & ~hold)] for c in range(3)]
    )
    assert stats.chi2_contingency(table).pvalue > 0.001
    for c in range(3):
        sel = (cohort == c) & ~hold
        counts = np.bincount(arm[sel], minlength=3)
        shares = HAND_ALLOC[c]
        assert counts[shares == 0].sum() == 0  # a zero-share arm is never assigned
        pos = shares > 0
        expected = sel.sum() * shares[pos]
        assert expected.min() >= 5  # Cochran's rule for the chi-square approximation
        assert stats.chisquare(counts[pos], expected).pvalue > 0.001, (c, counts)


def test_share_check_would_detect_a_wrong_allocation():
    # the same test against shares the plan does not use must fail (the check has power)
    rng = np.random.default_rng(2024)
    ids, rows = _members(rng, 50_000)
    out = _plan(holdout=0.0).assign_batch(ids, rows)
    sel = [ARMS.index(a.arm) for a in out if a.cohort == 0]
    counts = np.bincount(sel, minlength=3)
    wrong = np.array([0.25, 0.5, 0.25]) * len(sel)  # plan says 0.2 / 0.5 / 0.3
    assert stats.chisquare(counts, wrong).pvalue < 1e-6


def test_cumulative_tail_is_exactly_one_from_the_last_positive_share():
    alloc = HAND_ALLOC.copy()
    alloc[2] = [0.3, 0.7 - 1e-9, 0.0]  # sums to 1 - 1e-9: within tolerance, rounding would leak
    cp = _plan(alloc=alloc)
    assert cp.cumulative[2, 1] == 1.0 and cp.cumulative[2, 2] == 1.0
    assert cp.cumulative[:, -1].tolist() == [1.0] * 3
    assert np.all(np.diff(cp.cumulative, axis=1) >= 0)


def test_pure_allocation_gives_the_one_arm():
    alloc = np.array([[0, 1, 0], [0, 0, 1], [1, 0, 0]], dtype=float)
    cp = _plan(alloc=alloc, holdout=0.0)
    rng = np.random.default_rng(5)
    ids, rows = _members(rng, 2000)
    for a in cp.assign_batch(ids, rows):
        assert a.arm == ARMS[int(np.argmax(alloc[a.cohort]))]


# ---- determinism and stability -----------------------------------------------------------------------
_CHILD = """
import sys, json
sys.path.insert(0, {root!r}); sys.path.insert(0, {here!r})
import numpy as np
from serving.serving_helpers import hand_partition
from apportion.serving.index import PlanParts, compile_plan
cp = compile_plan(PlanParts(plan="lesson-length", version=1, partition=hand_partition(),
                  allocation=np.array({alloc}), arm_keys={arms!r}, holdout_share=0.1,
                  holdout_arm="control", salt="test-salt"))
rows = json.loads(sys.stdin.read())
print(json.dumps([cp.assign(m, f).to_dict() for m, f in rows]))
"""


def test_same_member_same_arm_in_two_processes():
    rng = np.random.default_rng(8)
    ids, rows = _members(rng, 200)
    rows = [{k: (None if v != v else v) for k, v in r.items()} for r in rows]  # JSON has no NaN
    payload = json.dumps(list(zip(ids, rows, strict=True)))
    code = _CHILD.format(
        root=str(ROOT), here=str(Path(__file__).parents[1]), alloc=HAND_ALLOC.tolist(), arms=ARMS
    )
    outs = []
    for seed in ("0", "4242"):
        r = subprocess.run(
            [sys.executable, "-c", code],
            input=payload,
            capture_output=True,
            text=True,
            check=True,
            env={"PYTHONHASHSEED": seed, "PATH": "/usr/bin:/bin"},
        )
        outs.append(json.loads(r.stdout))
    here = [a.to_dict() for a in _plan().assign_batch(ids, rows)]
    assert outs[0] == outs[1] == here
    assert len({a["arm"] for a in here}) == 3


def _moved_share(old: np.ndarray, new: np.ndarray) -> float:
    """Share of uniform u whose arm differs between two cumulative layouts (exact)."""
    co, cn = np.concatenate([[0], np.cumsum(old)]), np.concatenate([[0], np.cumsum(new)])
    keep = sum(max(0.0, min(co[j + 1], cn[j + 1]) - max(co[j], cn[j])) for j in range(len(old)))
    return 1.0 - keep


def test_new_version_with_same_salt_keeps_arms_in_unchanged_cohorts():
    rng = np.random.default_rng(77)
    ids, rows = _members(rng, 40_000)
    alloc2 = HAND_ALLOC.copy()
    alloc2[0] = [0.4, 0.4, 0.2]
    alloc2[2] = [0.3, 0.3, 0.4]
    v1 = _plan(version=1).assign_batch(ids, rows)
    v2 = _plan(alloc=alloc2, version=2).assign_batch(ids, rows)
    assert all(b.plan_version == 2 for b in v2)
    assert [a.holdout for a in v1] == [b.holdout for b in v2]  # holdout unchanged by the new shares
    for c in (1,):  # unchanged cohorts: nobody moves
        assert all(a.arm == b.arm for a, b in zip(v1, v2, strict=True) if a.cohort == c)
    for c in (0, 2):  # changed cohorts: the moved share is the layout's interval mismatch
        pairs = [
            (a.arm, b.arm) for a, b in zip(v1, v2, strict=True) if a.cohort == c and not a.holdout
        ]
        moved = np.mean([x != y for x, y in pairs])
        m = _moved_share(HAND_ALLOC[c], alloc2[c])
        se = np.sqrt(m * (1 - m) / len(pairs))
        assert abs(moved - m) < 4 * se  # binomial standard error; 4 SE keeps false alarms < 1e-4
    # a new salt re-randomises: in an unchanged cohort about sum_j p_j^2 keep their arm
    v3 = _plan(salt="another-salt").assign_batch(ids, rows)
    pairs = [
        (a.arm, b.arm)
        for a, b in zip(v1, v3, strict=True)
        if a.cohort == 1 and not a.holdout and not b.holdout
    ]
    same = np.mean([x == y for x, y in pairs])
    p = float(np.sum(HAND_ALLOC[1] ** 2))
    assert abs(same - p) < 4 * np.sqrt(p * (1 - p) / len(pairs))


# ---- compile-time checks and immutability ------------------------------------------------------------
@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"alloc": HAND_ALLOC[:2]}, "shape"),
        ({"alloc": HAND_ALLOC * 1.01}, "sums to"),
        ({"alloc": np.where(HAND_ALLOC == 0.0, -0.1, HAND_ALLOC)}, "not a share"),
        ({"holdout": 1.0}, "holdout_share"),
        ({"holdout": -0.1}, "holdout_share"),
        ({"salt": ""}, "salt"),
    ],
)
def test_bad_plans_are_refused(kwargs, fragment):
    with pytest.raises(InvalidInput) as e:
        _plan(**kwargs)
    assert fragment in e.value.detail


def test_unknown_holdout_arm_and_malformed_trees_are_refused():
    with pytest.raises(InvalidInput, match="holdout arm"):
        compile_plan(
            PlanParts(
                plan="p",
                version=1,
                partition=hand_partition(),
                allocation=HAND_ALLOC,
                arm_keys=ARMS,
                holdout_share=0.1,
                holdout_arm="nope",
                salt="s",
            )
        )
    cyclic = build([{"feature": 0, "threshold": 1.0, "left": 0, "right": 1}, {"cohort": 0}])
    with pytest.raises(InvalidInput, match="reached twice"):
        _plan(cyclic, HAND_ALLOC[:1])
    bad_cohort = build(
        [{"feature": 0, "threshold": 1.0, "left": 1, "right": 2}, {"cohort": 0}, {"cohort": 5}],
        n_cohorts=2,
    )
    with pytest.raises(InvalidInput, match="cohort 5"):
        _plan(bad_cohort, HAND_ALLOC[:2])


def test_compiled_plan_is_immutable():
    cp = _plan()
    with pytest.raises(AttributeError):
        cp.version = 2
    with pytest.raises(ValueError):
        cp.cumulative[0, 0] = 0.5
    with pytest.raises(TypeError):
        cp.feature_specs["x"] = None
    a = cp.assign("m", {})
    with pytest.raises(AttributeError):
        a.arm = "long"
    assert a.to_dict() == {
        "arm": a.arm,
        "cohort": a.cohort,
        "plan_version": 1,
        "holdout": a.holdout,
        "defaults_used": list(a.defaults_used),
    }
    assert isinstance(a, Assignment)


def test_batch_equals_single_with_many_features():
    # more than 56 features takes the wide defaults-pattern path in the batch materialisation
    feats = tuple(FeatureSpec(f"x{i}", "numeric") for i in range(60))
    rng = np.random.default_rng(12)
    p = random_partition(rng, feats, depth=7, n_cohorts=5, p_split=1.0)
    cp = _plan(p, rng.dirichlet(np.ones(3), size=5))
    ids = [f"w-{i}" for i in range(1500)]
    rows = [
        {
            f.key: float(v)
            for f, v in zip(feats, rng.normal(30, 30, 60), strict=True)
            if rng.random() > 0.3
        }
        for _ in ids
    ]
    single = [cp.assign(i, r) for i, r in zip(ids, rows, strict=True)]
    assert cp.assign_batch(ids, rows) == single
    assert len({a.defaults_used for a in single}) > 10


def test_batch_answers_are_kept_between_calls_and_equal_the_single_path():
    """A second batch reuses the answer objects of the first (the plan keeps them), and the
    categorical fast path (codes first, types only where the table missed) still treats a NaN
    level as missing, an unknown level as a default and a str subclass as its str."""

    class Level(str):
        pass

    rng = np.random.default_rng(21)
    cp = _plan(random_partition(rng, depth=6, n_cohorts=4), rng.dirichlet(np.ones(3), size=4))
    ids, rows = _members(rng, 600)
    odd = [float("nan"), "never-seen", Level("beginner"), np.str_("advanced"), None]
    for i, r in enumerate(rows[:50]):
        r["level"] = odd[i % len(odd)]
    first = cp.assign_batch(ids, rows)
    second = cp.assign_batch(list(reversed(ids)), list(reversed(rows)))
    assert first == [cp.assign(m, r) for m, r in zip(ids, rows, strict=True)]
    assert all(a is b for a, b in zip(first, reversed(second), strict=True))
    assert len({id(a) for a in first}) < len(first)  # equal answers share one object


def test_one_arm_cohorts_skip_the_draw_and_keep_the_single_paths_answers():
    """Members of a cohort whose shares are all 0 or 1 get its one arm without an arm draw in
    the batch path; mixed cohorts, the holdout and the one-arm cohorts (one arm first, last and
    in the middle) together must still equal the single path member by member."""
    alloc = np.array([[0.0, 1.0, 0.0], [0.2, 0.5, 0.3], [0.0, 0.0, 1.0]])
    cp = _plan(alloc=alloc, holdout=0.1)
    ids, rows = _members(np.random.default_rng(31), 3000)
    batch = cp.assign_batch(ids, rows)
    assert batch == [cp.assign(m, r) for m, r in zip(ids, rows, strict=True)]
    plan_members = [a for a in batch if not a.holdout]
    assert {a.cohort for a in plan_members} == {0, 1, 2}
    assert all(
        a.arm == ARMS[int(np.argmax(alloc[a.cohort]))] for a in plan_members if a.cohort != 1
    )
    assert any(a.holdout for a in batch)
    # every cohort one-armed, the first arm included, no holdout: no arm draw at all
    alloc = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    cp = _plan(alloc=alloc, holdout=0.0)
    assert cp.assign_batch(ids, rows) == [cp.assign(m, r) for m, r in zip(ids, rows, strict=True)]


@pytest.mark.parametrize("coding", ["broadcast", "search"])
@pytest.mark.parametrize("table", [True, False], ids=["table", "compare"])
def test_batch_codes_numbers_at_and_around_every_threshold_like_the_single_path(
    table, coding, monkeypatch
):
    """The batch path turns a number into the count of the feature's thresholds at or below it;
    at a threshold, one double below it, at the infinities, NaN and an int beyond 2**53 it must
    send members where the single path (x < threshold goes left) sends them, with the (node,
    code) table and with the comparison walk that large trees use instead, and with both ways
    of counting (a comparison with every threshold, or numpy's binary search for features with
    many thresholds)."""
    from apportion.serving import batch as batch_module
    from apportion.serving import compile as compile_module

    if not table:
        monkeypatch.setattr(compile_module, "TABLE_CELLS", 0)
    if coding == "search":
        monkeypatch.setattr(batch_module, "BROADCAST_CUTS", 0)
    else:
        monkeypatch.setattr(batch_module, "BROADCAST_CHUNK", 7)  # several chunks, a short last
    rng = np.random.default_rng(5)
    p = random_partition(rng, depth=6, n_cohorts=4)
    cp = _plan(p, rng.dirichlet(np.ones(3), size=4))
    numeric = [f.key for f in p.features if f.kind == "numeric"]
    cuts = sorted({float(t) for t, f in zip(p.threshold, p.feature, strict=True) if f >= 0
                   and p.features[int(f)].kind == "numeric"})  # fmt: skip
    values: list = [*cuts, *(np.nextafter(c, -np.inf) for c in cuts)]
    values += [np.inf, -np.inf, float("nan"), None, 2**60, -(2**60), 0]
    rows = [
        {k: values[(i + j) % len(values)] for j, k in enumerate(numeric)}
        for i in range(len(values) * 3)
    ]
    for i, r in enumerate(rows):  # categorical features too: known, unseen and missing levels
        for f in p.features:
            if f.kind == "categorical" and i % 3:
                r[f.key] = (*f.levels, "unseen")[i % (len(f.levels) + 1)]
    ids = [f"edge-{i}" for i in range(len(rows))]
    assert (cp.tree.next_node is None) is not table
    assert cp.assign_batch(ids, rows) == [cp.assign(m, r) for m, r in zip(ids, rows, strict=True)]
