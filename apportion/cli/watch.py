"""`apportion watch upload|show|auto-rollback`: the guardrail watch of a live plan."""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated

import typer

from apportion.cli.common import Conn, client_command, read_upload
from apportion.client import as_json, render

watch = typer.Typer(help="the guardrail watch of a live plan (HTTP)", no_args_is_help=True)


class OnOff(StrEnum):
    on = "on"
    off = "off"


@client_command(watch, "upload", "upload post-launch rows (member_id, features, holdout, metrics)")
def upload(
    conn: Conn,
    plan: str,
    file: str,
    version: Annotated[int | None, typer.Option(
        "--version", help="default: the live version")] = None,
    content_type: Annotated[str | None, typer.Option(
        "--content-type", help="default: from the file extension")] = None,
) -> None:  # fmt: skip
    data, ctype = read_upload(file, content_type)
    with conn.client() as api:
        got = api.monitor(plan, data, ctype, version)
    conn.emit(got, lambda: render.watch_upload_view(got))


@client_command(watch, "show", "each guardrail's status and latest always-valid interval")
def show(conn: Conn, plan: str) -> None:
    with conn.client() as api:
        got = api.watch(plan)
    conn.emit(got, lambda: render.watch_view(got))


@client_command(watch, "auto-rollback", "turn automatic rollback on or off (approver key)")
def auto_rollback(
    conn: Conn,
    plan: str,
    state: OnOff,
    reason: Annotated[str, typer.Option("--reason")],
    min_units: Annotated[int, typer.Option(
        "--min-units", help="members per group before it may act")] = 1000,
) -> None:  # fmt: skip
    with conn.client() as api:
        got = api.set_auto_rollback(plan, enabled=state is OnOff.on,
                                    min_units_per_group=min_units, reason=reason)  # fmt: skip
    conn.emit(got, lambda: f"{got.plan}: automatic rollback {state.value} "
                           f"({render.cell(as_json(got.auto_rollback))})")  # fmt: skip
