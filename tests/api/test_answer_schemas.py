"""Real answers against the typed contract with undeclared keys refused (pydantic's run-time
`model_validate(..., extra="forbid")`, applied at every depth): a model of every method, plan versions of every optimizer (mixed and pure), a comparison, and
the compiled plan. A key a producer adds, drops or renames without the schema fails here; and
the models re-dump to the very JSON the route sent, so nothing is lost or coerced on the way."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from pydantic import BaseModel, ValidationError
from snapshots import module_snapshot
from support import EXPERIMENT, rows_csv, wait_job

from apportion.schemas.assignments import CompiledPlanOut
from apportion.schemas.common import dump
from apportion.schemas.comparisons import ComparisonView
from apportion.schemas.fitparams import PARAMS_BY_METHOD
from apportion.schemas.models import ModelView
from apportion.schemas.plans import PlanVersionView
from apportion.stats.models import METHODS, PARAMS

KEY = "checkout-copy"
GUARD = [{"metric": "refund", "threshold": 0.02, "unit": "absolute"}]
PARAMS_OF = {
    "global": {},
    "segments": {"features": ["plan", "age_days"], "bins": {"age_days": 2}},
    "causal_tree": {"max_depth": 2, "min_units_per_arm": 60},  # cross-validated pruning on
    "intersect": {"max_depth": 2, "min_units_per_arm": 60},
    "two_model": {"max_depth": 2, "min_units_per_arm": 60, "max_iter": 10, "guardrails": GUARD},
    "forest": {"max_depth": 2, "min_units_per_arm": 60, "n_trees": 5, "guardrails": GUARD},
    "policy_tree": {"max_depth": 2, "min_units_per_arm": 60, "guardrails": GUARD},
}
DRAFTS = [  # (method, allocation, options)
    ("chance", "mixed", None),
    ("deterministic", "mixed", {"presolve": True}),
    ("stochastic", "mixed", {"tail": 0.2}),
    ("deterministic", "pure", None),
    ("stochastic", "pure", None),
]


def _build(client: TestClient, keys) -> dict[str, Any]:  # type: ignore[no-untyped-def]
    h = keys.h(keys.analyst)
    assert client.post("/v1/experiments", json=EXPERIMENT, headers=h).status_code == 201
    r = client.post(f"/v1/experiments/{KEY}/readouts", content=rows_csv(3000),
                    headers={**h, "content-type": "text/csv"})  # fmt: skip
    assert r.status_code == 201, r.text
    models = {}
    for method, params in PARAMS_OF.items():
        body = {"readout_version": 1, "method": method, "params": params}
        r = client.post(f"/v1/experiments/{KEY}/models", json=body, headers=h)
        assert r.status_code == 202, r.text
        assert wait_job(client, keys, r.json()["job"])["status"] == "done", method
        models[method] = r.json()["model_id"]
    for method, allocation, options in DRAFTS:
        body = {"model_id": models["causal_tree"], "success_metric": "spend", "draws": 20,
                "guardrails": [{**GUARD[0], "confidence": 0.8}], "method": method,
                "allocation": allocation, "holdout": {"share": 0.1}, "options": options}  # fmt: skip
        r = client.post("/v1/plans/checkout/versions", json=body, headers=h)
        assert r.status_code == 201, r.text
    body = {"readout_version": 1, "success_metric": "spend", "guardrails": GUARD, "folds": 2,
            "candidates": ["global/chance", "causal_tree/deterministic", "policy_tree/chance"],
            "params": {"causal_tree": {"max_depth": 2, "min_units_per_arm": 60, "cv_folds": 0}}}  # fmt: skip
    r = client.post(f"/v1/experiments/{KEY}/comparisons", json=body, headers=h)
    assert r.status_code == 202, r.text
    assert wait_job(client, keys, r.json()["job"])["status"] == "done"
    for version in (1, 2):  # 2 goes live over 1
        a = client.post(f"/v1/plans/checkout/versions/{version}/approve",
                        json={"reason": "reviewed"}, headers=keys.h(keys.approver))  # fmt: skip
        assert a.status_code == 200, a.text
        rev = client.get("/v1/plans/checkout", headers=h).json()["revision"]
        a = client.post("/v1/plans/checkout/activate", headers=keys.h(keys.approver),
                        json={"version": version, "reason": "go", "expected_revision": rev})  # fmt: skip
        assert a.status_code == 200, a.text
    return {"models": models}


snap, db_url, keys = module_snapshot(_build)


def _strict(model: type[BaseModel], raw: dict[str, Any]) -> BaseModel:
    """`raw` validated with undeclared keys refused, and dumped back to exactly `raw`."""
    parsed = model.model_validate(raw, extra="forbid")
    assert dump(parsed) == raw
    return parsed


@pytest.mark.parametrize("method", METHODS)
def test_every_model_method_answers_as_its_schema(client: TestClient, keys, snap, method) -> None:  # type: ignore[no-untyped-def]
    r = client.get(f"/v1/models/{snap.data['models'][method]}", headers=keys.h(keys.reader))
    assert r.status_code == 200, r.text
    view = _strict(ModelView, r.json())
    assert isinstance(view, ModelView) and view.diagnostics is not None
    assert view.diagnostics.method == method
    assert type(view.resolved_params) is PARAMS_BY_METHOD[method]
    assert type(view.params.method_params) is PARAMS_BY_METHOD[method]


def test_plan_versions_of_every_optimizer_answer_as_their_schema(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    solvers = set()
    for version, (method, allocation, options) in enumerate(DRAFTS, start=1):
        r = client.get(f"/v1/plans/checkout/versions/{version}", headers=keys.h(keys.reader))
        assert r.status_code == 200, r.text
        view = _strict(PlanVersionView, r.json())
        assert isinstance(view, PlanVersionView)
        assert view.spec.method == method and view.spec.allocation == allocation
        assert (view.spec.options is None) == (options is None)
        report = view.report
        assert report.bootstrap and report.calibration and report.guardrail_prices
        assert report.solution and report.solution.diagnostics
        solvers.add(report.solution.diagnostics.solver)
        # version 2 is live, so every other version's answer carries a diff against it
        assert (view.diff is None) == (version == 2)
    assert {"highs-ds", "milp", "kelley-lp", "kelley-milp"} <= solvers


def test_comparison_answers_as_its_schema(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.get(f"/v1/experiments/{KEY}/comparisons/1", headers=keys.h(keys.reader))
    assert r.status_code == 200, r.text
    view = _strict(ComparisonView, r.json())
    assert isinstance(view, ComparisonView)
    assert {m: type(p) for m, p in view.spec.params.items()} == {
        m: PARAMS_BY_METHOD[m] for m in ("global", "causal_tree", "policy_tree")
    }


def test_compiled_plan_answers_as_its_schema(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.get("/v1/plans/checkout/compiled", headers=keys.h(keys.reader))
    assert r.status_code == 200, r.text
    _strict(CompiledPlanOut, r.json())


def test_a_planted_key_is_refused_at_any_depth(client: TestClient, keys, snap) -> None:  # type: ignore[no-untyped-def]
    """The strict check can fail: one undeclared key, deep in an answer, is a validation error
    naming it (and without the strict context the answer models drop it, as readers want)."""
    model = client.get(f"/v1/models/{snap.data['models']['two_model']}",
                       headers=keys.h(keys.reader)).json()  # fmt: skip
    version = client.get("/v1/plans/checkout/versions/1", headers=keys.h(keys.reader)).json()
    plants = [
        (ModelView, model, ("diagnostics", "outcome_model")),
        (ModelView, model, ("resolved_params",)),
        (ModelView, model, ("partition", "nodes", 0)),
        (PlanVersionView, version, ("report", "calibration", "shrinkage")),
        (PlanVersionView, version, ("report", "solution", "diagnostics")),
        (PlanVersionView, version, ("report", "guardrail_prices", 0, "points", 0)),
    ]
    for schema, answer, path in plants:
        raw = json.loads(json.dumps(answer))
        part = raw
        for step in path:
            part = part[step]
        part["surprise"] = 1
        with pytest.raises(ValidationError, match="surprise"):
            schema.model_validate(raw, extra="forbid")
        assert "surprise" not in json.dumps(dump(schema.model_validate(raw)))
    # an open part (OpenAnswer) passes an undeclared key on to readers; extra="forbid" refuses it
    raw = json.loads(json.dumps(version))
    raw["report"]["metrics"][0]["surprise"] = 1
    with pytest.raises(ValidationError, match=r"metrics\.0\.surprise"):
        PlanVersionView.model_validate(raw, extra="forbid")
    assert dump(PlanVersionView.model_validate(raw))["report"]["metrics"][0]["surprise"] == 1


def test_each_parameter_model_names_exactly_its_methods_parameters() -> None:
    """The answer's parameter models against the one table of method parameters
    (apportion/stats/models.py `PARAMS`): a parameter added there must be declared here."""
    assert set(PARAMS_BY_METHOD) == set(METHODS)
    for method, model in PARAMS_BY_METHOD.items():
        assert set(model.model_fields) == set(PARAMS[method]), method


def test_every_golden_compiled_plan_matches_the_document_schema() -> None:
    """The conformance documents (tests/golden, written by the server) cover categorical and
    numeric splits, holdout on and off and a plan without splits."""
    files = sorted(Path(__file__).parents[1].joinpath("golden").glob("*.json"))
    assert files
    for f in files:
        doc = json.loads(f.read_text())["document"]
        assert CompiledPlanOut.model_validate(doc).model_dump(mode="json") == doc, f.name
