"""A draft's cross-fitted held-out evaluation runs as its own job, so a draft
answers without refitting its model once per fold; the job writes the figures into the version's
report, audits it, and a failure says so instead of staying pending. The estimator itself is
checked in tests/optimize/test_crossfit.py."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from support import draft_plan, make_keys, make_settings, scenario_model, wait_job

from apportion.app import create_app
from apportion.client.render import to_text, version_view
from apportion.demo.scenario import GUARDRAILS, SUCCESS
from apportion.schemas.common import dump
from apportion.schemas.plans import PlanVersionView
from apportion.usecases.plans import report_jobs


@pytest.fixture
def ho_client(db_url: str) -> Iterator[TestClient]:
    app = create_app(make_settings(db_url, held_out_folds=2))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


def test_draft_queues_the_evaluation_and_the_job_attaches_it(ho_client: TestClient) -> None:
    keys = make_keys(ho_client.app.state.services)  # type: ignore[attr-defined]
    model_id = scenario_model(ho_client, keys, n=6000)
    v = draft_plan(ho_client, keys, model_id)
    held = v["report"]["held_out"]
    assert held["folds"] == 2 and held["job"].startswith("/v1/jobs/")
    assert held["status"] in ("pending", "complete")  # the worker thread may already have run it
    assert wait_job(ho_client, keys, held["job"])["status"] == "done"

    got = ho_client.get("/v1/plans/lesson-length/versions/1", headers=keys.h(keys.reader)).json()
    held = got["report"]["held_out"]
    assert held["status"] == "complete" and held["folds"] == 2
    # every key of the completed part is declared (schemas/plans.py HeldOutPart)
    assert dump(PlanVersionView.model_validate(got, extra="forbid")) == got
    assert set(held["metrics"]) == {SUCCESS, *(g["metric"] for g in GUARDRAILS)}
    assert all(m["se"] > 0 for m in held["metrics"].values())
    assert held["verdict"] in ("verified", "unverified", "refused")
    # read beside the projection: what it measures, and the warning exactly when it falls short
    reading = held["reading"]
    assert (
        reading["success_metric"] == SUCCESS and "1/2 of the readout's rows" in reading["measures"]
    )
    (projected,) = [m["interval"] for m in got["report"]["metrics"] if m["metric"] == SUCCESS]
    assert reading["projected_interval"] == projected
    assert reading["short_of_projection"] is (reading["held_out_interval"][1] < projected[0])
    assert (reading["warning"] is not None) is reading["short_of_projection"]
    # the calibrated report the draft made is untouched by the job
    assert got["report"]["status"] == "complete" and got["report"]["calibration"]

    audit = ho_client.get(
        "/v1/audit", params={"entity": "plan_version"}, headers=keys.h(keys.reader)
    ).json()["entries"]
    assert [e["action"] for e in audit] == ["plan.draft", "plan.held_out"]

    page = ho_client.get(
        "/ui/fragments/plans/lesson-length/versions/1", headers=keys.h(keys.reader)
    ).text
    assert 'id="held-out"' in page and "2 folds" in page and "Verdict:" in page
    assert 'id="held-out-measures"' in page
    assert ('id="held-out-warning"' in page) is reading["short_of_projection"]
    text = to_text(version_view(got))
    assert "held-out evaluation (2 folds" in text and SUCCESS in text
    assert "scores the procedure, not this version" in text


def test_a_failed_evaluation_ends_failed_with_its_error(
    ho_client: TestClient, monkeypatch: pytest.MonkeyPatch
) -> None:
    def broken(*args: object, **kwargs: object) -> dict:
        raise RuntimeError("fold solver exploded")

    monkeypatch.setattr(report_jobs, "_evaluate", broken)
    keys = make_keys(ho_client.app.state.services)  # type: ignore[attr-defined]
    model_id = scenario_model(ho_client, keys, n=3000)
    v = draft_plan(ho_client, keys, model_id)
    job = wait_job(ho_client, keys, v["report"]["held_out"]["job"])
    assert job["status"] == "failed"
    got = ho_client.get("/v1/plans/lesson-length/versions/1", headers=keys.h(keys.reader)).json()
    held = got["report"]["held_out"]
    assert held["status"] == "failed" and "fold solver exploded" in held["error"]
    assert dump(PlanVersionView.model_validate(got, extra="forbid")) == got
    page = ho_client.get(
        "/ui/fragments/plans/lesson-length/versions/1", headers=keys.h(keys.reader)
    ).text
    assert "Not available: RuntimeError: fold solver exploded" in page


def test_off_by_setting_says_so(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    model_id = scenario_model(client, keys, n=3000)
    v = draft_plan(client, keys, model_id)
    assert v["report"]["held_out"]["status"] == "off"
    assert "held-out evaluation: off" in to_text(version_view(v))


def test_approval_waits_for_the_evaluation_and_a_rejected_draft_skips_it(db_url: str) -> None:
    """Found by running the demo: a version approved before its evaluation finished could never
    take the figures (approved versions are immutable) and the job failed in a loop. Approval now
    waits for the evaluation (409 while it runs); a rejected draft's job ends without writing."""
    from apportion.usecases import jobs

    app = create_app(make_settings(db_url, held_out_folds=2, run_jobs_in_process=False))
    with TestClient(app, raise_server_exceptions=False) as c:
        services = app.state.services
        keys = make_keys(services)
        model_id = _fitted_without_worker(c, keys, services)
        v1 = draft_plan(c, keys, model_id)
        approve = c.post(
            "/v1/plans/lesson-length/versions/1/approve",
            json={"reason": "looks fine"},
            headers=keys.h(keys.approver),
        )
        assert (
            approve.status_code == 409
            and "held-out evaluation is still running" in (approve.json()["detail"])
        )
        assert jobs.run_one(services, "test-worker")
        assert wait_job(c, keys, v1["report"]["held_out"]["job"])["status"] == "done"
        approve = c.post(
            "/v1/plans/lesson-length/versions/1/approve",
            json={"reason": "looks fine"},
            headers=keys.h(keys.approver),
        )
        assert approve.status_code == 200, approve.text

        v2 = draft_plan(c, keys, model_id)
        reject = c.post(
            "/v1/plans/lesson-length/versions/2/reject",
            json={"reason": "not now"},
            headers=keys.h(keys.approver),
        )
        assert reject.status_code == 200, reject.text
        assert jobs.run_one(services, "test-worker")
        assert wait_job(c, keys, v2["report"]["held_out"]["job"])["status"] == "done"
        got = c.get("/v1/plans/lesson-length/versions/2", headers=keys.h(keys.reader)).json()
        assert got["status"] == "rejected" and got["report"]["held_out"]["status"] == "not run"


def _fitted_without_worker(client: TestClient, keys, services) -> int:  # type: ignore[no-untyped-def]
    """The scenario's causal tree on 4,000 learners, its fit job run by hand (no worker thread)."""
    from apportion.demo.scenario import experiment_declaration, simulate, to_csv_bytes
    from apportion.usecases import jobs

    decl = experiment_declaration()
    assert client.post("/v1/experiments", json=decl, headers=keys.h(keys.analyst)).is_success
    up = client.post(
        f"/v1/experiments/{decl['key']}/readouts",
        content=to_csv_bytes(simulate(4000, seed=1)),
        headers={**keys.h(keys.analyst), "content-type": "text/csv"},
    )
    assert up.is_success, up.text
    fit = client.post(
        f"/v1/experiments/{decl['key']}/models",
        json={"readout_version": up.json()["version"], "method": "causal_tree",
              "params": {"max_depth": 2, "min_units_per_arm": 100}},
        headers=keys.h(keys.analyst),
    )  # fmt: skip
    assert fit.status_code == 202, fit.text
    assert jobs.run_one(services, "test-worker")
    assert wait_job(client, keys, fit.json()["job"])["status"] == "done"
    return int(fit.json()["model_id"])
