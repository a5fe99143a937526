"""The causal tree on the invented lesson-length scenario (shared/scenario.md), default settings.

What the scenario sets: `level` (beginners differ for ten_min and fifteen_min), `device` (phone for
fifteen_min's abandonment and ten_min's beginners; tablet for adaptive), `streak_days >= 7` (only
advanced learners, fifteen_min) and `tenure_days < 30` (only cancellations under fifteen_min).
Asserted: the root split is beginners against the rest and a split separates phones from the
other devices in at least 9 of 10 seeds; the decoys `region` and `noise_*` are used in at most 1
of 10. The weaker streak and tenure boundaries are not asserted at 200,000 learners (CV pruning
keeps them in only some seeds, at thresholds that vary).
"""

from __future__ import annotations

import pytest

from service.demo.scenario import simulate
from service.stats.models import fit_cohort_model

DECOYS = {"region", "noise_1", "noise_2", "noise_3"}


@pytest.mark.slow  # ten 200,000-learner simulations and fits, 25-40 s on two cores
def test_tree_finds_the_scenario_boundaries_and_ignores_decoys():
    phone_split = decoy_fits = 0
    for seed in range(10):
        table = simulate(200_000, seed=seed)
        fit = fit_cohort_model(table, "causal_tree", {"seed": seed}, success_metric="active_days")
        p = fit.partition
        root = p.features[int(p.feature[0])].key
        assert root == "level", (seed, fit.diagnostics["splits"])
        assert set(p.left_levels[0]) | set(p.right_levels[0]) == {
            "beginner",
            "intermediate",
            "advanced",
        }
        assert {("beginner",)} & {p.left_levels[0], p.right_levels[0]}, seed
        phone_split += any(
            p.feature[i] >= 0
            and p.features[int(p.feature[i])].key == "device"
            and ("phone",) in (p.left_levels[i], p.right_levels[i])
            for i in range(p.n_nodes)
        )
        decoy_fits += bool(DECOYS & set(fit.diagnostics["features_used"]))
    assert phone_split >= 9, phone_split
    assert decoy_fits <= 1, decoy_fits
