"""Running jobs off the request path: a worker thread in the server (default) or `apportion worker`
processes, all claiming from the jobs table. Handlers are registered by kind."""

from __future__ import annotations

import logging
import os
import socket
import threading
import time
import uuid
from collections.abc import Callable
from typing import Any

from apportion.errors import ApportionError, JobLost
from apportion.observability import JOB_FAILURES, JOB_SECONDS
from apportion.schemas.jobs import JobView
from apportion.store import jobs as repo
from apportion.store.tables import Job
from apportion.usecases.context import Services

log = logging.getLogger("apportion.jobs")
Handler = Callable[[Services, Job, Callable[[float], None]], None]
HANDLERS: dict[str, Handler] = {}


def handler(kind: str) -> Callable[[Handler], Handler]:
    def register(fn: Handler) -> Handler:
        HANDLERS[kind] = fn
        return fn

    return register


def job_view(row: Job) -> JobView:
    return JobView(
        id=row.id,
        kind=row.kind,
        status=row.status,  # type: ignore[arg-type]
        progress=round(float(row.progress), 4),
        error=row.error,
        attempts=row.attempts,
        created_at=row.created_at,
        started_at=row.started_at,
        finished_at=row.finished_at,
        result=(row.payload or {}).get("result"),
    )


def get_job(services: Services, job_id: str) -> JobView:
    with services.db.read() as s:
        return job_view(repo.get_job(session=s, job_id=job_id))


def run_one(services: Services, worker: str) -> bool:
    """Claim and run one queued job; False when there was none."""
    with services.db.write() as s:
        job = repo.claim_next(session=s, worker=worker, kinds=tuple(HANDLERS))
        if job is None:
            return False
        s.expunge(job)
    start = time.perf_counter()
    last = [0.0]

    def progress(p: float) -> None:
        now = time.perf_counter()
        if now - last[0] >= 0.2 or p >= 1.0:  # heartbeat at most five times a second
            last[0] = now
            with services.db.write() as s2:
                held = repo.set_progress(session=s2, job=job, progress=p)
            if not held:  # reclaimed meanwhile: stop working on it
                raise JobLost(job.id)

    try:
        HANDLERS[job.kind](services, job, progress)
    except JobLost:  # another attempt owns the job now; write nothing
        log.warning("job reclaimed while it ran", extra={"job_id": job.id, "kind": job.kind})
    except Exception as exc:  # the job fails; the worker lives on
        msg = exc.detail if isinstance(exc, ApportionError) else f"{type(exc).__name__}: {exc}"
        if not isinstance(exc, ApportionError):
            log.error("job failed", exc_info=exc, extra={"job_id": job.id, "kind": job.kind})
        JOB_FAILURES.labels(job.kind).inc()
        with services.db.write() as s3:
            if repo.fail(session=s3, job=job, error=msg[:2000]):
                _on_failed(s3, job, msg[:2000])
    else:
        JOB_SECONDS.labels(job.kind).observe(time.perf_counter() - start)
    return True


# What a failed job was making (a cohort model, say) ends failed with the job's error. Every way a
# job fails goes through `_on_failed`: its handler raised (run_one) or its worker died (reclaim).
FAILURE_HOOKS: dict[str, Callable[[Any, Job, str], None]] = {}


def _on_failed(session: Any, job: Job, message: str) -> None:
    """Run after the job row is marked failed (lock order, store/db.py: the job row, then the rows
    of what it was making)."""
    hook = FAILURE_HOOKS.get(job.kind)
    if hook is not None:
        hook(session, job, message)


class JobRunner:
    """A worker thread: reclaims interrupted jobs on start, then claims and runs queued ones."""

    def __init__(
        self, services: Services, *, worker_name: str | None = None, idle_seconds: float = 0.5
    ) -> None:
        self.services = services
        # unique per runner: two apps in one process (tests, `--workers` forks) must not share
        # the claim a job's writes are conditioned on (store/jobs.py `_held`)
        self.worker = worker_name or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self.idle = idle_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def start(self) -> None:
        self.reclaim()
        self._thread = threading.Thread(target=self._loop, name=f"jobs-{self.worker}", daemon=True)
        self._thread.start()

    def reclaim(self) -> None:
        with self.services.db.write() as s:
            for job in repo.reclaim_stale(
                session=s, stale_seconds=self.services.settings.job_stale_seconds
            ):
                if job.status == "failed":
                    _on_failed(s, job, job.error or "interrupted")
                log.warning(
                    "reclaimed an interrupted job", extra={"job_id": job.id, "status": job.status}
                )

    def wake(self) -> None:
        self._wake.set()

    def stop(self) -> None:
        self._stop.set()
        self._wake.set()
        if self._thread is not None:
            self._thread.join(timeout=30)

    def _loop(self) -> None:
        last_reclaim = time.monotonic()
        while not self._stop.is_set():
            try:
                ran = run_one(self.services, self.worker)
                if time.monotonic() - last_reclaim > 60:
                    self.reclaim()
                    last_reclaim = time.monotonic()
            except Exception as exc:
                log.error("job loop error", exc_info=exc)
                ran = False
            if not ran:
                self._wake.wait(self.idle)
                self._wake.clear()


def notify(services: Services) -> None:
    if services.jobs is not None:
        services.jobs.wake()
