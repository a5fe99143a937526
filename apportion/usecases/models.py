"""Fitting cohort models as jobs, and reading them back."""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from apportion.domain import Actor
from apportion.errors import InvalidInput, NotFound
from apportion.ingest.dataset import read_dataset
from apportion.schemas.models import FitIn, FitQueued, ModelView
from apportion.stats.estimates import CellMoments
from apportion.stats.models import METHODS, fit_cohort_model, validate_params
from apportion.stats.partition import Partition
from apportion.stats.pushdown import PUSHDOWN_METHODS, fit_on_engine
from apportion.store import audit, blobs
from apportion.store import experiments as exp_repo
from apportion.store import jobs as job_repo
from apportion.store import models as repo
from apportion.store.db import Database
from apportion.store.tables import Job
from apportion.usecases import jobs
from apportion.usecases.cellstats import engine_name, open_readout_engine
from apportion.usecases.context import Services
from apportion.usecases.experiments import readout_data, specs_of


def start_fit(services: Services, *, key: str, command: FitIn, actor: Actor) -> FitQueued:
    readout_version, method, params = command.readout_version, command.method, command.params
    success_metric = command.success_metric
    override = command.override_sample_ratio
    override_reason = override.reason if override else None
    if method not in METHODS:
        raise InvalidInput(
            f"method must be one of {', '.join(METHODS)}; got '{method}'",
            errors=[{"field": "method", "problem": f"unknown method '{method}'"}],
        )
    db = services.db
    with db.write() as s:
        exp = exp_repo.get_experiment(session=s, key=key, lock=True)  # level 1: model numbers
        readout = exp_repo.get_readout(session=s, experiment_id=exp.id, version=readout_version)
        specs = specs_of(exp.declaration)
        if success_metric is not None and specs.metric(success_metric) is None:
            raise InvalidInput(
                f"success_metric '{success_metric}' is not a metric of experiment '{key}'",
                errors=[{"field": "success_metric", "problem": "unknown metric"}],
            )
        resolved = validate_params(method, dict(params), specs)
        engine = engine_name(services, readout.n_rows)
        if engine != "memory" and method not in PUSHDOWN_METHODS:
            raise InvalidInput(
                f"method '{method}' is fitted in memory only, and readout {readout_version} has "
                f"{readout.n_rows} rows, more than the in-memory limit of "
                f"{services.settings.fit_engine_min_rows} (APPORTION_FIT_ENGINE_MIN_ROWS); "
                f"fit one of {', '.join(PUSHDOWN_METHODS)} on the {engine} engine",
                errors=[{"field": "method", "problem": f"not fitted on the {engine} engine"}],
            )
        srm = readout.summary.get("sample_ratio", {})
        if srm.get("flagged") and not override_reason:
            raise InvalidInput(
                f"readout {readout_version} failed the sample-ratio check (p = {srm.get('p_value'):.3g} < {srm.get('threshold')}); "
                "fix the assignment or give override_sample_ratio with a reason",
                errors=[
                    {
                        "field": "override_sample_ratio",
                        "problem": "required when the sample-ratio check failed",
                    }
                ],
            )
        job = job_repo.create_job(session=s, kind="fit", payload={})
        row = repo.add_model(
            session=s,
            experiment_id=exp.id,
            readout_id=readout.id,
            method=method,
            params={"method_params": resolved, "success_metric": success_metric},
            job_id=job.id,
            created_by=actor.name,
        )
        job.payload = {"model_id": row.id}
        audit.append(
            s,
            actor=actor,
            action="model.fit",
            entity="cohort_model",
            entity_id=row.id,
            payload={
                "experiment": key,
                "readout_version": readout_version,
                "method": method,
                "params": resolved,
                "success_metric": success_metric,
                "sample_ratio_override": bool(srm.get("flagged")) and bool(override_reason),
            },
            reason=override_reason,
        )
        out = FitQueued(
            model_id=row.id,
            version=row.version,
            job_id=job.id,
            job=f"/v1/jobs/{job.id}",
            model=f"/v1/models/{row.id}",
            status="queued",
        )
    jobs.notify(services)
    return out


