"""`make demo` end to end at a smaller size: the personalized plan beats the best single arm that
meets the guardrails on the scenario's true effects, the audit chain is intact, the rollback
happened, and the report ends with the keys and the review page."""

from __future__ import annotations

import io
from pathlib import Path

from apportion.demo import scenario as sc
from apportion.demo.run import run_demo


def test_demo_end_to_end(tmp_path: Path) -> None:
    out = io.StringIO()
    # 100,000 learners: at this size the honest causal tree finds the level/device structure on
    # seeds 1-7 (tried while writing this test); at 20,000-60,000 the chance constraints on the
    # noisier estimates can leave the plan below ten_min, which is honest but not this test.
    r = run_demo(learners=100_000, seed=7, port=0, draws=10, held_out_folds=2, var_dir=tmp_path,
                 out=out)  # 10 draws, 2 folds: speed  # fmt: skip
    text = out.getvalue()
    assert "on 2 folds the model and optimizer never saw" in text  # the draft's held-out job
    assert Path(r["database"]).parent == tmp_path and Path(r["database"]).name.startswith("demo-")

    # the truth, from the scenario's effect functions (oracle: scipy linprog on the true effects)
    assert (
        r["best_single_arm"] == "ten_min"
    )  # the invented scenario's best safe single arm (apportion/demo/scenario.py)
    assert r["plan_success_true"] > r["best_single_success_true"]
    assert r["plan_success_true"] <= r["oracle_success_true"] + 1e-9  # nothing beats the oracle
    assert r["plan_meets_true_guardrails"]
    rows = {x["metric"]: x for x in r["rows"]}
    assert set(rows) == {sc.SUCCESS, *(g["metric"] for g in sc.GUARDRAILS)}
    for g in sc.GUARDRAILS:  # in the guardrail's own unit (per cent of base for relative ones)
        assert rows[g["metric"]]["plan_true"] <= rows[g["metric"]]["allowed"] + 1e-12
        assert rows[g["metric"]]["allowed"] == g["threshold"]
    for x in r["rows"]:  # the impact report gave every projected lift with its interval
        assert x["low"] <= x["projected"] <= x["high"], x

    # lifecycle: v1 live, v2 live, rolled back to v1; the chain verifies through the API
    a1, a2, back = r["activations"]
    assert (a1["to_version"], a2["to_version"], back["to_version"]) == (1, 2, 1)
    assert back["from_version"] == 2 and back["revision"] == 3
    # then the guardrail watch sees the injected harm and rolls v1 back to v2 by itself, once
    (entry,) = r["watch"]["rollback_entries"]
    assert (
        entry["actor_name"] == "guardrail-watch"
        and entry["payload"]["evidence"]["guardrail"] == "abandon_rate"
    )
    assert (entry["payload"]["from_version"], entry["payload"]["to_version"]) == (1, 2) and r[
        "live_version"
    ] == 2
    assert r["plan_audit_actions"] == [
        "plan.activate",
        "plan.activate",
        "plan.rollback",
        "plan.auto_rollback",
        "plan.rollback",
    ]
    assert r["audit"]["intact"] is True and r["audit"]["entries"] >= 12
    assert len(r["assignments"]) == 5 and all(a["arm"] in sc.ARMS for a in r["assignments"])

    # the printed report
    assert "The plan BEATS the best safe single arm" in text
    assert "so the watch rolled back from v1 to v2 by itself" in text
    assert f"Review page: {r['url']}/ui/plans/lesson-length/versions/1" in text
    for name, k in r["keys"].items():
        assert name in text and k["secret"] in text
    assert {k["role"] for k in r["keys"].values()} == {"admin", "analyst", "approver"}
