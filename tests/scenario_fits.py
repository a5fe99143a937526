"""The invented scenario's causal-tree fits on 200,000 learners, seeds 0..9, computed once per
test run and shared by tests/stats/test_tree_scenario.py (the partition) and
tests/optimize/test_scenario.py (plans on it), which fit exactly the same thing.

Each fit is pickled into a directory every pytest-xdist worker of the run shares, under one lock
file per seed (`fcntl.flock`, Linux and macOS): when the two modules run at once on two workers,
each fits the seeds the other has not taken, so the ten fits are split between them; a module that
runs later only reads them. A fit depends only on its seed (the simulator and the tree are both
seeded), so which worker made it does not matter."""

from __future__ import annotations

import fcntl
import os
import pickle
from collections.abc import Iterable
from pathlib import Path

import pytest

from apportion.demo import scenario as sc
from apportion.stats.models import CohortModelFit, fit_cohort_model

LEARNERS = 200_000
SEEDS = range(10)


def shared_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A directory all workers of this run see: the parent of the worker's base temp under
    pytest-xdist (its documented pattern for session data), the base temp itself otherwise."""
    base = tmp_path_factory.getbasetemp()
    root = base.parent if os.environ.get("PYTEST_XDIST_WORKER") else base
    d = root / "scenario-fits"
    d.mkdir(exist_ok=True)
    return d


def _fit(seed: int) -> CohortModelFit:
    table = sc.simulate(LEARNERS, seed)
    return fit_cohort_model(table, "causal_tree", {"seed": seed}, success_metric=sc.SUCCESS)


def _load(path: Path) -> CohortModelFit:
    with path.open("rb") as f:
        fit: CohortModelFit = pickle.load(f)
    return fit


def _make(d: Path, seed: int, *, wait: bool) -> CohortModelFit | None:
    """The fit of `seed`: read if stored, else made under its lock; None when another worker
    holds the lock and `wait` is false."""
    path = d / f"fit-{seed}.pickle"
    if path.exists():
        return _load(path)
    with (d / f"fit-{seed}.lock").open("w") as lock:
        try:
            fcntl.flock(lock, fcntl.LOCK_EX | (0 if wait else fcntl.LOCK_NB))
        except BlockingIOError:
            return None
        try:
            if not path.exists():
                tmp = path.with_suffix(f".tmp-{os.getpid()}")
                tmp.write_bytes(pickle.dumps(_fit(seed)))
                tmp.replace(path)  # atomic: a reader sees the whole pickle or none
            return _load(path)
        finally:
            fcntl.flock(lock, fcntl.LOCK_UN)


def scenario_fits(
    tmp_path_factory: pytest.TempPathFactory, seeds: Iterable[int] = SEEDS
) -> dict[int, CohortModelFit]:
    """The fit of each seed, in the order given."""
    d = shared_dir(tmp_path_factory)
    order = list(seeds)
    fits: dict[int, CohortModelFit] = {}
    pending = list(order)
    while pending:
        # first every seed nobody is fitting; then wait for the first one somebody else is
        for seed in list(pending):
            fit = _make(d, seed, wait=False)
            if fit is not None:
                fits[seed] = fit
                pending.remove(seed)
        if pending:
            seed = pending.pop(0)
            made = _make(d, seed, wait=True)
            assert made is not None
            fits[seed] = made
    return {seed: fits[seed] for seed in order}
