"""Cross-fitted held-out evaluation and the method comparison."""

from __future__ import annotations

import numpy as np
import pytest

from apportion.demo import designs as d
from apportion.errors import InvalidInput
from apportion.optimize.crossfit import (
    Candidate,
    _scores,
    evaluate_candidates,
    fold_ids,
    model_params_for,
    parse_candidates,
    registry,
    run_pipeline,
)
from apportion.optimize.problem import Guardrail
from apportion.stats import models as cohort_models
from apportion.stats.models import fit_cohort_model

G = tuple(Guardrail(**g) for g in d.guardrails(0.9))


def test_registry_is_every_model_method_times_every_optimizer():
    names = {c.name for c in registry()}
    for m in cohort_models.METHODS:
        if m == "segments":  # needs the caller's features
            continue
        for o in ("deterministic", "chance", "stochastic"):
            assert f"{m}/{o}" in names
    assert parse_candidates(["global/chance"]) == [Candidate("global", "chance")]


def test_folds_are_balanced_within_every_arm():
    arm = np.repeat(np.arange(4), [103, 250, 97, 50])
    f = fold_ids(arm, 5, 0)
    for a in range(4):
        counts = np.bincount(f[arm == a], minlength=5)
        assert counts.max() - counts.min() <= 1


def test_dr_score_with_a_zero_outcome_model_is_horvitz_thompson():
    # AIPW with mu = 0 reduces to the Horvitz-Thompson (1952) weighting: psi_i = (x_{W_i} - b_{W_i})
    # Y_i / e_{W_i}; hand-computed here for the plan "arm 2 for everyone" against control.
    table = d.simulate(2000, "aligned", 1.0, 0)
    fit = fit_cohort_model(table, "global", {"seed": 0}, success_metric="y0")
    zero = type(fit.moments)(
        fit.moments.components, fit.moments.n, 0 * fit.moments.mean, fit.moments.cov
    )
    fit0 = type(fit)(**{**fit.__dict__, "moments": zero})
    x = np.array([[0.0, 0.0, 1.0, 0.0]])
    rows = np.arange(table.n)
    psi = _scores(table, fit0, x, rows)
    y = table.columns["y0"]
    want = ((table.arm == 2).astype(float) - (table.arm == 0)) * y / 0.25
    np.testing.assert_allclose(psi[:, 0], want, rtol=1e-12)


def test_held_out_lift_covers_the_truth_of_the_fold_plans():
    # truth: the aligned design's effect functions (apportion.demo.designs). "aligned" with the
    # global model: every fold plan is arm 1 for everyone (true success lift 0.17); the held-out
    # estimate must be within 3 of its standard errors of that (normal 99.7 % band).
    table = d.simulate(20_000, "aligned", 1.0, 4)
    out = evaluate_candidates(table, [Candidate("global", "deterministic")], success="y0",
                              guardrails=G, folds=5, seed=0)  # fmt: skip
    row = out["candidates"][0]
    truth = d.truth("aligned", 100_000)
    m = row["metrics"]["y0"]
    assert abs(m["lift"] - truth.single[1, 0]) <= 3 * m["se"], (m, truth.single[1])
    assert m["se"] >= m["se_within"] > 0
    assert out["recommended"] == "global/deterministic"
    assert row["status"] in ("verified", "unverified")


def test_decision_focused_candidates_price_the_plans_guardrails():
    # A policy tree splits where the constrained decision changes, which needs the guardrails'
    # prices; the comparison and bench/decisions.py used to fit it without them, so it split on
    # the success metric alone. Other methods take no guardrails; a caller's own are kept.
    p = model_params_for(Candidate("policy_tree", "chance"), G, {"seed": 3})
    assert p["seed"] == 3
    assert [(g["metric"], g["threshold"]) for g in p["guardrails"]] == [("y1", 0.03), ("y2", 0.01)]
    assert "guardrails" not in model_params_for(Candidate("causal_tree", "chance"), G, {})
    own = [{"metric": "y1", "threshold": 0.05}]
    assert (
        model_params_for(Candidate("forest", "chance"), G, {"guardrails": own})["guardrails"] == own
    )
    table = d.simulate(20_000, "opposed", 0.5, 1)
    fit, x, _ = run_pipeline(table, Candidate("policy_tree", "chance"), success="y0",
                             guardrails=G, seed=0, draws=10)  # fmt: skip
    assert [g["metric"] for g in fit.params["guardrails"]] == ["y1", "y2"]
    assert x.shape == (fit.partition.n_cohorts, 4)


