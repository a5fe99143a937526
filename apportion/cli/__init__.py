"""The `apportion` command: server-side commands here, HTTP client commands in `client.py`."""

from apportion.cli.main import main

__all__ = ["main"]
