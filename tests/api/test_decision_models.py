"""A decision-focused model through the whole path: fit as a job, draft a plan on it, look members
up: everything downstream of the partition works unchanged."""

from __future__ import annotations

from fastapi.testclient import TestClient
from support import draft_plan, wait_job


def test_policy_tree_model_feeds_plans_and_lookups(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.scenario import GUARDRAILS, experiment_declaration, simulate, to_csv_bytes

    decl = experiment_declaration()
    assert (
        client.post("/v1/experiments", json=decl, headers=keys.h(keys.analyst)).status_code == 201
    )
    r = client.post(
        f"/v1/experiments/{decl['key']}/readouts",
        content=to_csv_bytes(simulate(20_000, seed=2)),
        headers={**keys.h(keys.analyst), "content-type": "text/csv"},
    )
    assert r.status_code == 201, r.text
    guard = [{k: g[k] for k in ("metric", "threshold", "unit")} for g in GUARDRAILS]
    body = {
        "readout_version": r.json()["version"],
        "method": "policy_tree",
        "params": {"guardrails": guard, "max_depth": 2, "min_units_per_arm": 100},
        "success_metric": "active_days",
    }
    r = client.post(
        f"/v1/experiments/{decl['key']}/models", json=body, headers=keys.h(keys.analyst)
    )
    assert r.status_code == 202, r.text
    assert wait_job(client, keys, r.json()["job"])["status"] == "done"
    model = client.get(r.json()["model"], headers=keys.h(keys.reader)).json()
    diag = model["diagnostics"]
    assert set(diag["guardrail_prices"]) == {g["metric"] for g in guard}
    assert all(v >= 0 for v in diag["guardrail_prices"].values())
    assert diag["outcome_model"]["kind"] == "arm_means" and diag["rounds"]
    version = draft_plan(client, keys, model["id"])
    assert version["allocation"]["matrix"] and len(version["allocation"]["cohorts"]) == len(
        model["cohorts"]
    )
    report = version["report"]
    assert report["status"] == "complete"
    # item 4: every guardrail's price and the lift at five thresholds around the chosen one
    prices = {row["metric"]: row for row in report["guardrail_prices"]}
    assert set(prices) == {g["metric"] for g in guard}
    for g in guard:
        row = prices[g["metric"]]
        assert [p["offset"] for p in row["points"]] == [-2, -1, 0, 1, 2]
        assert row["points"][2]["threshold"] == g["threshold"]
        assert row["points"][2]["lift"] == version["report"]["solution"]["objective"]
        assert row["step"] > 0


def test_bad_guardrail_parameter_is_a_422_naming_it(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.scenario import experiment_declaration, simulate, to_csv_bytes

    decl = experiment_declaration()
    client.post("/v1/experiments", json=decl, headers=keys.h(keys.analyst))
    r = client.post(
        f"/v1/experiments/{decl['key']}/readouts",
        content=to_csv_bytes(simulate(2_000, seed=2)),
        headers={**keys.h(keys.analyst), "content-type": "text/csv"},
    )
    body = {
        "readout_version": r.json()["version"],
        "method": "forest",
        "params": {"guardrails": [{"metric": "cancelled", "threshold": -1}]},
    }
    r = client.post(
        f"/v1/experiments/{decl['key']}/models", json=body, headers=keys.h(keys.analyst)
    )
    assert r.status_code == 422
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "guardrails" in r.json()["detail"] and "allowed rise" in r.json()["detail"]
