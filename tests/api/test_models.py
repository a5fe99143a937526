"""Cohort models fitted as jobs through the HTTP API."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from support import EXPERIMENT, rows_csv, wait_job

CSV = {"content-type": "text/csv"}


@pytest.fixture
def readout(client: TestClient, keys) -> int:  # type: ignore[no-untyped-def]
    assert (
        client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst)).status_code
        == 201
    )
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(3000),
        headers={**keys.h(keys.analyst), **CSV},
    )
    return int(r.json()["version"])


@pytest.mark.parametrize(
    "method,params",
    [
        ("global", {}),
        ("segments", {"features": ["plan", "age_days"], "bins": {"age_days": 2}}),
        ("causal_tree", {"max_depth": 2, "min_units_per_arm": 30, "cv_folds": 0}),
        ("intersect", {"max_depth": 1, "min_units_per_arm": 30}),
        (
            "two_model",
            {
                "max_depth": 2,
                "min_units_per_arm": 30,
                "max_iter": 20,
                "folds": 2,
                "min_samples_leaf": 50,
            },
        ),  # fmt: skip
        ("forest", {"max_depth": 2, "min_units_per_arm": 30, "n_trees": 4}),
        (
            "policy_tree",
            {
                "max_depth": 2,
                "min_units_per_arm": 30,
                "guardrails": [{"metric": "refund", "threshold": 0.01}],
            },
        ),  # fmt: skip
    ],
    ids=["global", "segments", "causal_tree", "intersect", "two_model", "forest", "policy_tree"],
)
def test_every_method_fits_as_a_job(
    client: TestClient, keys, readout: int, method: str, params: dict
) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/experiments/checkout-copy/models",
        json={"readout_version": readout, "method": method, "params": params},
        headers=keys.h(keys.analyst),
    )
    assert r.status_code == 202
    started = r.json()
    assert started["job"] == f"/v1/jobs/{started['job_id']}" and started["status"] == "queued"
    job = wait_job(client, keys, started["job"])
    assert job["status"] == "done" and job["progress"] == 1.0 and job["error"] is None
    model = client.get(started["model"], headers=keys.h(keys.reader)).json()
    assert model["status"] == "done" and model["method"] == method
    shares = [c["share"] for c in model["cohorts"]]
    assert abs(sum(shares) - 1) < 1e-9
    assert all(isinstance(c["rule"], str) and c["rule"] for c in model["cohorts"])
    assert set(model["cohorts"][0]["estimates"]) == {"spend", "refund", "abandon_rate"}
    assert "seconds" in model["diagnostics"] or "job_seconds" in model["diagnostics"]
    if method == "segments":
        assert any("plan in {free}" in c["rule"] for c in model["cohorts"])
    # the fit is stored with its resolved parameters and seed: repeatable bit for bit
    again = client.post(
        "/v1/experiments/checkout-copy/models",
        json={"readout_version": readout, "method": method, "params": model["resolved_params"]},
        headers=keys.h(keys.analyst),
    ).json()
    wait_job(client, keys, again["job"])
    twin = client.get(again["model"], headers=keys.h(keys.reader)).json()
    assert (
        twin["partition"] == model["partition"]
        and twin["cohorts"] == model["cohorts"]
        and twin["version"] == model["version"] + 1
    )


def test_bad_parameter_is_422_naming_it(client: TestClient, keys, readout: int) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/experiments/checkout-copy/models",
        json={"readout_version": readout, "method": "causal_tree", "params": {"max_depth": 0}},
        headers=keys.h(keys.analyst),
    )
    assert r.status_code == 422 and "max_depth" in r.json()["detail"]


def test_failed_sample_ratio_check_needs_an_audited_override(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    skewed = (
        ["control"] * 1400 + ["bold"] * 300 + ["calm"] * 300
    )  # designed 50/25/25; chi-square p far below 0.001
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(2000, arms=skewed),
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.json()["sample_ratio"]["flagged"] is True
    body = {"readout_version": 1, "method": "global"}
    refused = client.post(
        "/v1/experiments/checkout-copy/models", json=body, headers=keys.h(keys.analyst)
    )
    assert refused.status_code == 422 and "sample-ratio" in refused.json()["detail"]
    ok = client.post(
        "/v1/experiments/checkout-copy/models",
        json={**body, "override_sample_ratio": {"reason": "known logging gap in bold"}},
        headers=keys.h(keys.analyst),
    )
    assert ok.status_code == 202
    entry = client.get(
        "/v1/audit", params={"entity": "cohort_model"}, headers=keys.h(keys.reader)
    ).json()["entries"][-1]
    assert (
        entry["reason"] == "known logging gap in bold"
        and entry["payload"]["sample_ratio_override"] is True
    )


def test_a_failing_fit_leaves_a_readable_failed_job(
    client: TestClient, keys, readout: int, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    import apportion.usecases.models as models_uc

    def boom(*_a, **_k):  # type: ignore[no-untyped-def]
        raise MemoryError("readout too large for this worker")

    monkeypatch.setattr(models_uc, "fit_cohort_model", boom)
    r = client.post(
        "/v1/experiments/checkout-copy/models",
        json={"readout_version": readout, "method": "global"},
        headers=keys.h(keys.analyst),
    ).json()
    job = wait_job(client, keys, r["job"])
    assert (
        job["status"] == "failed"
        and job["error"] == "MemoryError: readout too large for this worker"
    )
    model = client.get(r["model"], headers=keys.h(keys.reader)).json()
    assert model["status"] == "failed" and "MemoryError" in model["error"]


def test_unknown_model_and_job_are_404(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    assert client.get("/v1/models/77", headers=keys.h(keys.reader)).status_code == 404
    unknown = "00000000-0000-4000-8000-000000000000"
    assert (
        client.get(f"/v1/jobs/{unknown}", headers=keys.h(keys.reader)).json()["detail"]
        == f"no job with id '{unknown}'"
    )
    # a segment that is not a job id at all is refused by its declared pattern
    r = client.get("/v1/jobs/nope", headers=keys.h(keys.reader))
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "path.job_id"
