"""Method comparisons on an experiment's own readout: every candidate (cohort
model method x optimizer) is cross-fitted over K folds and scored on the folds its plans never
saw (apportion/optimize/crossfit.py); the job stores the ordered table and the recommendation.

Everything a request can get wrong (an unknown candidate or metric, a guardrail that does not fit
its metric, model parameters, too few rows for the folds) is checked before anything is stored."""

from __future__ import annotations

from typing import Any, cast

from apportion.domain import Actor
from apportion.errors import InvalidInput, NotFound
from apportion.optimize.crossfit import (
    COMPARISON_DRAWS,
    FOLDS,
    check_folds,
    comparison_workers,
    evaluate_candidates,
    parse_candidates,
)
from apportion.optimize.problem import Guardrail, check_objective
from apportion.schemas.common import JobStatus
from apportion.schemas.comparisons import (
    ComparisonIn,
    ComparisonList,
    ComparisonListed,
    ComparisonQueued,
    ComparisonView,
)
from apportion.schemas.plans import GuardrailSpec
from apportion.stats.decision import DECISION_METHODS
from apportion.stats.models import validate_params
from apportion.store import audit
from apportion.store import comparisons as repo
from apportion.store import experiments as exp_repo
from apportion.store import jobs as job_repo
from apportion.store import models as model_repo
from apportion.store.tables import Job, Readout
from apportion.usecases import jobs
from apportion.usecases.context import Services
from apportion.usecases.experiments import load_readout_table, specs_of

KIND = "comparison"


def _guardrails(spec: dict[str, Any]) -> tuple[Guardrail, ...]:
    return tuple(Guardrail(**g) for g in spec["guardrails"])


def _resolve_guardrails(command: ComparisonIn) -> list[dict[str, Any]]:
    """The request's guardrails with the comparison's confidence where one gives none."""
    return [
        GuardrailSpec(
            metric=g.metric,
            threshold=g.threshold,
            unit=g.unit,
            confidence=g.confidence if g.confidence is not None else command.confidence,
        ).model_dump()
        for g in command.guardrails
    ]


def _model_params(
    command: ComparisonIn, models: list[str], specs: Any, guardrails: list[dict[str, Any]],
    success: str, from_model: tuple[str, dict[str, Any]] | None,
) -> dict[str, dict[str, Any]]:  # fmt: skip
    """Validated parameters per cohort model method. A decision-focused method prices the
    comparison's own guardrails unless told otherwise; a named model lends its parameters to its
    method. The seed is left out: each fold's fit takes the comparison's seed plus the fold."""
    given = dict(command.params or {})
    unknown = sorted(set(given) - set(models))
    if unknown:
        raise InvalidInput(
            f"params names methods that are not among the candidates: {unknown} "
            f"(candidates use {models})",
            errors=[{"field": "params", "problem": "not a candidate's method", "value": unknown}],
        )
    out = {}
    for m in models:
        p = dict(given.get(m) or {})
        if from_model is not None and from_model[0] == m and m not in given:
            p = dict(from_model[1])
        if m in DECISION_METHODS and "guardrails" not in p:
            p["guardrails"] = [
                {k: g[k] for k in ("metric", "threshold", "unit")} for g in guardrails
            ]
        p.pop("seed", None)
        p.pop("success_metric", None)
        try:
            resolved = validate_params(m, {**p, "success_metric": success}, specs)
        except InvalidInput as exc:
            raise InvalidInput(f"params of {m}: {exc.detail}",
                               errors=[{"field": f"params.{m}", **e} for e in exc.errors]) from exc  # fmt: skip
        resolved.pop("seed", None)
        resolved.pop("success_metric", None)
        out[m] = resolved
    return out


