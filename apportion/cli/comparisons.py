"""`apportion comparison start|show|list`: compare decision methods on a readout."""

from __future__ import annotations

from typing import Annotated, Any

import typer

from apportion.cli.common import Conn, LocalError, client_command, read_json_file
from apportion.client import render

comparison = typer.Typer(help="compare decision methods on a readout (HTTP)", no_args_is_help=True)


def guardrail_arg(text: str) -> dict[str, Any]:
    """METRIC=THRESHOLD[:relative][@CONFIDENCE], e.g. refund=0.01 or churn=2:relative@0.9."""
    metric, sep, rest = text.partition("=")
    if not sep or not metric or not rest:
        raise LocalError(
            f"--guardrail must look like metric=threshold[:relative][@confidence], got '{text}'"
        )
    rest, _, conf = rest.partition("@")
    value, _, unit = rest.partition(":")
    try:
        g: dict[str, Any] = {"metric": metric.strip(), "threshold": float(value)}
        if conf:
            g["confidence"] = float(conf)
    except ValueError as exc:
        raise LocalError(f"--guardrail '{text}': threshold and confidence must be numbers") from exc
    if unit:
        g["unit"] = unit
    return g


@client_command(comparison, "start",
                "cross-fit candidate methods on a readout and rank them (runs as a job)")  # fmt: skip
def start(
    conn: Conn,
    key: Annotated[str, typer.Argument(help="experiment key")],
    readout: Annotated[int | None, typer.Option("--readout", help="readout version")] = None,
    model: Annotated[int | None, typer.Option(
        "--model", help="or: a cohort model (its readout)")] = None,
    spec: Annotated[str | None, typer.Option(
        "--spec", help="JSON file: candidates, guardrails, params...")] = None,
    success_metric: Annotated[str | None, typer.Option("--success-metric")] = None,
    guardrail: Annotated[list[str] | None, typer.Option(
        "--guardrail", metavar="METRIC=THRESHOLD[:relative][@CONF]",
        help="a guardrail (repeatable)")] = None,
    candidate: Annotated[list[str] | None, typer.Option(
        "--candidate", metavar="MODEL/OPTIMIZER",
        help="a candidate (repeatable; default: every one the service offers)")] = None,
    confidence: Annotated[float | None, typer.Option("--confidence")] = None,
    folds: Annotated[int | None, typer.Option("--folds")] = None,
    seed: Annotated[int | None, typer.Option("--seed")] = None,
    notes: Annotated[str | None, typer.Option("--notes")] = None,
    no_wait: Annotated[bool, typer.Option(
        "--no-wait", help="return once the job is queued")] = False,
) -> None:  # fmt: skip
    body: dict[str, Any] = dict(read_json_file(spec)) if spec else {}
    given = {"success_metric": success_metric, "folds": folds, "seed": seed,
             "confidence": confidence, "notes": notes, "readout_version": readout,
             "model_id": model}  # fmt: skip
    body.update({k: v for k, v in given.items() if v is not None})
    if candidate:
        body["candidates"] = list(candidate)
    if guardrail:
        body["guardrails"] = [guardrail_arg(g) for g in guardrail]
    if "success_metric" not in body:
        raise LocalError("give the success metric with --success-metric (or in the spec file)")
    with conn.client() as api:
        started = api.start_comparison(key, body)
        if no_wait:
            conn.emit(started, lambda: (
                f"comparison {started.number} queued as job {started.job_id}; read it "
                f"with 'apportion comparison show {key} {started.number}'"))  # fmt: skip
            return
        with conn.progress(f"comparison {started.number}") as bar:
            finished = api.wait(started.job_id, on_progress=bar)
        got = api.comparison(key, started.number)
    conn.emit(got, lambda: render.comparison_view(got))
    if finished.status != "done":
        raise typer.Exit(1)


@client_command(comparison, "show", "a comparison's table and recommendation")
def show(conn: Conn, key: str, number: int) -> None:
    with conn.client() as api:
        got = api.comparison(key, number)
    conn.emit(got, lambda: render.comparison_view(got))
    if got.status == "failed":
        raise typer.Exit(1)


@client_command(comparison, "list", "an experiment's comparisons")
def list_(conn: Conn, key: str) -> None:
    with conn.client() as api:
        got = api.comparisons(key)
    conn.emit({"comparisons": got}, lambda: render.comparisons_table(got))
