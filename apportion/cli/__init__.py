"""The `apportion` command: typer commands per resource on the HTTP client
(`apportion.client`), and the server-side commands (serve, worker, db, openapi, keys create,
audit verify)."""

from apportion.cli.app import main

__all__ = ["main"]
