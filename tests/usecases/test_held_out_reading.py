"""The held-out figure beside the projection (usecases/plans/views.held_out_reading): the one
sentence on what it measures, and the warning when its success-lift interval lies entirely on
the worse side of the projected one, which appears exactly when it should."""

from __future__ import annotations

import pytest
from scipy.stats import norm

from apportion.usecases.plans.views import Z95, held_out_reading


def report(lift: float, se: float, interval: list[float] | None, **kw: object) -> dict:  # type: ignore[type-arg]
    metrics = [] if interval is None else [{"metric": "score", "role": "success",
                                            "interval": interval}]  # fmt: skip
    return {
        "status": "complete",
        "baseline": "control",
        "metrics": metrics,
        "held_out": {
            "status": "complete",
            "folds": 5,
            "verdict": "verified",
            "metrics": {"score": {"lift": lift, "se": se}},
        },  # fmt: skip
        **kw,
    }


def test_z95_is_the_normal_quantile() -> None:
    assert Z95 == pytest.approx(norm.ppf(0.975), abs=1e-12)  # scipy, the reference


def test_a_held_out_interval_below_the_projection_warns() -> None:
    # a small readout: projected +0.25 [0.17, 0.33], held-out +0.015 +/- 0.012
    r = held_out_reading(report(0.015, 0.012, [0.17, 0.33]), "score")
    assert r is not None and r["short_of_projection"] is True and r["comparable"] is True
    assert r["held_out_interval"] == pytest.approx([0.015 - Z95 * 0.012, 0.015 + Z95 * 0.012])
    assert "lies entirely below the projected interval" in r["warning"]
    assert "4/5 of the readout's rows" in r["measures"]


@pytest.mark.parametrize(
    "lift,se,interval,expected",
    [
        (0.2, 0.04, [0.127, 0.249], False),  # inside
        (0.10, 0.02, [0.17, 0.33], True),  # upper end 0.139 < 0.17: short
        (0.13, 0.02, [0.17, 0.33], True),  # upper end 0.1692 < 0.17: short, just
        (0.131, 0.02, [0.17, 0.33], False),  # upper end 0.1702 reaches 0.17: they overlap
        (0.5, 0.02, [0.17, 0.33], False),  # above the projection: better than projected
    ],
)
def test_the_warning_appears_exactly_when_the_intervals_do_not_meet(
    lift: float, se: float, interval: list[float], expected: bool
) -> None:
    r = held_out_reading(report(lift, se, interval), "score")
    assert r is not None
    assert r["short_of_projection"] is expected
    assert (r["warning"] is not None) is expected


def test_a_lower_is_better_success_metric_warns_when_the_held_out_lies_above() -> None:
    below = held_out_reading(report(-0.5, 0.02, [-0.33, -0.17]), "score", "lower")
    assert below is not None and below["short_of_projection"] is False  # better than projected
    above = held_out_reading(report(-0.015, 0.012, [-0.33, -0.17]), "score", "lower")
    assert above is not None and above["short_of_projection"] is True
    assert "lies entirely above the projected interval" in above["warning"]


def test_no_warning_when_the_projection_has_another_baseline_or_is_pending() -> None:
    other = held_out_reading(report(0.015, 0.012, [0.17, 0.33], baseline="best_arm"), "score")
    assert other is not None and other["comparable"] is False
    assert other["short_of_projection"] is False and other["warning"] is None
    assert "against 'best_arm', so the two are not on one scale" in other["measures"]
    pending = held_out_reading(report(0.015, 0.012, None, status="pending"), "score")
    assert pending is not None and pending["projected_interval"] is None
    assert pending["warning"] is None and pending["measures"]


def test_nothing_to_read_until_the_evaluation_is_complete() -> None:
    r = report(0.015, 0.012, [0.17, 0.33])
    r["held_out"] = {"status": "pending", "folds": 5, "job": "/v1/jobs/3"}
    assert held_out_reading(r, "score") is None
    assert held_out_reading(report(0.015, 0.012, [0.17, 0.33]), None) is None
