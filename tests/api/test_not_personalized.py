"""A feature declared `personalize: false` through the API: the declaration says why, the
experiment shows it, fits leave it out (naming it is a 422), the compiled plan never refers to
it, and a lookup that still sends it gets the answer it gets without it."""

from __future__ import annotations

import copy

from fastapi.testclient import TestClient
from support import EXPERIMENT, draft_plan, launch, rows_csv, wait_job

CSV = {"content-type": "text/csv"}
REASON = "pricing tier; legal review pending"


def _flagged(decl: dict, key: str, **flag: object) -> dict:
    out = copy.deepcopy(decl)
    for f in out["features"]:
        if f["key"] == key:
            f.update(flag)
    return out


def test_the_declaration_needs_a_reason_and_a_reason_needs_the_flag(
    client: TestClient, keys
) -> None:  # type: ignore[no-untyped-def]
    h = keys.h(keys.analyst)
    r = client.post("/v1/experiments", json=_flagged(EXPERIMENT, "plan", personalize=False),
                    headers=h)  # fmt: skip
    assert r.status_code == 422 and r.headers["content-type"] == "application/problem+json"
    assert any(e["field"] == "features.plan.reason" for e in r.json()["errors"])
    r = client.post("/v1/experiments", json=_flagged(EXPERIMENT, "plan", reason="why"), headers=h)
    assert r.status_code == 422
    assert "personalize: false only" in r.json()["errors"][0]["problem"]
    assert client.get("/v1/experiments/checkout-copy", headers=h).status_code == 404  # nothing kept


def test_fits_leave_the_feature_out_and_refuse_it_by_name(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    h = keys.h(keys.analyst)
    decl = _flagged(EXPERIMENT, "plan", personalize=False, reason=REASON)
    assert client.post("/v1/experiments", json=decl, headers=h).status_code == 201
    got = client.get("/v1/experiments/checkout-copy", headers=keys.h(keys.reader)).json()
    feats = {f["key"]: f for f in got["features"]}
    assert feats["plan"]["personalize"] is False and feats["plan"]["reason"] == REASON
    assert feats["age_days"]["personalize"] is True and feats["age_days"].get("reason") is None
    r = client.post("/v1/experiments/checkout-copy/readouts", content=rows_csv(2000),
                    headers={**h, **CSV})  # fmt: skip
    version = r.json()["version"]
    for method, params in [("segments", {"features": ["plan"]}),
                           ("causal_tree", {"features": ["age_days", "plan"]})]:  # fmt: skip
        r = client.post("/v1/experiments/checkout-copy/models",
                        json={"readout_version": version, "method": method, "params": params},
                        headers=h)  # fmt: skip
        assert r.status_code == 422, r.text
        assert "not for personalization" in r.json()["detail"]
    r = client.post("/v1/experiments/checkout-copy/models",
                    json={"readout_version": version, "method": "causal_tree",
                          "params": {"max_depth": 2, "min_units_per_arm": 30, "cv_folds": 0}},
                    headers=h)  # fmt: skip
    assert r.status_code == 202, r.text
    assert wait_job(client, keys, r.json()["job"])["status"] == "done"
    model = client.get(r.json()["model"], headers=h).json()
    assert model["resolved_params"]["features"] == ["age_days"]
    assert [f["key"] for f in model["partition"]["features"]] == ["age_days"]


def test_the_compiled_plan_never_refers_to_the_feature(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.scenario import experiment_declaration, simulate, to_csv_bytes

    h = keys.h(keys.analyst)
    decl = _flagged(experiment_declaration(), "age_band", personalize=False, reason=REASON)
    assert client.post("/v1/experiments", json=decl, headers=h).status_code == 201
    r = client.post(f"/v1/experiments/{decl['key']}/readouts",
                    content=to_csv_bytes(simulate(6000, seed=4)), headers={**h, **CSV})  # fmt: skip
    assert r.status_code == 201, r.text
    body = {"readout_version": r.json()["version"], "method": "causal_tree",
            "params": {"max_depth": 3, "min_units_per_arm": 60, "cv_folds": 0}}  # fmt: skip
    r = client.post(f"/v1/experiments/{decl['key']}/models", json=body, headers=h)
    assert wait_job(client, keys, r.json()["job"])["status"] == "done"
    version = draft_plan(client, keys, r.json()["model_id"])["version"]
    launch(client, keys, version)
    doc = client.get("/v1/plans/lesson-length/compiled", headers=keys.h(keys.reader)).json()
    keys_in_plan = [f["key"] for f in doc["features"]]
    assert "age_band" not in keys_in_plan and keys_in_plan  # the other features are there
    member = {"tenure_days": 40, "level": "beginner", "device": "phone", "streak_days": 3,
              "daily_goal_min": 10, "region": "north", "noise_1": 0.1, "noise_2": 0.2,
              "noise_3": 0.3}  # fmt: skip
    for i in range(20):
        plain = client.post("/v1/plans/lesson-length/assign",
                            json={"member_id": f"m{i}", "features": member},
                            headers=keys.h(keys.reader))  # fmt: skip
        sent = client.post("/v1/plans/lesson-length/assign",
                           json={"member_id": f"m{i}", "features": {**member, "age_band": "55+"}},
                           headers=keys.h(keys.reader))  # fmt: skip
        assert plain.status_code == sent.status_code == 200
        assert plain.json() == sent.json()
