"""The one place tests (and bench/serve.py) get a running server from.

- `thread_server(app)`: the app under uvicorn in a background thread of this process, on a free
  127.0.0.1 port (the demo's own `serve_in_thread`, so tests run the server the demo runs); for the
  browser and command-line tests, which need a real socket but may share the process.
- `Server`: `apportion serve` as a child process on a free port against a given database, with its
  stderr kept in a log file so a failure shows what the server said; for the race and kill -9
  suites, which need two processes or a process to kill, and for the benchmark."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import httpx
from support import Keys, make_keys, reset_postgres

PG_URL = os.environ.get("APPORTION_TEST_DATABASE_URL")
NO_POSTGRES = (
    "PostgreSQL is not configured: set APPORTION_TEST_DATABASE_URL to a throwaway database "
    "(.ci/run does when a server answers on 127.0.0.1:5432)"
)


@contextmanager
def thread_server(app: Any) -> Iterator[str]:
    """Serve `app` (its lifespan runs first) until the block ends; yields its base URL."""
    from apportion.demo.run import serve_in_thread

    running = serve_in_thread(app, port=0)
    try:
        yield running.url
    finally:
        running.stop()


def fresh_database(kind: str, tmp_path: Path) -> str:
    """An empty SQLite file, or the PostgreSQL test database with an empty `public` schema."""
    if kind == "sqlite":
        return f"sqlite:///{tmp_path}/apportion.db"
    assert PG_URL, NO_POSTGRES
    return reset_postgres("server")


def prepare(db_url: str) -> Keys:
    """Migrate the database to head and make one key per role (before any server starts, so that
    two servers never race to migrate and both load the keys at start)."""
    from apportion.store.db import Database
    from apportion.store.migrate import upgrade

    db = Database.connect(db_url, pool_size=2)
    try:
        upgrade(db.engine)
        return make_keys(SimpleNamespace(db=db, keys=SimpleNamespace(refresh=lambda: None)))
    finally:
        db.dispose()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


# what the test servers run with, as in support.make_settings: a short poll, and no held-out job
# per draft (approval would wait for it)
TEST_ENV = {
    "APPORTION_LOG_LEVEL": "WARNING",
    "APPORTION_POLL_INTERVAL_SECONDS": "0.3",
    "APPORTION_DB_POOL_SIZE": "12",
    "APPORTION_HELD_OUT_FOLDS": "0",
}


@dataclass
class Server:
    """A server process in a session of its own (so stopping it stops its worker processes too).

    By default `apportion serve` on 127.0.0.1 with `args` after it (e.g. `--workers 2`) and the
    test settings (`TEST_ENV`, unless `test_settings` is false, as for the benchmark); `command`
    runs another server instead (`{port}` in it is replaced by the chosen port). Ready when
    `ready_path` answers `ready_status` (None: any answer)."""

    db_url: str
    log_path: Path
    env: dict[str, str] = field(default_factory=dict)
    args: list[str] = field(default_factory=list)
    command: list[str] | None = None
    ready_path: str = "/readyz"
    ready_status: int | None = 200
    test_settings: bool = True
    port: int = 0
    proc: subprocess.Popen | None = None  # type: ignore[type-arg]

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    @property
    def pid(self) -> int:
        assert self.proc is not None
        return self.proc.pid

    def start(self, timeout: float = 90.0) -> Server:
        return self.launch().wait_ready(timeout)

    def launch(self) -> Server:
        """Start the process without waiting (start two, then wait for both)."""
        self.port = _free_port()
        env = {
            **os.environ,
            "APPORTION_DATABASE_URL": self.db_url,
            **(TEST_ENV if self.test_settings else {}),
            **self.env,
        }
        argv = (
            [a.replace("{port}", str(self.port)) for a in self.command]
            if self.command
            else [sys.executable, "-m", "apportion.cli", "serve", "--host", "127.0.0.1",
                  "--port", str(self.port), *self.args]
        )  # fmt: skip
        log = open(self.log_path, "ab")  # noqa: SIM115 - the child writes it until it exits
        self.proc = subprocess.Popen(
            argv, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True
        )
        log.close()
        return self

    def wait_ready(self, timeout: float = 90.0) -> Server:
        assert self.proc is not None
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"server exited at start:\n{self.log()}")
            try:
                r = httpx.get(self.url + self.ready_path, timeout=1.0)
                if self.ready_status is None or r.status_code == self.ready_status:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        self.kill9()
        raise AssertionError(f"server not ready in {timeout} s:\n{self.log()}")

    def _signal(self, sig: int) -> None:
        try:
            os.killpg(self.pid, sig)  # the server and any worker processes it started
        except ProcessLookupError:
            pass

    def kill9(self) -> None:
        """SIGKILL: no shutdown hook, no flush, no rollback runs in the process."""
        if self.proc is not None and self.proc.poll() is None:
            self._signal(signal.SIGKILL)
            self.proc.wait(timeout=30)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self._signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.kill9()

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def client(self) -> httpx.Client:
        return httpx.Client(base_url=self.url, timeout=120.0)
