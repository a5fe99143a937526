"""A live server for the command-line tests: the real app under uvicorn in a thread on a free port
(the same helper the demo uses), and keys of every role made directly in its database.

`live` is a fresh server per test (tests that count what the server holds); `shared_live` is one
server per module, for tests that only add their own named things to it (a plan of their own)
and read a model fitted once per module."""

from __future__ import annotations

import json
import os
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import pytest
from support import make_keys, make_settings, reset_postgres

from apportion.cli import main

PG_URL = os.environ.get("APPORTION_TEST_DATABASE_URL")
BACKENDS = ["sqlite"] + (["postgresql"] if PG_URL else [])


@dataclass
class Live:
    url: str
    keys: dict[str, str]  # role name -> secret (approver2 is a second approver)
    services: object


def _serve(db_url: str) -> Iterator[Live]:
    from apportion.app import create_app
    from apportion.demo.run import serve_in_thread

    app = create_app(make_settings(db_url))
    running = serve_in_thread(app, port=0)
    services = app.state.services
    keys = vars(make_keys(services, prefix="cli"))
    try:
        yield Live(running.url, keys, services)
    finally:
        running.stop()


@pytest.fixture
def live(db_url: str) -> Iterator[Live]:
    yield from _serve(db_url)


@pytest.fixture(scope="module", params=BACKENDS)
def shared_live(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[Live]:
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path_factory.mktemp('cli')}/apportion.db"
    else:
        assert PG_URL
        url = reset_postgres("cli")  # this worker's own database
    yield from _serve(url)


@dataclass
class Result:
    code: int
    out: str
    err: str

    def json(self) -> object:
        return json.loads(self.out)


Runner = Callable[..., Result]


def runner(live: Live, capsys: pytest.CaptureFixture[str]) -> Runner:
    """run('analyst', 'experiment', 'show', 'x', '--json') runs `apportion` as that key."""

    def run(role: str | None, *argv: str) -> Result:
        capsys.readouterr()
        auth = ["--url", live.url] + (["--key", live.keys[role]] if role else [])
        code = main([*argv, *auth])
        cap = capsys.readouterr()
        return Result(code, cap.out, cap.err)

    return run


@pytest.fixture
def cli(live: Live, capsys: pytest.CaptureFixture[str]) -> Runner:
    return runner(live, capsys)


@pytest.fixture
def shared_cli(shared_live: Live, capsys: pytest.CaptureFixture[str]) -> Runner:
    return runner(shared_live, capsys)