@jobs.handler("fit")
def _run_fit(services: Services, job: Job, progress: Any) -> None:
    model_id = int(job.payload["model_id"])
    with services.db.read() as s:
        row = repo.get_model(session=s, model_id=model_id)
        method, params, readout_id = row.method, row.params, row.readout_id
    with services.db.write() as s:
        repo.get_model(session=s, model_id=model_id).status = "running"
    data = readout_data(services.db, readout_id=readout_id)
    engine = engine_name(services, data.n_rows)
    progress(0.05)
    t0 = time.perf_counter()
    kwargs: dict[str, Any] = {"success_metric": params.get("success_metric"),
              "progress": lambda p: progress(0.05 + 0.9 * p)}  # fmt: skip
    if engine == "memory":
        table, _ = read_dataset(data.filesystem, list(data.paths), data.manifest)
        fit = fit_cohort_model(table, method, params["method_params"], **kwargs)
    else:  # above the in-memory limit: the rows stay in their Parquet files
        with open_readout_engine(services, data, engine) as eng:
            fit = fit_on_engine(eng, method, params["method_params"], **kwargs)
    result = fit_result(fit, data.manifest.spec.arm_keys, time.perf_counter() - t0)
    mask = np.packbits(np.asarray(fit.estimation_mask, dtype=bool)).tobytes()
    with services.db.write() as s:  # lock order (store/db.py): the job row, then the model's
        job_repo.finish(session=s, job=job)
        result["estimation_mask_blob"] = blobs.put_blob(session=s, data=mask)
        repo.set_result(session=s, model_id=model_id, status="done", result=result)


def _on_fit_failed(session: Any, job: Job, message: str) -> None:
    row = repo.model_for_job(session=session, job_id=job.id, lock=True)
    if row is not None and row.status != "done":
        row.status = "failed"
        row.result = {"error": message}


jobs.FAILURE_HOOKS["fit"] = _on_fit_failed


def _num(x: float) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None


def fit_result(fit: Any, arm_keys: tuple[str, ...], seconds: float) -> dict[str, Any]:
    rules = fit.partition.cohort_rules()
    est = fit.estimates
    cohorts = []
    for c in range(fit.partition.n_cohorts):
        cohorts.append(
            {
                "id": c,
                "rule": rules[c],
                "share": _num(fit.shares[c]),
                "n_estimation": {a: int(est.n[c, j]) for j, a in enumerate(arm_keys)},
                "estimates": {
                    m: {
                        a: {
                            "mean": _num(est.mean[c, j, k]),
                            "se": _num(est.se[c, j, k]),
                            "effect": _num(est.effect[c, j, k]) if j else None,
                            "effect_se": _num(est.effect_se[c, j, k]) if j else None,
                        }
                        for j, a in enumerate(arm_keys)
                    }
                    for k, m in enumerate(est.metric_keys)
                },
            }
        )
    mo = fit.moments
    return {
        "partition": fit.partition.to_dict(),
        "cohorts": cohorts,
        "arms": list(arm_keys),
        "moments": {
            "components": list(mo.components),
            "n": mo.n.tolist(),
            "mean": np.nan_to_num(mo.mean).tolist(),
            "cov": np.nan_to_num(mo.cov).tolist(),
        },
        "diagnostics": {**fit.diagnostics, "job_seconds": round(seconds, 4)},
        "resolved_params": fit.params,
    }


def moments_of(result: dict[str, Any]) -> CellMoments:
    m = result["moments"]
    return CellMoments(
        components=tuple(m["components"]),
        n=np.array(m["n"], dtype=np.int64),
        mean=np.array(m["mean"], dtype=np.float64),
        cov=np.array(m["cov"], dtype=np.float64),
    )


def partition_of(result: dict[str, Any]) -> Partition:
    return Partition.from_dict(result["partition"])


def estimation_mask(db: Database, result: dict[str, Any], n: int) -> np.ndarray:
    with db.read() as s:
        data = blobs.get_blob(session=s, sha256=result["estimation_mask_blob"])
    return np.unpackbits(np.frombuffer(data, dtype=np.uint8), count=n).astype(bool)


def model_view(row: Any, experiment_key: str, progress: float) -> ModelView:
    """The model's row; once fitted, the parts of its stored result a reader needs (validated
    as they are read); when failed, its error."""
    out: dict[str, Any] = {
        "id": row.id,
        "experiment": experiment_key,
        "version": row.version,
        "method": row.method,
        "params": row.params,
        "status": row.status,
        "job": f"/v1/jobs/{row.job_id}",
        "created_at": row.created_at,
        "created_by": row.created_by,
        "progress": progress,
    }
    res = row.result or {}
    if row.status == "done":
        out.update(
            {
                "cohorts": res["cohorts"],
                "arms": res["arms"],
                "diagnostics": res["diagnostics"],
                "resolved_params": res.get("resolved_params"),
                "partition": res["partition"],
            }
        )
    elif row.status == "failed":
        out["error"] = res.get("error")
    return ModelView.model_validate(out)


def get_model(db: Database, *, model_id: int) -> ModelView:
    with db.read() as s:
        row = repo.get_model(session=s, model_id=model_id)
        exp = s.get(exp_repo.Experiment, row.experiment_id)
        if exp is None:
            raise NotFound(f"experiment of model {model_id} is missing")
        job = job_repo.get_job(session=s, job_id=row.job_id)
        return model_view(row, exp.key, job.progress)
