"""The comparison's table order and recommendation rule, and an external
check of the held-out doubly robust figure against statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from apportion.demo import designs as d
from apportion.errors import InvalidInput
from apportion.optimize.crossfit import Candidate, check_folds, evaluate_candidates, recommend
from apportion.optimize.problem import Guardrail

G = (Guardrail("y1", 0.03, "absolute", 0.9),)


def _row(name: str, lift: float, g_lift: float, g_se: float, se: float = 0.01) -> dict:
    model, _, opt = name.partition("/")
    return {"candidate": name, "model": model, "optimizer": opt,
            "metrics": {"y0": {"lift": lift, "se": se}, "y1": {"lift": g_lift, "se": g_se}}}  # fmt: skip


def _psi(n: int, lifts: dict[str, float], noise: dict[str, np.ndarray] | None = None) -> dict:
    """Per-unit scores whose success column has the given mean (columns: y0, y1, y2)."""
    out = {}
    for name, lift in lifts.items():
        p = np.zeros((n, 3))
        e = (noise or {}).get(name, np.zeros(n))
        p[:, 0] = lift + e - e.mean()
        out[name] = p
    return out


@pytest.fixture(scope="module")
def table():  # type: ignore[no-untyped-def]
    return d.simulate(400, "aligned", 1.0, 0)


def test_order_is_guardrails_holding_by_lift_then_refused_and_verified_is_preferred(table) -> None:  # type: ignore[no-untyped-def]
    # a: best lift but its held-out harm (0.05) lies beyond the allowed 0.03 -> refused, last;
    # c: estimate within (0.025) but not with 90 % confidence (0.025 + z 0.01 > 0.03) -> unverified;
    # b: within with room (0.0 + z 0.001) -> verified. Order: c, b, a; recommended: b (verified
    # beats a merely unrefused one).
    rows = [_row("a/x", 0.30, 0.05, 0.001), _row("b/x", 0.20, 0.0, 0.001),
            _row("c/x", 0.25, 0.025, 0.01)]  # fmt: skip
    n = 200
    out = recommend(table, rows, _psi(n, {"a/x": 0.3, "b/x": 0.2, "c/x": 0.25}), np.zeros((n, 3)),
                    success="y0", guardrails=G)  # fmt: skip
    assert [r["candidate"] for r in out["candidates"]] == ["c/x", "b/x", "a/x"]
    assert [r["status"] for r in out["candidates"]] == ["unverified", "verified", "refused"]
    assert [r["rank"] for r in out["candidates"]] == [1, 2, 3]
    assert out["candidates"][2]["failing"] == ["y1"]
    assert out["recommended"] == "b/x" and out["reason"].startswith("b/x: held-out y0 lift 0.2")
    # probability the guardrail holds, normal approximation: Phi((0.03 - 0.025) / 0.01) = 0.6915
    # (standard normal table, Phi(0.5) = 0.6915)
    assert out["candidates"][0]["metrics"]["y1"]["probability_holds"] == pytest.approx(
        0.6915, abs=1e-4
    )


def test_a_near_tie_goes_to_the_earlier_simpler_candidate(table) -> None:  # type: ignore[no-untyped-def]
    # one-standard-error rule on paired differences: "late" beats "early" by 0.01 on average but
    # the paired per-unit differences have sd 1 (se 0.1 over 100 units), so "early" (earlier in
    # the registry order) is taken and the reason says why.
    n = 100
    rng = np.random.default_rng(0)
    noise = rng.normal(0, 1, n)
    rows = [_row("early/x", 0.20, 0.0, 0.001), _row("late/x", 0.21, 0.0, 0.001)]
    psi = _psi(n, {"early/x": 0.20, "late/x": 0.21}, {"late/x": noise})
    out = recommend(table, rows, psi, np.zeros((n, 3)), success="y0", guardrails=G)
    assert out["recommended"] == "early/x"
    assert "within one paired se of the best (late/x)" in out["reason"]
    # a clear winner (paired difference 0.05 with no spread) is kept
    psi = _psi(n, {"early/x": 0.20, "late/x": 0.25})
    rows = [_row("early/x", 0.20, 0.0, 0.001), _row("late/x", 0.25, 0.0, 0.001)]
    out = recommend(table, rows, psi, np.zeros((n, 3)), success="y0", guardrails=G)
    assert out["recommended"] == "late/x"


def test_when_every_candidate_breaks_a_guardrail_none_is_recommended(table) -> None:  # type: ignore[no-untyped-def]
    rows = [_row("a/x", 0.3, 0.05, 0.001), _row("b/x", 0.2, 0.04, 0.001)]
    n = 50
    out = recommend(table, rows, _psi(n, {"a/x": 0.3, "b/x": 0.2}), np.zeros((n, 3)),
                    success="y0", guardrails=G)  # fmt: skip
    assert out["recommended"] is None and "(y1)" in out["reason"]
    assert [r["candidate"] for r in out["candidates"]] == ["a/x", "b/x"]


def test_fold_check_names_the_short_arm() -> None:
    check_folds({"control": 50, "b": 50}, 5)  # 10 per fold: enough
    with pytest.raises(InvalidInput, match="'b' has 49"):
        check_folds({"control": 50, "b": 49}, 5)
    with pytest.raises(InvalidInput, match="folds must be in 2..20"):
        check_folds({"control": 500}, 1)


def test_held_out_dr_lift_equals_the_ols_arm_contrast_of_statsmodels() -> None:
    # External check (statsmodels OLS with HC0 standard errors). With exactly balanced folds (every
    # fold holds the same number of units of every arm, shares equal to the design), the held-out
    # AIPW lift of "arm 1 for everyone" averages, fold by fold, mu_1 - mu_0 + (ybar_1 - mu_1) -
    # (ybar_0 - mu_0) = ybar_1 - ybar_0, so over all folds it is the difference in means: the OLS
    # coefficient of the arm-1 dummy (control the baseline). Its within-fold standard error is
    # sd(psi)/sqrt(n) ~ sqrt(s_1^2/n_1 + s_0^2/n_0), the HC0 (White 1980) standard error of that
    # coefficient, up to the spread of the training-fold means (relative O(1/n_train)): 2 %.
    # sigma 0.5 and 800 units per arm: arm 1's true edge over arm 3 (0.05) is about three standard
    # errors of a training fold's difference, so every fold plan is arm 1 (asserted below)
    full = d.simulate(8000, "aligned", 0.5, 11)
    rows = np.concatenate([np.flatnonzero(full.arm == a)[:800] for a in range(4)])
    table = full.take(np.sort(rows))
    out = evaluate_candidates(table, [Candidate("global", "deterministic")], success="y0",
                              guardrails=(), folds=4, seed=2)  # fmt: skip
    m = out["candidates"][0]["metrics"]["y0"]
    keep = np.isin(table.arm, (0, 1))
    y = table.columns["y0"][keep]
    x = sm.add_constant((table.arm[keep] == 1).astype(float))
    ols = sm.OLS(y, x).fit(cov_type="HC0")
    # the aligned design makes arm 1 best for everyone, so every fold plan is arm 1 (no guardrails)
    assert out["candidates"][0]["folds_without_plan"] == 0
    assert m["lift"] == pytest.approx(float(ols.params[1]), abs=1e-10)
    assert m["se_within"] == pytest.approx(float(ols.bse[1]), rel=0.02)
