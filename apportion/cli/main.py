"""Server-side commands: serve, worker, db upgrade, keys create, audit verify, openapi."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from apportion.config import get_settings


def _db():  # type: ignore[no-untyped-def]
    from apportion.store.db import Database

    settings = get_settings()
    return Database.connect(settings.database_url, blob_uri=settings.blob_uri)


# Keep-alive: callers and load balancers reuse connections, and a proxy whose idle timeout
# (commonly 60 s) outlives the server's sends requests onto sockets the server is closing, which
# the caller sees as a failed lookup; so the server waits longer than such a proxy. Backlog: the
# kernel queue of connections not yet accepted, for bursts while every worker is busy (the
# kernel caps it at net.core.somaxconn, 4096 on current Linux).
KEEP_ALIVE_SECONDS = 75
BACKLOG = 2048


def cmd_serve(args: argparse.Namespace) -> int:
    """uvicorn with its standard extras: httptools (a C HTTP parser) and uvloop. Each of
    `--workers` processes builds its own app (key cache, live plans, poller) from the settings."""
    import uvicorn

    if args.workers < 1:
        raise SystemExit("--workers must be at least 1")
    uvicorn.run(
        "apportion.app:create_app",
        factory=True,
        host=args.host,
        port=args.port,
        workers=args.workers,
        http="httptools",
        loop="uvloop",
        timeout_keep_alive=args.keep_alive,
        backlog=args.backlog,
        log_level="warning",
        access_log=False,
    )
    return 0


def cmd_worker(args: argparse.Namespace) -> int:
    """Run job workers as separate processes claiming jobs from the database."""
    import multiprocessing as mp

    if args.processes <= 1:
        return _worker_loop()
    procs = [mp.Process(target=_worker_loop, daemon=False) for _ in range(args.processes)]
    for p in procs:
        p.start()
    for p in procs:
        p.join()
    return 0


def _worker_loop() -> int:
    import signal
    import threading

    from apportion.app import build_services
    from apportion.usecases import comparisons as _comparisons  # noqa: F401  (comparison jobs)
    from apportion.usecases import models as _models  # noqa: F401  (registers the fit handler)
    from apportion.usecases import plans as _plans  # noqa: F401  (registers the report handler)
    from apportion.usecases import sources as _sources  # noqa: F401  (registers readout imports)
    from apportion.usecases.jobs import JobRunner

    settings = get_settings()
    services = build_services(settings)
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
    return 0


def cmd_db(args: argparse.Namespace) -> int:
    from apportion.store.migrate import current_revision, head_revision, upgrade

    db = _db()
    if args.action == "upgrade":
        upgrade(db.engine, blob_uri=db.blobs.uri)
        print(f"database at revision {current_revision(db.engine)}")
    else:
        cur, head = current_revision(db.engine), head_revision()
        print(f"current {cur}, head {head}: {'up to date' if cur == head else 'behind'}")
        return 0 if cur == head else 1
    return 0


def cmd_keys(args: argparse.Namespace) -> int:
    from apportion.store.migrate import upgrade
    from apportion.usecases.auth import SYSTEM, create_key

    db = _db()
    upgrade(db.engine, blob_uri=db.blobs.uri)
    rec, secret = create_key(
        db, name=args.name, owner=args.owner or args.name, role=args.role, actor=SYSTEM
    )
    print(
        f"created key {rec.id} '{rec.name}' with role {rec.role}; the secret is shown once:",
        file=sys.stderr,
    )
    print(secret)
    return 0


def cmd_audit_verify(args: argparse.Namespace) -> int:
    from apportion.store import audit

    db = _db()
    with db.read() as s:
        result = audit.verify(s)
    if args.json:
        print(json.dumps(result.to_dict()))
    elif result.intact:
        print(f"audit chain intact: {result.entries} entries")
    else:
        print(f"audit chain BROKEN at entry {result.first_broken}: {result.problem}")
    return 0 if result.intact else 1


def cmd_openapi(args: argparse.Namespace) -> int:
    from apportion.openapi_export import write_openapi

    path = write_openapi(Path(args.out))
    print(f"wrote {path}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    from apportion.cli import client

    p = argparse.ArgumentParser(prog="apportion", description="Guardrail-aware allocation service")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser(
        "serve",
        help="run the HTTP API (applies migrations first unless APPORTION_MIGRATE_ON_START=false)",
    )
    s.add_argument("--host", default="127.0.0.1")
    s.add_argument("--port", type=int, default=8000)
    s.add_argument(
        "--workers", type=int, default=1, help="server processes sharing the port (one per core)"
    )
    s.add_argument(
        "--keep-alive",
        type=int,
        default=KEEP_ALIVE_SECONDS,
        help="seconds an idle connection stays open (longer than the load balancer's idle timeout)",
    )
    s.add_argument("--backlog", type=int, default=BACKLOG, help="pending-connection queue length")
    s.set_defaults(func=cmd_serve)

    w = sub.add_parser("worker", help="run job workers as separate processes")
    w.add_argument("--processes", type=int, default=1)
    w.set_defaults(func=cmd_worker)

    d = sub.add_parser("db", help="database schema")
    d.add_argument("action", choices=["upgrade", "status"])
    d.set_defaults(func=cmd_db)

    k = sub.add_parser("keys", help="API keys (direct database access, for bootstrapping)")
    ksub = k.add_subparsers(dest="keys_action", required=True)
    kc = ksub.add_parser("create", help="create a key; prints the secret once, as the last line")
    kc.add_argument("--name", required=True)
    kc.add_argument(
        "--owner",
        default=None,
        help="the person or system identity the key belongs to (default: the name; the author "
        "rule compares owners, so give every person's keys that person's owner)",
    )
    kc.add_argument("--role", required=True, choices=["reader", "analyst", "approver", "admin"])
    kc.set_defaults(func=cmd_keys)

    o = sub.add_parser("openapi", help="write the OpenAPI schema")
    o.add_argument("--out", default="openapi/openapi.json")
    o.set_defaults(func=cmd_openapi)

    a = sub.add_parser("audit", help="the audit trail")
    asub = a.add_subparsers(dest="audit_action", required=True)
    av = asub.add_parser(
        "verify", help="verify the hash chain in the database (APPORTION_DATABASE_URL)"
    )
    av.add_argument("--json", action="store_true")
    av.set_defaults(func=cmd_audit_verify)

    client.add_commands(sub, audit=asub)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
