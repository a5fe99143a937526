"""Server-side commands: `apportion serve`, `worker`, `db upgrade|status`, `openapi`."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager
from enum import StrEnum
from pathlib import Path
from typing import Annotated, Any

import typer

from apportion.config import get_settings

# Keep-alive: callers and load balancers reuse connections, and a proxy whose idle timeout
# (commonly 60 s) outlives the server's sends requests onto sockets the server is closing, which
# the caller sees as a failed lookup; so the server waits longer than such a proxy. Backlog: the
# kernel queue of connections not yet accepted, for bursts while every worker is busy (the
# kernel caps it at net.core.somaxconn, 4096 on current Linux).
KEEP_ALIVE_SECONDS = 75
BACKLOG = 2048


@contextmanager
def database() -> Iterator[Any]:
    """The database the settings name (APPORTION_DATABASE_URL, APPORTION_BLOB_URI), its
    connections closed when the block ends (a command run in-process leaves none open)."""
    from apportion.usecases.operations import open_database

    db = open_database(get_settings())
    try:
        yield db
    finally:
        db.dispose()


def serve(
    host: Annotated[str, typer.Option("--host")] = "127.0.0.1",
    port: Annotated[int, typer.Option("--port")] = 8000,
    workers: Annotated[int, typer.Option(
        "--workers", min=1, help="server processes sharing the port (one per core)")] = 1,
    keep_alive: Annotated[int, typer.Option(
        "--keep-alive", help="seconds an idle connection stays open (longer than the load "
        "balancer's idle timeout)")] = KEEP_ALIVE_SECONDS,
    backlog: Annotated[int, typer.Option(
        "--backlog", help="pending-connection queue length")] = BACKLOG,
) -> None:  # fmt: skip
    """Run the HTTP API (applies migrations first unless APPORTION_MIGRATE_ON_START=false).

    uvicorn with its standard extras: httptools (a C HTTP parser) and uvloop. Each of `--workers`
    processes builds its own app (key cache, live plans, poller) from the settings."""
    import uvicorn

    uvicorn.run(
        "apportion.app:create_app",
        factory=True,
        host=host,
        port=port,
        workers=workers,
        http="httptools",
        loop="uvloop",
        timeout_keep_alive=keep_alive,
        backlog=backlog,
        log_level="warning",
        access_log=False,
    )


def worker(processes: Annotated[int, typer.Option("--processes", min=1)] = 1) -> None:
    """Run job workers as separate processes claiming jobs from the database."""
    import multiprocessing as mp

    if processes <= 1:
        _worker_loop()
        return
    procs = [mp.Process(target=_worker_loop, daemon=False) for _ in range(processes)]
    for p in procs:
        p.start()
    for p in procs:
        p.join()


def _worker_loop() -> None:
    import signal
    import threading

    from apportion.app import build_services
    from apportion.usecases import comparisons as _comparisons  # noqa: F401  (comparison jobs)
    from apportion.usecases import models as _models  # noqa: F401  (registers the fit handler)
    from apportion.usecases import plans as _plans  # noqa: F401  (registers the report handler)
    from apportion.usecases import sources as _sources  # noqa: F401  (registers readout imports)
    from apportion.usecases.jobs import JobRunner

    services = build_services(get_settings())
    runner = JobRunner(services)
    done = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: done.set())
    runner.start()
    print(f"worker {runner.worker} waiting for jobs", file=sys.stderr)
    try:
        done.wait()
    except KeyboardInterrupt:
        pass
    runner.stop()


class DbAction(StrEnum):
    upgrade = "upgrade"
    status = "status"


def db(action: DbAction) -> None:
    """Bring the schema to the newest revision (upgrade), or compare it with it (status)."""
    from apportion.usecases.operations import migration_state, upgrade_database

    with database() as d:
        if action is DbAction.upgrade:
            upgrade_database(d)
            print(f"database at revision {migration_state(d)[0]}")
            return
        cur, head = migration_state(d)
    print(f"current {cur}, head {head}: {'up to date' if cur == head else 'behind'}")
    if cur != head:
        raise typer.Exit(1)


def openapi(out: Annotated[str, typer.Option("--out")] = "openapi/openapi.json") -> None:
    """Write the OpenAPI schema."""
    from apportion.openapi_export import write_openapi

    print(f"wrote {write_openapi(Path(out))}")
