"""`apportion demo files DIR`: the first session's files from the invented demo scenario (local;
no server needed)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from apportion.cli.common import LocalError

demo = typer.Typer(help="the invented demo scenario (local)", no_args_is_help=True)


@demo.command("files", help="write experiment.json, readout.csv and plan.json into DIR")
def files(
    directory: Annotated[Path, typer.Argument(metavar="DIR", help="made if missing")],
    learners: Annotated[int, typer.Option(
        "--learners", min=100, max=2_000_000, help="simulated learners in readout.csv")] = 20_000,
    seed: Annotated[int, typer.Option("--seed", min=0)] = 1,
    overwrite: Annotated[bool, typer.Option(
        "--overwrite", help="replace files that are already there")] = False,
) -> None:  # fmt: skip
    from apportion.demo.files import write_session_files

    try:
        paths = write_session_files(directory, learners=learners, seed=seed, overwrite=overwrite)
    except FileExistsError as exc:
        raise LocalError(f"already there (give --overwrite to replace): {exc}") from exc
    except OSError as exc:
        raise LocalError(f"cannot write into {directory}: {exc.strerror or exc}") from exc
    for p in paths:
        print(p)
