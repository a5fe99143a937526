"""`apportion audit show|check` (through the API) and `apportion audit verify` (straight on the
database named by APPORTION_DATABASE_URL); `apportion keys create` (database, for bootstrapping)
and `apportion keys issue` (through the API)."""

from __future__ import annotations

import json
import sys
from enum import StrEnum
from typing import Annotated

import typer

from apportion.cli.common import Conn, client_command, console
from apportion.client import as_json, render

audit = typer.Typer(help="the audit trail", no_args_is_help=True)
keys = typer.Typer(help="API keys", no_args_is_help=True)


class Role(StrEnum):
    """The key roles the server knows (a test keeps them equal to its list)."""

    reader = "reader"
    analyst = "analyst"
    approver = "approver"
    admin = "admin"


@client_command(audit, "show", "the audit trail, oldest first (HTTP)")
def show(
    conn: Conn,
    entity: Annotated[str | None, typer.Option("--entity")] = None,
    entity_id: Annotated[str | None, typer.Option("--entity-id")] = None,
    actor: Annotated[str | None, typer.Option("--actor")] = None,
    since: Annotated[str | None, typer.Option("--since", help="ISO-8601 UTC time")] = None,
    limit: Annotated[int, typer.Option("--limit")] = 100,
    all_pages: Annotated[bool, typer.Option("--all", help="follow pages to the end")] = False,
) -> None:
    with conn.client() as api:
        got = api.audit(entity=entity, entity_id=entity_id, actor=actor, since=since,
                        limit=limit, all_pages=all_pages)  # fmt: skip
    conn.emit(got, lambda: render.audit_table(got))


@client_command(audit, "check", "verify the hash chain through the API (admin key)")
def check(conn: Conn) -> None:
    with conn.client() as api:
        got = api.audit_verify()
    conn.emit(got, lambda: render.chain_line(got))
    if not got.intact:
        raise typer.Exit(1)


@audit.command("verify", help="verify the hash chain in the database (APPORTION_DATABASE_URL)")
def verify(json_out: Annotated[bool, typer.Option("--json")] = False) -> None:
    from apportion.cli.server import database
    from apportion.usecases.audit import verify as verify_chain

    with database() as db:
        result = verify_chain(db).model_dump(mode="json")
    if json_out:
        print(json.dumps(result))
    else:
        print(render.chain_line(result))
    if not result["intact"]:
        raise typer.Exit(1)


@keys.command("create", help="create a key; prints the secret once, as the last line")
def create(
    name: Annotated[str, typer.Option("--name")],
    role: Annotated[Role, typer.Option("--role")],
    owner: Annotated[str | None, typer.Option(
        "--owner", help="the person or system identity the key belongs to (default: the name; "
        "the author rule compares owners, so give every person's keys that person's owner)")] = None,
) -> None:  # fmt: skip
    from apportion.cli.server import database
    from apportion.usecases.auth import SYSTEM, create_key
    from apportion.usecases.operations import upgrade_database

    with database() as db:
        upgrade_database(db)
        rec, secret = create_key(db, name=name, owner=owner or name, role=role.value,
                                 actor=SYSTEM)  # fmt: skip
    console(stderr=True).print(
        f"created key {rec.id} '{rec.name}' with role {rec.role}; the secret is shown once:"
    )
    print(secret)


@client_command(keys, "issue", "create a key through the API (admin key)")
def issue(
    conn: Conn,
    name: Annotated[str, typer.Option("--name")],
    owner: Annotated[str, typer.Option(
        "--owner", help="the person or system identity the key belongs to")],
    role: Annotated[Role, typer.Option("--role")],
) -> None:  # fmt: skip
    with conn.client() as api:
        got = api.create_key(name, role.value, owner=owner)
    if conn.json:
        print(json.dumps(as_json(got), indent=2))
        return
    print(
        f"created key {got.id} '{got.name}' of {got.owner} with role {got.role}; "
        "the secret is shown once:",
        file=sys.stderr,
    )
    print(got.secret)