def start(services: Services, *, key: str, command: ComparisonIn, actor: Actor) -> ComparisonQueued:
    candidates = parse_candidates(command.candidates)
    folds = command.folds if command.folds is not None else FOLDS  # the one default
    seed, success = command.seed, command.success_metric
    guardrails = _resolve_guardrails(command)
    if any(g["metric"] == success for g in guardrails):
        raise InvalidInput(
            f"guardrail metric {success!r} is the success metric; guard other metrics",
            errors=[
                {"field": "guardrails", "problem": "names the success metric", "value": success}
            ],
        )
    if (command.readout_version is None) == (command.model_id is None):
        raise InvalidInput(
            "give exactly one of readout_version (compare on that readout) and model_id "
            "(compare on the model's readout, with its parameters for its method)",
            errors=[
                {"field": "readout_version", "problem": "exactly one of readout_version, model_id"}
            ],
        )
    db = services.db
    with db.write() as s:
        exp = exp_repo.get_experiment(session=s, key=key, lock=True)  # level 1: numbers
        specs = specs_of(exp.declaration)
        model_id, from_model = command.model_id, None
        if model_id is not None:
            model = model_repo.get_model(session=s, model_id=int(model_id))
            if model.experiment_id != exp.id:
                raise InvalidInput(
                    f"cohort model {model_id} belongs to another experiment",
                    errors=[{"field": "model_id", "problem": "not a model of this experiment"}],
                )
            readout = exp_repo.get_readout_by_id(session=s, readout_id=model.readout_id)
            from_model = (model.method, dict((model.params or {}).get("method_params") or {}))
        else:
            readout = exp_repo.get_readout(
                session=s, experiment_id=exp.id, version=int(command.readout_version or 0)
            )
            srm = readout.summary.get("sample_ratio", {})
            if srm.get("flagged") and command.override_sample_ratio is None:
                raise InvalidInput(
                    f"readout {readout.version} failed the sample-ratio check; fix the assignment "
                    "or give override_sample_ratio with a reason",
                    errors=[
                        {
                            "field": "override_sample_ratio",
                            "problem": "required when the sample-ratio check failed",
                        }
                    ],  # fmt: skip
                )
        check_objective(specs.metrics, success, tuple(Guardrail(**g) for g in guardrails))
        check_folds(readout.summary.get("arm_counts") or {}, folds)
        models = list(dict.fromkeys(c.model for c in candidates))
        params = _model_params(command, models, specs, guardrails, success, from_model)
        spec = {
            "readout_version": readout.version,
            "model_id": model_id,
            "candidates": [c.name for c in candidates],
            "success_metric": success,
            "guardrails": guardrails,
            "folds": folds,
            "seed": seed,
            "params": params,
        }
        job = job_repo.create_job(session=s, kind=KIND, payload={})
        row = repo.add_comparison(session=s, experiment_id=exp.id, readout_id=readout.id,
                                  model_id=model_id, spec=spec, job_id=job.id,
                                  created_by=actor.name)  # fmt: skip
        job.payload = {"comparison_id": row.id}
        override = command.override_sample_ratio
        reason = (override.reason if override else None) or command.notes
        audit.append(s, actor=actor, action="comparison.start", entity="comparison",
                     entity_id=f"{key}/{row.number}", payload={"experiment": key, **spec},
                     reason=reason)  # fmt: skip
        out = ComparisonQueued(
            number=row.number,
            comparison=f"/v1/experiments/{key}/comparisons/{row.number}",
            job_id=job.id,
            job=f"/v1/jobs/{job.id}",
            status="queued",
        )
    jobs.notify(services)
    return out


@jobs.handler(KIND)
def _run(services: Services, job: Job, progress: Any) -> None:
    cid = int(job.payload["comparison_id"])
    with services.db.write() as s:  # lock order: the job row was claimed; now the comparison
        row = repo.get_by_id(session=s, comparison_id=cid)
        row.status = "running"
        spec, readout_id = dict(row.spec), row.readout_id
    table, _ = load_readout_table(services.db, readout_id=readout_id)
    progress(0.02)
    out = evaluate_candidates(
        table,
        parse_candidates(spec["candidates"]),
        success=spec["success_metric"],
        guardrails=_guardrails(spec),
        folds=int(spec["folds"]),
        seed=int(spec["seed"]),
        model_params=spec["params"],
        progress=lambda p: progress(0.02 + 0.97 * p),
        draws=COMPARISON_DRAWS,
        workers=comparison_workers(services.settings.comparison_workers, table.n),
    )
    with services.db.write() as s:  # lock order (store/db.py): the job row, then the comparison
        job_repo.finish(session=s, job=job)
        repo.set_result(session=s, comparison_id=cid, status="done", result=out)


def _on_failed(session: Any, job: Job, message: str) -> None:
    row = repo.comparison_for_job(session=session, job_id=job.id, lock=True)
    if row is not None and row.status != "done":
        row.status = "failed"
        row.result = {"error": message}


