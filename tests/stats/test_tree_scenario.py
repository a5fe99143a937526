"""The causal tree on the invented lesson-length scenario, default settings.

What the scenario sets: `level` (beginners differ for ten_min and fifteen_min), `device` (phone for
fifteen_min's abandonment and ten_min's beginners; tablet for adaptive), `streak_days >= 7` (only
advanced learners, fifteen_min) and `tenure_days < 30` (only cancellations under fifteen_min).

Asserted at 200,000 learners: the root split is beginners against the rest, a split separates
phones from the other devices in at least 9 of 10 seeds, and the decoys `region` and `noise_*` are
used in at most 1 of 10. Asserted at 800,000 learners (two seeds): a `streak_days` threshold in
[5, 9]. Not asserted anywhere: the tenure boundary. Why, with the power of each split computed from
the simulator's true effects and the outcome variances of 2,000,000 simulated learners, on the
structure half (N_tr = 100,000 of 200,000; 25,000 per arm) -- z is the true difference of the
fifteen_min effect between the two children over its standard error:

* `tenure_days < 30`, cancelled, at the root: difference 0.0050, se 0.0047, z = 1.06. No tree can
  find it at this size (z = 4 needs about 14 times the learners, ~2.9 million).
* `streak_days >= 7` inside the advanced learners: difference 0.45 days, se 0.065, z = 6.9; it
  wins clearly once a node holds only advanced learners (neighbours: z = 6.0 at 6, 6.2 at 8).
* But reaching that node needs a split with little power: advanced against intermediate, z = 3.7
  (or streak >= 7 on intermediate and advanced together, z = 3.7, diluted by the intermediates).
  The honest criterion (Athey and Imbens 2016) charges every split the estimation variance it adds
  to all 12 (arm, metric) effects: in units of 8 / N_tr (one pair's leaf variance with 25 % arms
  and root standardization) a split gains sum over pairs of z^2 and pays one unit per pair, so a
  z^2 = 13.7 signal in one pair against a penalty of 12 has an expected net gain near 0, and the
  11 pairs without heterogeneity add chi-square noise (sd sqrt(2 * 11) = 4.7 units) to it.
  Measured at 200,000 learners, default settings: a streak threshold in [5, 9] in 3 of 10 seeds
  (thresholds seen 3..17). Other settings, measured the same way (streak in [5, 9] / device used /
  decoys, of 10): success-metric weight 2: 5 / 8 / 1; weight 3: 4 / 5 / 1; weight 6: 4 / 1 / 0;
  max_bins 16 or 32: 3 / 10 / 1 or 0; min_units_per_arm 250 or 500: 4 / 10 / 1; cv_folds 10:
  5 / 9 / 3. None reaches 9 of 10 without losing `device` or adding decoys: the defaults stay.
  At 800,000 learners the advanced split has z = 7.4 (z^2 = 55 >> 12) and the streak threshold
  landed in [5, 9] in 5 of 5 seeds measured (seeds 0-4).
"""

from __future__ import annotations

import pytest
from scenario_fits import scenario_fits

from apportion.demo.scenario import simulate
from apportion.stats.models import fit_cohort_model

DECOYS = {"region", "noise_1", "noise_2", "noise_3"}


def _thresholds(partition, key: str) -> list[float]:
    p = partition
    return [
        float(p.threshold[i])
        for i in range(p.n_nodes)
        if p.feature[i] >= 0 and p.features[int(p.feature[i])].key == key
    ]


@pytest.mark.slow  # ten 200,000-learner fits, shared with tests/optimize/test_scenario.py
def test_tree_finds_the_scenario_boundaries_and_ignores_decoys(tmp_path_factory):
    phone_split = decoy_fits = 0
    for seed, fit in scenario_fits(tmp_path_factory).items():
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


@pytest.mark.slow  # two 800,000-learner simulations and fits, ~15 s on two cores
@pytest.mark.parametrize("seed", [0, 1])
def test_streak_boundary_is_found_near_seven_with_enough_learners(seed):
    # At 800,000 learners the advanced-vs-intermediate split has z = 7.4 (module docstring), so
    # the tree reaches the advanced learners and splits streak_days where the effect changes.
    # [5, 9]: the thresholds within 2 days of 7 keep z >= 5.2 of the true 6.9 at 200,000 (6.0 at 6,
    # 6.2 at 8, 5.6 at 9), so the arg max lands there; seeds 0-4 all did (measured), seeds 0 and 1
    # are simply the first two.
    table = simulate(800_000, seed=seed)
    fit = fit_cohort_model(table, "causal_tree", {"seed": seed}, success_metric="active_days")
    streak = _thresholds(fit.partition, "streak_days")
    assert any(5 <= t <= 9 for t in streak), (seed, streak, fit.diagnostics["splits"])
    assert not DECOYS & set(fit.diagnostics["features_used"]), fit.diagnostics["features_used"]
    assert {"level", "device"} <= set(fit.diagnostics["features_used"])
