"""Jobs recorded in the database: queued -> running -> done | failed.

Workers claim with `SELECT ... FOR UPDATE SKIP LOCKED` on PostgreSQL (two workers never take the
same job); SQLite write transactions are serialized by BEGIN IMMEDIATE. A running job whose
heartbeat is older than the stale limit was interrupted (a crash): it is queued again while it
has attempts left, else marked failed with a readable error.
"""

from __future__ import annotations

import time
import uuid
from typing import Any

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from apportion.errors import JobLost, NotFound
from apportion.store.db import rowcount, utcnow
from apportion.store.tables import Job

MAX_ATTEMPTS = 2


def create_job(*, session: Session, kind: str, payload: dict[str, Any]) -> Job:
    row = Job(
        id=str(uuid.uuid4()),
        kind=kind,
        status="queued",
        progress=0.0,
        payload=payload,
        attempts=0,
        created_at=utcnow(),
    )
    session.add(row)
    session.flush()
    return row


def get_job(*, session: Session, job_id: str) -> Job:
    row = session.get(Job, job_id)
    if row is None:
        raise NotFound(f"no job with id '{job_id}'")
    return row


def claim_next(
    *, session: Session, worker: str, kinds: tuple[str, ...] | None = None
) -> Job | None:
    q = select(Job).where(Job.status == "queued").order_by(Job.created_at).limit(1)
    if kinds:
        q = q.where(Job.kind.in_(kinds))
    if session.bind is not None and session.bind.dialect.name == "postgresql":
        q = q.with_for_update(skip_locked=True)
    row = session.execute(q).scalar_one_or_none()
    if row is None:
        return None
    row.status = "running"
    row.worker = worker
    row.attempts += 1
    row.started_at = utcnow()
    row.heartbeat_at = time.time()
    row.progress = 0.0
    session.flush()
    return row


def _held(job: Job) -> Any:
    """The claim a worker holds: this job, still running, by this worker, on this attempt. A job
    reclaimed while its worker was only slow (requeued, perhaps claimed again elsewhere) is no
    longer held, so the old worker's late writes match no row."""
    return (
        (Job.id == job.id)
        & (Job.status == "running")
        & (Job.worker == job.worker)
        & (Job.attempts == job.attempts)
    )


def set_progress(*, session: Session, job: Job, progress: float) -> bool:
    """Progress and heartbeat; False when the job is no longer held (the worker should stop)."""
    res = session.execute(
        update(Job)
        .where(_held(job))
        .values(progress=max(0.0, min(1.0, progress)), heartbeat_at=time.time())
    )
    return bool(rowcount(res))


def finish(*, session: Session, job: Job) -> None:
    """Mark a held job done; raises JobLost (rolling back the caller's transaction, and so the
    result it was about to store) when the job was reclaimed meanwhile."""
    res = session.execute(
        update(Job)
        .where(_held(job))
        .values(status="done", progress=1.0, finished_at=utcnow(), error=None)
    )
    if not rowcount(res):
        raise JobLost(job.id)


def fail(*, session: Session, job: Job, error: str) -> bool:
    """Mark a held job failed; False (and nothing written) when it was reclaimed meanwhile."""
    res = session.execute(
        update(Job).where(_held(job)).values(status="failed", finished_at=utcnow(), error=error)
    )
    return bool(rowcount(res))


def reclaim_stale(*, session: Session, stale_seconds: float) -> list[Job]:
    """Requeue or fail running jobs whose heartbeat stopped; returns the reclaimed rows with their
    new status. The rows are locked (SKIP LOCKED on PostgreSQL) so two reclaiming processes never
    handle the same job; the caller finishes what a failed job was making (usecases/jobs.py)."""
    cutoff = time.time() - stale_seconds
    q = select(Job).where(Job.status == "running", Job.heartbeat_at < cutoff).order_by(Job.id)
    if session.bind is not None and session.bind.dialect.name == "postgresql":
        q = q.with_for_update(skip_locked=True)
    rows = session.execute(q).scalars().all()
    for row in rows:
        if row.attempts < MAX_ATTEMPTS:
            row.status, row.worker = "queued", None
        else:
            row.status = "failed"
            row.finished_at = utcnow()
            row.error = f"interrupted: no heartbeat for more than {stale_seconds:.0f} s after {row.attempts} attempts"
    session.flush()
    return list(rows)
