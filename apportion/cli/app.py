"""The `apportion` command tree (typer): server commands, then one group per resource.

`main(argv)` runs it and maps what the client raises to a message on stderr and an exit code:
1 for a refusal (the problem in one line, then its field errors) or a failed job, 2 for a local
problem or an unreachable server."""

from __future__ import annotations

import sys

import typer

from apportion.cli import audit, comparisons, demo, experiments, models, plans, server, watch
from apportion.cli.common import LocalError, console
from apportion.client import ClientError, JobFailed, JobTimeout, ProblemError, Unreachable

app = typer.Typer(
    name="apportion",
    help="Guardrail-aware allocation service",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
app.command("serve")(server.serve)
app.command("worker")(server.worker)
app.command("db")(server.db)
app.command("openapi")(server.openapi)
app.add_typer(audit.keys, name="keys")
app.add_typer(audit.audit, name="audit")
app.add_typer(experiments.experiment, name="experiment")
app.add_typer(experiments.readout, name="readout")
app.add_typer(models.model, name="model")
app.add_typer(models.job, name="job")
app.add_typer(comparisons.comparison, name="comparison")
app.add_typer(plans.plan_app, name="plan")
app.add_typer(watch.watch, name="watch")
app.add_typer(demo.demo, name="demo")
for command in plans.top.registered_commands:
    app.registered_commands.append(command)


def _refused(exc: ProblemError) -> None:
    err = console(stderr=True)
    err.print(f"error: {exc.one_line()}", markup=False)
    for line in exc.field_lines():
        err.print(f"  - {line}", markup=False)


def main(argv: list[str] | None = None) -> int:
    """Runs one command; returns its exit code (the console script exits with it). typer runs in
    its standalone mode (its own usage errors, --help and exit codes), and the client's errors
    become one message on stderr and an exit code here."""
    args = sys.argv[1:] if argv is None else list(argv)
    try:
        app(args=args, prog_name="apportion")
    except SystemExit as exc:
        return exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    except ProblemError as exc:
        _refused(exc)
        return 1
    except JobFailed as exc:
        console(stderr=True).print(f"error: {exc}", markup=False)
        return 1
    except (LocalError, Unreachable, JobTimeout, ClientError) as exc:
        console(stderr=True).print(f"error: {exc}", markup=False)
        return 2
    return 0
