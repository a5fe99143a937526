"""Method comparison records: numbered per experiment, the result written once by the job."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from apportion.errors import NotFound
from apportion.store.jobrows import add_job_row
from apportion.store.tables import Comparison


def add_comparison(
    *,
    session: Session,
    experiment_id: int,
    readout_id: int,
    model_id: int | None,
    spec: dict[str, Any],
    job_id: str,
    created_by: str,
) -> Comparison:
    """The experiment's next comparison; the caller holds the experiment's lock (level 1)."""
    return add_job_row(
        session,
        Comparison,
        "number",
        experiment_id=experiment_id,
        job_id=job_id,
        created_by=created_by,
        readout_id=readout_id,
        model_id=model_id,
        spec=spec,
    )


def get_comparison(*, session: Session, experiment_id: int, number: int) -> Comparison:
    q = select(Comparison).where(
        Comparison.experiment_id == experiment_id, Comparison.number == number
    )
    row = session.execute(q).scalar_one_or_none()
    if row is None:
        raise NotFound(f"no comparison {number} for this experiment")
    return row


def get_by_id(*, session: Session, comparison_id: int) -> Comparison:
    row = session.get(Comparison, comparison_id)
    if row is None:
        raise NotFound(f"no comparison with id {comparison_id}")
    return row


def list_comparisons(*, session: Session, experiment_id: int) -> list[Comparison]:
    q = (
        select(Comparison)
        .where(Comparison.experiment_id == experiment_id)
        .order_by(Comparison.number)
    )
    return list(session.execute(q).scalars())


def comparison_for_job(*, session: Session, job_id: str, lock: bool = False) -> Comparison | None:
    q = select(Comparison).where(Comparison.job_id == job_id)
    if lock:  # see the committed status even if the job finished a moment ago
        q = q.with_for_update().execution_options(populate_existing=True)
    return session.execute(q).scalar_one_or_none()


def set_status(*, session: Session, comparison_id: int, status: str) -> None:
    get_by_id(session=session, comparison_id=comparison_id).status = status
    session.flush()


def set_result(
    *, session: Session, comparison_id: int, status: str, result: dict[str, Any]
) -> None:
    row = get_by_id(session=session, comparison_id=comparison_id)
    if row.status == "done":
        raise RuntimeError(f"comparison {comparison_id} is already done and immutable")
    row.status = status
    row.result = result
    session.flush()