jobs.FAILURE_HOOKS[KIND] = _on_failed


def _view(row: Any, key: str, readout_version: int, progress: float) -> ComparisonView:
    """The comparison's row; its stored spec and (once done) result are validated as read."""
    out: dict[str, Any] = {
        "experiment": key,
        "number": row.number,
        "href": f"/v1/experiments/{key}/comparisons/{row.number}",
        "readout_version": readout_version,
        "model_id": row.model_id,
        "spec": row.spec,
        "status": row.status,
        "progress": round(float(progress), 4),
        "job": f"/v1/jobs/{row.job_id}",
        "created_at": row.created_at,
        "created_by": row.created_by,
    }
    res = row.result or {}
    if row.status == "done":
        out.update(
            table=res["candidates"],
            recommended=res["recommended"],
            reason=res["reason"],
            folds=res["folds"],
            units=res["units"],
            seconds=res["seconds"],
        )
    elif row.status == "failed":
        out["error"] = res.get("error")
    return ComparisonView.model_validate(out)


def get(services: Services, *, key: str, number: int) -> ComparisonView:
    with services.db.read() as s:
        exp = exp_repo.get_experiment(session=s, key=key)
        row = repo.get_comparison(session=s, experiment_id=exp.id, number=number)
        readout = s.get(Readout, row.readout_id)
        job = job_repo.get_job(session=s, job_id=row.job_id)
        assert readout is not None
        return _view(row, key, readout.version, 1.0 if row.status == "done" else job.progress)


def list_all(services: Services, *, key: str) -> ComparisonList:
    with services.db.read() as s:
        exp = exp_repo.get_experiment(session=s, key=key)
        rows = repo.list_comparisons(session=s, experiment_id=exp.id)
        return ComparisonList(
            experiment=key,
            comparisons=[
                ComparisonListed(
                    number=r.number,
                    href=f"/v1/experiments/{key}/comparisons/{r.number}",
                    status=cast(JobStatus, r.status),  # the store writes only these four
                    success_metric=r.spec.get("success_metric"),
                    candidates=len(r.spec.get("candidates") or []),
                    recommended=(r.result or {}).get("recommended"),
                    created_at=r.created_at,
                    created_by=r.created_by,
                )
                for r in rows
            ],
        )


def followed(services: Services, *, model_id: int, number: int, candidate: str) -> dict[str, Any]:
    """The link a draft keeps to the comparison it follows: the comparison must be one of the
    model's experiment, done, and have compared the draft's own candidate."""
    with services.db.read() as s:
        model = model_repo.get_model(session=s, model_id=model_id)
        exp = s.get(exp_repo.Experiment, model.experiment_id)
        assert exp is not None
        try:
            row = repo.get_comparison(session=s, experiment_id=exp.id, number=number)
        except NotFound as exc:
            raise InvalidInput(
                f"experiment '{exp.key}' has no comparison {number}",
                errors=[{"field": "comparison", "problem": "unknown comparison", "value": number}],
            ) from exc
        if row.status != "done":
            raise InvalidInput(
                f"comparison {number} of '{exp.key}' is {row.status}; a draft can follow a done one",
                errors=[{"field": "comparison", "problem": f"comparison is {row.status}"}],
            )
        names = list(row.spec.get("candidates") or [])
        if candidate not in names:
            raise InvalidInput(
                f"comparison {number} did not compare {candidate!r} (it compared {names})",
                errors=[{"field": "comparison", "problem": "the draft's method was not compared"}],
            )
        res = row.result or {}
        mine = next((r for r in res.get("candidates", []) if r["candidate"] == candidate), None)
        if mine is not None and mine["status"] == "failed":
            raise InvalidInput(
                f"{candidate!r} failed in comparison {number} ({mine['error']}); a draft can "
                "follow a candidate the comparison evaluated",
                errors=[{"field": "comparison", "problem": "the draft's method failed there"}],
            )
        return {
            "number": number,
            "href": f"/v1/experiments/{exp.key}/comparisons/{number}",
            "candidate": candidate,
            "recommended": res.get("recommended"),
            "follows_recommendation": res.get("recommended") == candidate,
            "rank": mine["rank"] if mine else None,
            "status": mine["status"] if mine else None,
        }
