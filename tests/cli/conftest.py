"""A live server for the command-line tests: the real app under uvicorn in a thread on a free port
(the same helper the demo uses), and keys of every role made directly in its database."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from dataclasses import dataclass

import pytest
from support import make_keys, make_settings

from apportion.cli.main import main


@dataclass
class Live:
    url: str
    keys: dict[str, str]  # role name -> secret (approver2 is a second approver)
    services: object


@pytest.fixture
def live(db_url: str) -> Iterator[Live]:
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


@dataclass
class Result:
    code: int
    out: str
    err: str

    def json(self) -> object:
        return json.loads(self.out)


@pytest.fixture
def cli(live: Live, capsys: pytest.CaptureFixture[str]) -> Callable[..., Result]:
    """cli('analyst', 'experiment', 'show', 'x', '--json') runs `apportion` as that key."""

    def run(role: str | None, *argv: str) -> Result:
        capsys.readouterr()
        auth = ["--url", live.url] + (["--key", live.keys[role]] if role else [])
        code = main([*argv, *auth])
        cap = capsys.readouterr()
        return Result(code, cap.out, cap.err)

    return run
