"""Rows a job fills in later (cohort models, comparisons): numbered per experiment, queued, with
no result until the job writes it."""

from __future__ import annotations

from typing import Any, TypeVar

from sqlalchemy.orm import Session

from apportion.store.db import next_number, utcnow
from apportion.store.tables import CohortModel, Comparison

Row = TypeVar("Row", CohortModel, Comparison)


def add_job_row(
    session: Session,
    table: type[Row],
    number: str,
    *,
    experiment_id: int,
    job_id: str,
    created_by: str,
    **fields: Any,
) -> Row:
    """The experiment's next row of `table`, its column `number` the last one + 1, queued for
    job `job_id`; `fields` are the table's own columns. The caller holds the experiment's lock
    (level 1, store/db.py), which owns the number."""
    column = getattr(table, number)
    row = table(
        experiment_id=experiment_id,
        **{number: next_number(session, column, table.experiment_id == experiment_id)},
        status="queued",
        job_id=job_id,
        result=None,
        created_at=utcnow(),
        created_by=created_by,
        **fields,
    )
    session.add(row)
    session.flush()
    return row
