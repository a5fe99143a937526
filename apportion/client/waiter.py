"""Waiting for a job (`GET /v1/jobs/{id}`): the one poller of the project (the command line, the
demo, the tests and the benchmarks all wait through it).

Polls with exponential backoff (common practice for polling: the first look is quick, so short
jobs return fast, and the interval grows by `factor` up to `max_interval`, so long jobs cost few
requests), and reports each view's progress to an optional callback."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, TypeVar

from apportion.client.errors import JobTimeout
from apportion.client.tables import as_json

FINISHED = ("done", "failed")

J = TypeVar("J")
ProgressCallback = Callable[[float, str], None]
"""Called with (fraction done in [0, 1], job status) after every poll."""


@dataclass(frozen=True)
class Backoff:
    """Poll intervals: `first`, then each one `factor` times the last, never above `maximum`."""

    first: float = 0.05
    factor: float = 1.5
    maximum: float = 1.0

    def __post_init__(self) -> None:
        if not (self.first > 0 and self.factor >= 1 and self.maximum >= self.first):
            raise ValueError("backoff needs first > 0, factor >= 1 and maximum >= first")

    def next(self, interval: float) -> float:
        return min(interval * self.factor, self.maximum)


def wait_for_job(
    fetch: Callable[[str], J],
    job_id: str,
    *,
    on_progress: ProgressCallback | None = None,
    backoff: Backoff = Backoff(),
    timeout: float | None = None,
    sleep: Callable[[float], None] = time.sleep,
    clock: Callable[[], float] = time.monotonic,
) -> J:
    """Poll `fetch(job_id)` until the job is done or failed; returns its last view (the caller
    checks `status`). Raises JobTimeout after `timeout` seconds (None: wait as long as it runs).
    `job_id` may also be the job's address (`/v1/jobs/{id}`)."""
    job_id = str(job_id).rsplit("/", 1)[-1]
    start = clock()
    interval = backoff.first
    while True:
        job = fetch(job_id)
        view: dict[str, Any] = as_json(job)  # a JobView, or the plain JSON of one
        status = str(view.get("status"))
        if on_progress is not None:
            done = 1.0 if status == "done" else float(view.get("progress") or 0.0)
            on_progress(min(max(done, 0.0), 1.0), status)
        if status in FINISHED:
            return job
        if timeout is not None and clock() - start >= timeout:
            raise JobTimeout(
                f"job {job_id} still {status} after {timeout:.0f} s; "
                f"follow it with 'apportion job show {job_id}'",
                job,
            )
        sleep(interval)
        interval = backoff.next(interval)