def test_a_candidate_whose_fit_fails_leaves_the_comparison_and_the_rest_are_ranked(monkeypatch):
    # One model refusing a fold (a domain error, e.g. too few units for its learners) used to fail
    # the whole comparison job; it now leaves with its reason and the others are still compared.
    real = cohort_models.fit_cohort_model

    def refuse_intersect(table, method, params, **kw):
        if method == "intersect":
            raise InvalidInput("too few units in a cell for this test")
        return real(table, method, params, **kw)

    monkeypatch.setattr(cohort_models, "fit_cohort_model", refuse_intersect)
    table = d.simulate(8_000, "aligned", 1.0, 4)
    cands = parse_candidates(
        ["global/deterministic", "intersect/deterministic", "intersect/chance"]
    )
    seen: list[float] = []
    out = evaluate_candidates(table, cands, success="y0", guardrails=G, folds=3, seed=0,
                              progress=seen.append)  # fmt: skip
    rows = {r["candidate"]: r for r in out["candidates"]}
    assert out["recommended"] == "global/deterministic"
    assert rows["global/deterministic"]["rank"] == 1 and rows["global/deterministic"]["metrics"]
    for name in ("intersect/deterministic", "intersect/chance"):
        assert rows[name]["status"] == "failed" and rows[name]["rank"] is None
        assert rows[name]["error"].startswith("fold 1: the intersect fit failed: too few units")
    assert [r["candidate"] for r in out["candidates"]][-2:] == [
        "intersect/deterministic", "intersect/chance"]  # fmt: skip
    assert seen == sorted(seen) and seen[-1] == 1.0  # progress still runs to the end

    with pytest.raises(InvalidInput, match="no candidate could be evaluated: intersect/chance"):
        evaluate_candidates(table, [Candidate("intersect", "chance")], success="y0",
                            guardrails=G, folds=3, seed=0)  # fmt: skip


def test_folds_in_two_worker_processes_give_the_sequential_table():
    # The folds are independent (each fits on the others and scores itself), so running them in
    # two spawned processes must reproduce the sequential run exactly: same ranking, same lifts
    # and standard errors bit for bit (the same code on the same inputs and per-fold seeds);
    # only the timings differ. Progress still rises monotonically to 1.
    table = d.simulate(6_000, "opposed", 0.5, 2)
    cands = parse_candidates(
        ["global/deterministic", "causal_tree/chance", "intersect/deterministic"]
    )
    runs = {}
    for workers in (1, 2):
        seen: list[float] = []
        out = evaluate_candidates(table, cands, success="y0", guardrails=G, folds=3, seed=1,
                                  draws=5, progress=seen.append, workers=workers)  # fmt: skip
        assert seen == sorted(seen) and seen[-1] == 1.0
        assert len(seen) == 3 * (3 + 3)  # one step per fold and model fit or candidate plan
        runs[workers] = out

    def table_of(out: dict) -> list:
        return [(r["candidate"], r["rank"], r["status"], r["folds_without_plan"],
                 {k: (m["lift"], m["se"], m["folds"]) for k, m in r["metrics"].items()})
                for r in out["candidates"]]  # fmt: skip

    assert table_of(runs[2]) == table_of(runs[1])
    assert runs[2]["recommended"] == runs[1]["recommended"]
    assert runs[2]["reason"] == runs[1]["reason"]


def test_an_abandoned_comparison_stops_its_worker_processes():
    # The job runner abandons a comparison by raising from its progress callback (JobLost when
    # the job was reclaimed): that error must reach the caller, and the worker processes must
    # stop at their next step instead of computing the remaining folds.
    import multiprocessing as mp
    import time

    class Abandoned(Exception):
        pass

    def progress(p: float) -> None:
        raise Abandoned

    table = d.simulate(6_000, "opposed", 0.5, 2)
    cands = parse_candidates(["global/deterministic", "causal_tree/chance"])
    with pytest.raises(Abandoned):
        evaluate_candidates(table, cands, success="y0", guardrails=G, folds=4, seed=1, draws=5,
                            progress=progress, workers=2)  # fmt: skip
    deadline = time.monotonic() + 60  # a bound on the wait, not a speed claim
    while mp.active_children() and time.monotonic() < deadline:
        time.sleep(0.1)
    assert mp.active_children() == []


def test_small_readouts_run_their_folds_in_the_jobs_process():
    from apportion.optimize.crossfit import PROCESS_MIN_UNITS, comparison_workers

    assert comparison_workers(0, PROCESS_MIN_UNITS - 1) == 1
    assert comparison_workers(3, PROCESS_MIN_UNITS) == 3
    assert 1 <= comparison_workers(0, PROCESS_MIN_UNITS) <= 2
