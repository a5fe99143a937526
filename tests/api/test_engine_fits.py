"""Readouts above the in-memory limit: the fit job runs on DuckDB over the stored Parquet files,
methods fitted in memory only are refused by name before anything is stored, and a draft's
row-reading steps run on a uniform sample and say so."""

from __future__ import annotations

import html

import numpy as np
import pytest
from fastapi.testclient import TestClient
from support import draft_plan, make_keys, make_settings, wait_job

from apportion.client import ApportionClient, as_json
from apportion.demo.scenario import experiment_declaration, simulate, to_csv_bytes
from apportion.schemas.common import dump
from apportion.schemas.models import ModelView

LIMIT = 1_500  # rows the in-memory path takes in these tests (APPORTION_FIT_ENGINE_MIN_ROWS)
N = 4_000


@pytest.fixture
def big(db_url: str):  # type: ignore[no-untyped-def]
    from apportion.app import create_app

    app = create_app(make_settings(db_url, fit_engine_min_rows=LIMIT, held_out_folds=2))
    with TestClient(app, raise_server_exceptions=False) as c:
        keys = make_keys(c.app.state.services)  # type: ignore[attr-defined]
        decl = experiment_declaration()
        assert c.post("/v1/experiments", json=decl, headers=keys.h(keys.analyst)).status_code == 201
        r = c.post(f"/v1/experiments/{decl['key']}/readouts", content=to_csv_bytes(simulate(N, seed=3)),
                   headers={**keys.h(keys.analyst), "content-type": "text/csv"})  # fmt: skip
        assert r.status_code == 201, r.text
        yield c, keys, decl["key"], r.json()["version"]


PARAMS = {"max_depth": 2, "min_units_per_arm": 60, "cv_folds": 0, "seed": 5}


def test_a_fit_above_the_limit_runs_on_duckdb_and_equals_the_in_memory_fit(big):
    from apportion.stats.models import fit_cohort_model
    from apportion.usecases.experiments import load_readout_table

    c, keys, key, version = big
    r = c.post(f"/v1/experiments/{key}/models", headers=keys.h(keys.analyst),
               json={"readout_version": version, "method": "causal_tree", "params": PARAMS})  # fmt: skip
    assert r.status_code == 202, r.text
    assert wait_job(c, keys, r.json()["job"])["status"] == "done"
    model = c.get(r.json()["model"], headers=keys.h(keys.reader)).json()
    assert model["diagnostics"]["engine"] == "duckdb"
    # an engine fit's answer is declared key for key too (diagnostics name the engine)
    assert dump(ModelView.model_validate(model, extra="forbid")) == model
    services = c.app.state.services  # type: ignore[attr-defined]
    from apportion.store import experiments as repo

    with services.db.read() as s:
        exp = repo.get_experiment(session=s, key=key)
        readout_id = repo.get_readout(session=s, experiment_id=exp.id, version=version).id
    table, _ = load_readout_table(services.db, readout_id=readout_id)
    want = fit_cohort_model(table, "causal_tree", PARAMS)
    assert len(model["cohorts"]) == want.partition.n_cohorts >= 2
    assert [co["rule"] for co in model["cohorts"]] == want.partition.cohort_rules()
    k = want.estimates.metric_keys.index("active_days")
    got = [co["estimates"]["active_days"][table.arm_keys[1]]["effect"] for co in model["cohorts"]]
    np.testing.assert_allclose(got, want.estimates.effect[:, 1, k], rtol=1e-9)

    # the plan draft reads rows for its held-out evaluation: a uniform sample of LIMIT rows
    v = draft_plan(c, keys, int(r.json()["model_id"]))
    api = ApportionClient(key=keys.reader, http=c)
    v = as_json(api.settle_draft(api.version(v["plan"], v["version"])))  # the held-out job
    held = v["report"]["held_out"]
    assert held["status"] == "complete", held
    assert held.get("sampled") is True, held
    assert held["rows_used"] == LIMIT and held["readout_rows"] == N
    page = c.get(f"/ui/fragments/plans/lesson-length/versions/{v['version']}",
                 headers=keys.h(keys.reader))  # fmt: skip
    assert page.status_code == 200
    text = html.unescape(page.text)  # the page escapes the apostrophe as &#39;
    assert f"a uniform sample of {LIMIT:,} of the readout's {N:,} rows" in text
    section = page.text[page.text.index('id="held-out"') :]
    from apportion.demo.scenario import SUCCESS

    assert f'<th scope="row">{SUCCESS}</th>' in section[: section.index("</section>")]


def test_a_method_fitted_in_memory_only_is_refused_above_the_limit(big):
    c, keys, key, version = big
    r = c.post(f"/v1/experiments/{key}/models", headers=keys.h(keys.analyst),
               json={"readout_version": version, "method": "forest", "params": {}})  # fmt: skip
    assert r.status_code == 422, r.text
    body = r.json()
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "'forest'" in body["detail"] and f"{N} rows" in body["detail"]
    assert "APPORTION_FIT_ENGINE_MIN_ROWS" in body["detail"]
    from sqlalchemy import func, select

    from apportion.store.tables import CohortModel, Job

    services = c.app.state.services  # type: ignore[attr-defined]
    with services.db.read() as s:  # nothing stored: no model row, no job
        assert s.scalar(select(func.count()).select_from(CohortModel)) == 0
        assert s.scalar(select(func.count()).select_from(Job)) == 0
