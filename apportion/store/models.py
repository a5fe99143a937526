"""Cohort model records: immutable once fitted, versioned per experiment."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from apportion.errors import NotFound
from apportion.store.jobrows import add_job_row
from apportion.store.tables import CohortModel


def add_model(
    *,
    session: Session,
    experiment_id: int,
    readout_id: int,
    method: str,
    params: dict[str, Any],
    job_id: str,
    created_by: str,
) -> CohortModel:
    """The next model version of the experiment; the caller holds the experiment's lock."""
    return add_job_row(
        session,
        CohortModel,
        "version",
        experiment_id=experiment_id,
        job_id=job_id,
        created_by=created_by,
        readout_id=readout_id,
        method=method,
        params=params,
    )


def get_model(*, session: Session, model_id: int) -> CohortModel:
    row = session.get(CohortModel, model_id)
    if row is None:
        raise NotFound(f"no cohort model with id {model_id}")
    return row


def model_for_job(*, session: Session, job_id: str, lock: bool = False) -> CohortModel | None:
    q = select(CohortModel).where(CohortModel.job_id == job_id)
    if lock:  # see the committed status even if the fit finished a moment ago
        q = q.with_for_update().execution_options(populate_existing=True)
    return session.execute(q).scalar_one_or_none()


def set_result(
    *, session: Session, model_id: int, status: str, result: dict[str, Any] | None
) -> None:
    row = get_model(session=session, model_id=model_id)
    if row.status == "done":
        raise RuntimeError(f"cohort model {model_id} is already fitted and immutable")
    row.status = status
    row.result = result
    session.flush()
