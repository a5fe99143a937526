"""HTTP client commands for analysts (talk to a running server)."""

from __future__ import annotations

import argparse


def add_commands(sub: argparse._SubParsersAction, *, audit: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Registers the client commands; filled in by the analyst command line."""
    del sub, audit
