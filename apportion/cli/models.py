"""`apportion model fit|show` and `apportion job show`."""

from __future__ import annotations

from enum import StrEnum
from typing import Annotated

import typer

from apportion.cli.common import Conn, client_command, console, parse_pairs
from apportion.client import render

model = typer.Typer(help="fit and read cohort models (HTTP)", no_args_is_help=True)
job = typer.Typer(help="long-running work (HTTP)", no_args_is_help=True)


class Method(StrEnum):
    """The model methods the server offers (apportion.stats.models.METHODS; a test keeps them
    equal)."""

    global_ = "global"
    segments = "segments"
    causal_tree = "causal_tree"
    intersect = "intersect"
    two_model = "two_model"
    forest = "forest"
    policy_tree = "policy_tree"


MODEL_METHODS = tuple(m.value for m in Method)


@client_command(model, "fit", "fit a cohort model on a readout (runs as a job)")
def fit(
    conn: Conn,
    key: Annotated[str, typer.Argument(help="experiment key")],
    readout: Annotated[int, typer.Option("--readout", help="readout version")],
    method: Annotated[Method, typer.Option("--method")] = Method.causal_tree,
    param: Annotated[list[str] | None, typer.Option(
        "--param", metavar="NAME=VALUE", help="method parameter (repeatable)")] = None,
    success_metric: Annotated[str | None, typer.Option("--success-metric")] = None,
    override_sample_ratio: Annotated[str | None, typer.Option(
        "--override-sample-ratio", metavar="REASON", help="fit despite a failed check")] = None,
    no_wait: Annotated[bool, typer.Option(
        "--no-wait", help="return once the job is queued")] = False,
) -> None:  # fmt: skip
    params = parse_pairs(param, "--param")
    with conn.client() as api:
        started = api.fit_model(key, readout_version=readout, method=method.value, params=params,
                                success_metric=success_metric,
                                override_reason=override_sample_ratio)  # fmt: skip
        if no_wait:
            conn.emit(started, lambda: (
                f"model {started.model_id} queued as job {started.job_id}; "
                f"follow it with 'apportion job show {started.job_id}'"))  # fmt: skip
            return
        with conn.progress(f"fitting model {started.model_id}") as bar:
            finished = api.wait(started.job_id, on_progress=bar)
        got = api.model(started.model_id)
    conn.emit(got, lambda: render.model_view(got))
    if finished.status == "failed":
        console(stderr=True).print(f"error: the fit failed: {finished.error}", markup=False)
        raise typer.Exit(1)


@client_command(model, "show", "a cohort model: cohorts, effects, diagnostics")
def show(conn: Conn, id: int) -> None:
    with conn.client() as api:
        got = api.model(id)
    conn.emit(got, lambda: render.model_view(got))


@client_command(job, "show", "a job's status and progress")
def show_job(conn: Conn, id: str) -> None:
    with conn.client() as api:
        got = api.job(id)
    conn.emit(got, lambda: render.job_view(got))
    if got.status == "failed":
        raise typer.Exit(1)
