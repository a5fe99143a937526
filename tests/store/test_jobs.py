"""Jobs: two workers never take the same job, and an interrupted job is picked up again or
marked failed, never left running."""

from __future__ import annotations

import threading
import time

import pytest
from support import make_settings

from apportion.app import build_services
from apportion.errors import JobLost
from apportion.store import jobs as repo
from apportion.store.migrate import upgrade
from apportion.usecases import jobs as uc


def _services(db_url: str):  # type: ignore[no-untyped-def]
    s = build_services(make_settings(db_url, job_stale_seconds=1.0))
    upgrade(s.db.engine)
    return s


def test_two_workers_never_run_the_same_job(db_url: str, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    a, b = _services(db_url), _services(db_url)
    runs: list[tuple[str, str]] = []
    lock = threading.Lock()

    def handler(services, job, progress):  # type: ignore[no-untyped-def]
        time.sleep(0.005)
        with lock:
            runs.append((job.id, services.extras["name"]))
        with services.db.write() as s:
            repo.finish(session=s, job=job)

    monkeypatch.setitem(uc.HANDLERS, "probe", handler)
    a.extras["name"], b.extras["name"] = "a", "b"
    with a.db.write() as s:
        ids = [repo.create_job(session=s, kind="probe", payload={}).id for _ in range(40)]

    def drain(services, worker):  # type: ignore[no-untyped-def]
        while uc.run_one(services, worker):
            pass

    threads = [
        threading.Thread(target=drain, args=(a, "wa")),
        threading.Thread(target=drain, args=(b, "wb")),
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(j for j, _ in runs) == sorted(ids)  # each exactly once
    with a.db.read() as s:
        assert all(repo.get_job(session=s, job_id=i).status == "done" for i in ids)
    a.db.dispose()
    b.db.dispose()


def test_interrupted_job_is_requeued_then_failed(db_url: str) -> None:
    services = _services(db_url)
    with services.db.write() as s:
        job = repo.create_job(session=s, kind="probe", payload={})
        job_id = job.id
    # a worker claims it and "crashes": no heartbeat from now on
    with services.db.write() as s:
        assert repo.claim_next(session=s, worker="dead", kinds=("probe",)).id == job_id
    time.sleep(1.2)
    runner = uc.JobRunner(services, worker_name="fresh")
    runner.reclaim()
    with services.db.read() as s:
        assert repo.get_job(session=s, job_id=job_id).status == "queued"
    with services.db.write() as s:
        repo.claim_next(session=s, worker="dead-again", kinds=("probe",))
    time.sleep(1.2)
    runner.reclaim()
    with services.db.read() as s:
        row = repo.get_job(session=s, job_id=job_id)
        assert row.status == "failed" and row.error.startswith("interrupted: no heartbeat")
    services.db.dispose()


def test_an_interrupted_fit_that_runs_out_of_attempts_leaves_its_model_failed(db_url: str) -> None:
    """Issue 10 item 5: the reclaim that fails the job fails its model too, with the job's error
    (before, the model stayed `running` forever)."""
    from support import EXPERIMENT, rows_csv

    from apportion.domain import Actor
    from apportion.schemas.experiments import ExperimentIn
    from apportion.schemas.models import FitIn
    from apportion.usecases import experiments, models

    services = _services(db_url)
    analyst = Actor("t-analyst", "analyst")
    experiments.declare(services.db, command=ExperimentIn.model_validate(EXPERIMENT), actor=analyst)
    experiments.upload_readout(
        services.db, key="checkout-copy", body=rows_csv(300), content_type="text/csv", actor=analyst
    )
    started = models.start_fit(
        services,
        key="checkout-copy",
        command=FitIn(readout_version=1, method="global"),
        actor=analyst,
    )
    runner = uc.JobRunner(services, worker_name="fresh")
    for attempt in (1, 2):
        # a worker claims the fit, marks the model running as the handler does, then dies
        with services.db.write() as s:
            assert repo.claim_next(session=s, worker=f"dead-{attempt}", kinds=("fit",)) is not None
            models.repo.get_model(session=s, model_id=started.model_id).status = "running"
        time.sleep(1.2)
        runner.reclaim()
    job = uc.get_job(services, started.job_id)
    model = models.get_model(services.db, model_id=started.model_id)
    assert job.status == "failed" and job.error
    assert job.error.startswith("interrupted: no heartbeat")
    assert model.status == "failed" and model.error == job.error
    services.db.dispose()


def test_a_slow_worker_whose_job_was_reclaimed_stores_nothing(db_url: str, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    """Issue 10: a job's finish was unconditional, so a worker that was only slow (its job
    reclaimed and run again by another) overwrote the second run's result with its own. Writes are
    now conditioned on the claim (job, worker, attempt); the late finish rolls its transaction back
    and the late failure writes nothing."""
    services = _services(db_url)
    results: list[str] = []

    def handler(services, job, progress):  # type: ignore[no-untyped-def]
        with services.db.write() as s:
            results.append(job.worker)  # "the result": kept only when the finish commits
            repo.finish(session=s, job=job)

    monkeypatch.setitem(uc.HANDLERS, "probe", handler)
    with services.db.write() as s:
        job_id = repo.create_job(session=s, kind="probe", payload={}).id
    with services.db.write() as s:
        slow = repo.claim_next(session=s, worker="slow", kinds=("probe",))
        s.expunge(slow)
    time.sleep(1.2)
    uc.JobRunner(services, worker_name="fresh").reclaim()  # requeued: attempt 1 looked dead
    assert uc.run_one(services, "fresh")  # attempt 2 runs and finishes
    with services.db.read() as s:
        done = repo.get_job(session=s, job_id=job_id)
        assert done.status == "done" and done.worker == "fresh" and done.attempts == 2
    # the slow attempt 1 now tries to finish, to fail, and to report progress: all refused
    with pytest.raises(JobLost):
        with services.db.write() as s:
            repo.finish(session=s, job=slow)
    with services.db.write() as s:
        assert repo.fail(session=s, job=slow, error="late") is False
        assert repo.set_progress(session=s, job=slow, progress=0.5) is False
    with services.db.read() as s:
        row = repo.get_job(session=s, job_id=job_id)
        assert (row.status, row.worker, row.error, row.progress) == ("done", "fresh", None, 1.0)
    services.db.dispose()


def test_runners_in_one_process_have_distinct_names(db_url: str) -> None:
    services = _services(db_url)
    assert uc.JobRunner(services).worker != uc.JobRunner(services).worker
    services.db.dispose()
