"""A real server for browser tests and the screenshot script: the app in a background thread on a
free 127.0.0.1 port (tests/servers.py), keys for every role, and the scenario plan drafted through the HTTP API.

Chromium comes from Debian's `chromium` package at /usr/bin/chromium (never a browser download);
`launch_chromium` points Playwright at it."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
SKIP_REASON = (
    f"{CHROMIUM} is absent: install Debian's chromium package (apt-get install chromium) "
    "to run the review-page browser tests"
)


@dataclass
class Live:
    base: str
    client: httpx.Client
    keys: Any  # support.Keys
    services: Any


@contextmanager
def live_server(db_url: str) -> Iterator[Live]:
    """Start the app on a free port (servers.thread_server); stop it on exit."""
    from servers import thread_server
    from support import make_keys, make_settings

    from apportion.app import create_app

    app = create_app(make_settings(db_url))
    with thread_server(app) as base:
        services = app.state.services
        keys = make_keys(services)
        with httpx.Client(base_url=base, timeout=180) as client:
            yield Live(base=base, client=client, keys=keys, services=services)


def build_plan(
    live: Live, *, n: int = 40000, params: dict[str, Any] | None = None, **draft: Any
) -> tuple[int, dict[str, Any]]:
    """The scenario's causal-tree model (tree `params`, default tests/support.py's) and a first
    draft of plan lesson-length (tests/support.py defaults, overridden by `draft`): (model id,
    version)."""
    from support import draft_plan, scenario_model

    model_id = scenario_model(live.client, live.keys, n=n, seed=1, params=params)
    return model_id, draft_plan(live.client, live.keys, model_id, **draft)


def launch_chromium(playwright: Any) -> Any:
    return playwright.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
