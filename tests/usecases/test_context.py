"""The diff-against-live cache a process keeps: bounded, least recently used first out, and owned
by each `Services` (two apps in one process never share answers)."""

from __future__ import annotations

from collections import OrderedDict

from apportion.config import Settings
from apportion.usecases.context import PLAN_DIFFS_KEPT, BoundedCache, Services


def test_cache_keeps_at_most_maxsize_and_evicts_the_least_recently_used() -> None:
    # reference: the LRU discipline as functools.lru_cache documents it ("least recently used"),
    # replayed on a plain OrderedDict in this test
    cache, ref = BoundedCache(3), OrderedDict()
    ops = [("put", 1), ("put", 2), ("put", 3), ("get", 1), ("put", 4), ("get", 2), ("put", 5),
           ("get", 3), ("get", 1), ("put", 6), ("get", 4), ("get", 5)]  # fmt: skip
    for op, key in ops:
        if op == "put":
            cache.put(key, f"v{key}")
            ref[key] = f"v{key}"
            ref.move_to_end(key)
            while len(ref) > 3:
                ref.popitem(last=False)
        else:
            expected = ref.get(key)
            if key in ref:
                ref.move_to_end(key)
            assert cache.get(key) == expected, (op, key)
        assert len(cache) == len(ref) <= 3


def test_each_services_owns_its_own_bounded_cache(tmp_path) -> None:
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'x.db'}")
    a, b = Services(settings=settings, db=None), Services(settings=settings, db=None)  # type: ignore[arg-type]
    a.plan_diffs.put(("plan", 1, 2), {"share_changed": 0.5})
    assert b.plan_diffs.get(("plan", 1, 2)) is None
    assert a.plan_diffs.maxsize == PLAN_DIFFS_KEPT
    for i in range(PLAN_DIFFS_KEPT + 10):
        a.plan_diffs.put(("plan", i, 0), {})
    assert len(a.plan_diffs) == PLAN_DIFFS_KEPT
