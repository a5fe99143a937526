"""`apportion experiment create|show` and `apportion readout upload|show`."""

from __future__ import annotations

from typing import Annotated

import typer

from apportion.cli.common import Conn, client_command, read_json_file, read_upload
from apportion.client import as_json, render

experiment = typer.Typer(help="declare and read experiments (HTTP)", no_args_is_help=True)
readout = typer.Typer(help="upload and read readouts (HTTP)", no_args_is_help=True)


@client_command(experiment, "create", "declare an experiment from a JSON file")
def create(
    conn: Conn,
    file: Annotated[str, typer.Argument(
        help="JSON declaration (key, arms, control, metrics, features); - = stdin")],
) -> None:  # fmt: skip
    decl = read_json_file(file)
    with conn.client() as api:
        got = api.create_experiment(decl)
    kept_out = sum(1 for f in got.features if not f.personalize)
    conn.emit(got, lambda: (
        f"declared experiment '{got.key}': {len(got.arms)} arms (control {got.control}), "
        f"{len(got.metrics)} metrics, {len(got.features)} features"
        + (f" ({kept_out} not used for personalization)" if kept_out else "")))  # fmt: skip


@client_command(experiment, "show", "an experiment's declaration and readouts")
def show(conn: Conn, key: str) -> None:
    with conn.client() as api:
        got = api.experiment(key)
    conn.emit(got, lambda: render.experiment_view(got))


@client_command(readout, "upload", "upload unit-level rows (CSV, Parquet, NDJSON)")
def upload(
    conn: Conn,
    key: Annotated[str, typer.Argument(help="experiment key")],
    file: str,
    content_type: Annotated[
        str | None, typer.Option("--content-type", help="default: from the file extension")
    ] = None,
) -> None:
    data, ctype = read_upload(file, content_type)
    with conn.client() as api:
        got, created = api.upload_readout(key, data, ctype)
    conn.emit({**as_json(got), "created": created}, lambda: render.readout_view(got, created))


@client_command(readout, "show", "a readout's per-arm summary")
def show_readout(conn: Conn, key: str, version: int) -> None:
    with conn.client() as api:
        got = api.readout(key, version)
    conn.emit(got, lambda: render.readout_view(got))
