"""Method comparisons through the HTTP API: a job with progress, the ordered
held-out table and the recommendation, the 4xx cases with nothing stored, roles, and the draft's
link to the comparison it follows. Small readouts, two or three folds, a short candidate list."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from support import EXPERIMENT, draft_plan, rows_csv, scenario_model, wait_job

from apportion.demo.scenario import EXPERIMENT_KEY, GUARDRAILS, SUCCESS
from apportion.errors import InvalidInput
from apportion.optimize import crossfit

CSV = {"content-type": "text/csv"}
URL = "/v1/experiments/checkout-copy/comparisons"
BODY = {
    "readout_version": 1,
    "success_metric": "spend",
    "guardrails": [{"metric": "refund", "threshold": 0.02}],
    "candidates": ["global/chance", "causal_tree/deterministic"],
    "params": {"causal_tree": {"max_depth": 2, "min_units_per_arm": 40, "cv_folds": 0}},
    "folds": 2,
    "seed": 3,
}


@pytest.fixture
def readout(client: TestClient, keys) -> int:  # type: ignore[no-untyped-def]
    r = client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert r.status_code == 201
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(1200),
        headers={**keys.h(keys.analyst), **CSV},
    )
    return int(r.json()["version"])


def _count(client: TestClient, keys) -> tuple[int, int]:  # type: ignore[no-untyped-def]
    listed = client.get(URL, headers=keys.h(keys.reader)).json()["comparisons"]
    trail = client.get(
        "/v1/audit", params={"entity": "comparison"}, headers=keys.h(keys.reader)
    ).json()["entries"]
    return len(listed), len(trail)


def test_a_comparison_runs_as_a_job_and_reads_back_ordered(
    client: TestClient, keys, readout
) -> None:  # type: ignore[no-untyped-def]
    r = client.post(URL, json=BODY, headers=keys.h(keys.analyst))
    assert r.status_code == 202, r.text
    started = r.json()
    assert started["comparison"] == f"{URL}/1" and started["status"] == "queued"
    assert r.headers["location"] == started["comparison"]
    job = wait_job(client, keys, started["job"])
    assert job["status"] == "done" and job["progress"] == 1.0, job
    got = client.get(started["comparison"], headers=keys.h(keys.reader)).json()
    assert got["status"] == "done" and got["progress"] == 1.0 and got["readout_version"] == 1
    table = got["table"]
    assert [row["rank"] for row in table] == [1, 2]
    assert {row["candidate"] for row in table} == set(BODY["candidates"])
    for row in table:  # every candidate carries the success lift and every guardrail's, with SEs
        for metric in ("spend", "refund"):
            m = row["metrics"][metric]
            assert len(m["folds"]) == 2 and m["se"] >= m["se_within"] >= 0
            assert m["se"] > 0 or m["lift"] == 0  # zero only when every fold plan is control
        assert row["status"] in ("verified", "unverified", "refused")
    # the order: not refused first, each group by held-out success lift (spend: higher is better)
    key = [(row["status"] == "refused", -row["metrics"]["spend"]["lift"]) for row in table]
    assert key == sorted(key)
    if got["recommended"] is not None:
        assert got["recommended"] in BODY["candidates"]
        assert got["recommended"] in got["reason"]
    else:
        assert "every candidate" in got["reason"]
    listed = client.get(URL, headers=keys.h(keys.reader)).json()["comparisons"]
    assert [(c["number"], c["status"], c["recommended"]) for c in listed] == [
        (1, "done", got["recommended"])
    ]
    entry = client.get(
        "/v1/audit", params={"entity": "comparison"}, headers=keys.h(keys.reader)
    ).json()["entries"][-1]
    assert entry["action"] == "comparison.start" and entry["entity_id"] == "checkout-copy/1"
    assert entry["payload"]["candidates"] == BODY["candidates"]
    # the same request and seed give the same table (the folds and fits are seeded)
    again = client.post(URL, json=BODY, headers=keys.h(keys.analyst)).json()
    assert again["comparison"].endswith("/2")
    wait_job(client, keys, again["job"])
    twin = client.get(again["comparison"], headers=keys.h(keys.reader)).json()
    strip = [{k: v for k, v in row.items() if k != "seconds"} for row in twin["table"]]
    assert strip == [{k: v for k, v in row.items() if k != "seconds"} for row in table]


def test_a_comparison_job_runs_its_folds_in_worker_processes(
    client: TestClient, keys, readout, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    # The job path with two worker processes (a readout this small normally stays in the job's
    # process, so the threshold is lowered): progress heartbeats reach the job row from the
    # parent, the stored table is the one the in-process run stores for the same request and
    # seed, and no worker process is left behind.
    import multiprocessing as mp

    tables = []
    for min_units in (10**9, 0):  # in the job's process, then in two workers
        monkeypatch.setattr(crossfit, "PROCESS_MIN_UNITS", min_units)
        r = client.post(URL, json=BODY, headers=keys.h(keys.analyst))
        assert r.status_code == 202, r.text
        job = wait_job(client, keys, r.json()["job"], timeout=120.0)
        assert job["status"] == "done" and job["progress"] == 1.0, job
        got = client.get(r.json()["comparison"], headers=keys.h(keys.reader)).json()
        tables.append(([{k: v for k, v in row.items() if k != "seconds"} for row in got["table"]],
                       got["recommended"]))  # fmt: skip
    assert tables[1] == tables[0]
    assert mp.active_children() == []


@pytest.mark.parametrize(
    "change,field,words",
    [
        ({"candidates": ["global/chance", "oracle/chance"]}, "candidates[1]", "oracle/chance"),
        ({"candidates": ["global/chance", "global/chance"]}, "candidates", "repeat"),
        ({"success_metric": "revenue"}, "success", "revenue"),
        ({"guardrails": [{"metric": "returns", "threshold": 0.1}]}, "guardrails[0].metric", "returns"),
        ({"guardrails": [{"metric": "spend", "threshold": -1}]}, "guardrails", "success metric"),
        ({"guardrails": [{"metric": "refund", "threshold": -0.1}]}, "guardrails[0].threshold", "lower-is-better"),
        ({"params": {"forest": {"n_trees": 3}}}, "params", "not among the candidates"),
        ({"params": {"causal_tree": {"max_depth": 0}}}, "params.causal_tree", "max_depth"),
        ({"readout_version": None}, "readout_version", "exactly one"),
        ({"model_id": 1}, "readout_version", "exactly one"),
    ],
)  # fmt: skip
def test_bad_requests_are_422_naming_the_field_and_store_nothing(
    client: TestClient, keys, readout, change, field, words
) -> None:  # type: ignore[no-untyped-def]
    before = _count(client, keys)
    r = client.post(URL, json={**BODY, **change}, headers=keys.h(keys.analyst))
    assert r.status_code == 422, r.text
    body = r.json()
    assert r.headers["content-type"].startswith("application/problem+json")
    assert words in body["detail"], body
    assert any(e.get("field") == field for e in body.get("errors", [])), body
    assert _count(client, keys) == before


def test_too_few_rows_for_the_folds_is_422_naming_the_short_arms(
    client: TestClient, keys, readout
) -> None:  # type: ignore[no-untyped-def]
    small = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(150, seed=5),
        headers={**keys.h(keys.analyst), **CSV},
    ).json()["version"]
    r = client.post(URL, json={**BODY, "readout_version": small, "folds": 5},
                    headers=keys.h(keys.analyst))  # fmt: skip
    body = r.json()
    assert r.status_code == 422 and "too few rows for 5 folds" in body["detail"], body
    assert "'calm' has" in body["detail"] and body["errors"][0]["field"] == "folds"
    assert _count(client, keys) == (0, 0)


def test_the_default_fold_count_is_the_cross_fittings_own(
    client: TestClient, keys, readout
) -> None:  # type: ignore[no-untyped-def]
    """The request leaves `folds` to the service, which takes optimize/crossfit.py's FOLDS (the
    one default); the schema's description states the same number. Shown on a readout too small
    for it: the refusal names FOLDS folds."""
    from apportion.schemas.comparisons import ComparisonIn

    assert f"default {crossfit.FOLDS}," in str(ComparisonIn.model_fields["folds"].description)
    small = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(150, seed=5),
        headers={**keys.h(keys.analyst), **CSV},
    ).json()["version"]
    body = {k: v for k, v in BODY.items() if k != "folds"}
    r = client.post(URL, json={**body, "readout_version": small}, headers=keys.h(keys.analyst))
    assert r.status_code == 422, r.text
    assert f"too few rows for {crossfit.FOLDS} folds" in r.json()["detail"]


def test_unknown_readout_and_experiment_are_404(client: TestClient, keys, readout) -> None:  # type: ignore[no-untyped-def]
    r = client.post(URL, json={**BODY, "readout_version": 9}, headers=keys.h(keys.analyst))
    assert r.status_code == 404 and "readout version 9" in r.json()["detail"]
    r = client.post("/v1/experiments/nope/comparisons", json=BODY, headers=keys.h(keys.analyst))
    assert r.status_code == 404
    assert client.get(f"{URL}/7", headers=keys.h(keys.reader)).status_code == 404
    assert _count(client, keys) == (0, 0)


def test_roles_reader_reads_analyst_starts(client: TestClient, keys, readout) -> None:  # type: ignore[no-untyped-def]
    assert client.post(URL, json=BODY, headers=keys.h(keys.reader)).status_code == 403
    assert client.post(URL, json=BODY).status_code == 401
    assert client.get(URL).status_code == 401
    assert client.get(URL, headers=keys.h(keys.reader)).status_code == 200
    assert _count(client, keys) == (0, 0)


def test_a_draft_links_the_comparison_it_follows(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    model_id = scenario_model(
        client, keys, n=6000, params={"max_depth": 2, "min_units_per_arm": 80}
    )
    url = f"/v1/experiments/{EXPERIMENT_KEY}/comparisons"
    body = {"model_id": model_id, "success_metric": SUCCESS, "guardrails": GUARDRAILS,
            "candidates": ["causal_tree/chance", "global/chance"], "folds": 2}  # fmt: skip
    r = client.post(url, json=body, headers=keys.h(keys.analyst))
    assert r.status_code == 202, r.text
    number = r.json()["number"]
    wait_job(client, keys, r.json()["job"])
    got = client.get(f"{url}/{number}", headers=keys.h(keys.reader)).json()
    assert got["spec"]["model_id"] == model_id and got["status"] == "done"
    v = draft_plan(client, keys, model_id, comparison=number)
    link = v["spec"]["comparison"]
    assert link["number"] == number and link["href"] == f"{url}/{number}"
    assert link["candidate"] == "causal_tree/chance"
    assert link["follows_recommendation"] == (got["recommended"] == "causal_tree/chance")
    page = client.get(
        f"/ui/fragments/plans/lesson-length/versions/{v['version']}", headers=keys.h(keys.reader)
    )
    assert page.status_code == 200  # the review page keeps the link
    assert f"{url}/{number}" in page.text and 'id="comparison-link"' in page.text
    # a draft naming a comparison that did not compare its method, or none, is a 422
    bad = {"model_id": model_id, "success_metric": SUCCESS, "guardrails": GUARDRAILS,
           "method": "stochastic", "draws": 20, "comparison": number}  # fmt: skip
    r = client.post("/v1/plans/lesson-length/versions", json=bad, headers=keys.h(keys.analyst))
    assert r.status_code == 422 and "did not compare 'causal_tree/stochastic'" in r.json()["detail"]
    r = client.post(
        "/v1/plans/lesson-length/versions",
        json={**bad, "method": "chance", "comparison": 99},
        headers=keys.h(keys.analyst),
    )
    assert r.status_code == 422 and "no comparison 99" in r.json()["detail"]
    plan = client.get("/v1/plans/lesson-length", headers=keys.h(keys.reader)).json()
    assert len(plan["versions"]) == 1


def test_a_candidate_that_fails_is_listed_with_its_reason_and_cannot_be_followed(
    client: TestClient, keys, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    # A domain refusal inside one candidate's fold fit used to fail the whole comparison job.
    model_id = scenario_model(
        client, keys, n=6000, params={"max_depth": 2, "min_units_per_arm": 80}
    )
    real = crossfit.fit_model

    def refuse_causal_tree(table, model, **kw):  # type: ignore[no-untyped-def]
        if model == "causal_tree":
            raise InvalidInput("a cell is too small in this fold")
        return real(table, model, **kw)

    monkeypatch.setattr(crossfit, "fit_model", refuse_causal_tree)
    url = f"/v1/experiments/{EXPERIMENT_KEY}/comparisons"
    body = {"model_id": model_id, "success_metric": SUCCESS, "guardrails": GUARDRAILS,
            "candidates": ["causal_tree/chance", "global/chance"], "folds": 2}  # fmt: skip
    r = client.post(url, json=body, headers=keys.h(keys.analyst))
    assert r.status_code == 202, r.text
    number = r.json()["number"]
    assert wait_job(client, keys, r.json()["job"])["status"] == "done"
    got = client.get(f"{url}/{number}", headers=keys.h(keys.reader)).json()
    assert got["status"] == "done" and got["recommended"] == "global/chance"
    failed = got["table"][-1]
    assert failed["candidate"] == "causal_tree/chance" and failed["status"] == "failed"
    assert failed["rank"] is None and "a cell is too small in this fold" in failed["error"]
    r = client.post(
        "/v1/plans/lesson-length/versions",
        json={
            "model_id": model_id,
            "success_metric": SUCCESS,
            "guardrails": GUARDRAILS,
            "method": "chance",
            "comparison": number,
        },  # fmt: skip
        headers=keys.h(keys.analyst),
    )
    assert r.status_code == 422 and "failed in comparison" in r.json()["detail"], r.text
