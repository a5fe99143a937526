"""The pruning penalty grid (CART's cost-complexity grid: 0 and the geometric midpoints of the
breakpoints, Breiman et al. 1984, §3.4 - common practice, recalled from memory)."""

from __future__ import annotations

import math

from apportion.stats.prune import penalty_grid


def test_a_tree_without_splits_has_only_the_zero_penalty() -> None:
    # A depth-limited fit on a small readout can leave the root unsplit; the cross-fitted held-out
    # evaluation then asked for the grid of an empty sequence and got a ValueError (a 500 on draft).
    assert penalty_grid([]) == [0.0]


def test_grid_is_zero_and_geometric_midpoints() -> None:
    grid = penalty_grid([(1.0, 3), (4.0, 1)])
    assert grid == [0.0, math.sqrt(1.0 * 4.0), math.sqrt(4.0 * 8.0)]
