"""What every command shares: the connection options, the consoles, `--json` or a rendered
answer, progress bars for jobs, the argument helpers, and how refusals end a command.

Exit codes: 0 done, 1 the server refused (its problem printed as one line, then its field
errors) or a job failed, 2 a local problem (unreadable file, bad option value, server
unreachable; typer's own usage errors are 2 as well)."""

from __future__ import annotations

import functools
import inspect
import json
import sys
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any, get_type_hints

import typer
from rich.console import Console, RenderableType

from apportion.client import ApportionClient, as_json
from apportion.client.http import DEFAULT_TIMEOUT, DEFAULT_URL, ENV_KEY, ENV_URL
from apportion.client.render import WIDE, job_progress
from apportion.client.waiter import ProgressCallback

CONTENT_TYPES = {
    ".csv": "text/csv",
    ".parquet": "application/vnd.apache.parquet",
    ".pq": "application/vnd.apache.parquet",
    ".ndjson": "application/x-ndjson",
    ".jsonl": "application/x-ndjson",
}


class LocalError(Exception):
    """A problem on this side of the wire (a file, an option value)."""


def console(*, stderr: bool = False) -> Console:
    """A console on the current stdout/stderr: the terminal's width there, no wrapping elsewhere."""
    stream = sys.stderr if stderr else sys.stdout
    tty = stream.isatty()
    return Console(file=stream, width=None if tty else WIDE, highlight=False)


# ---- the connection options every client command takes ---------------------------------------

_PANEL = "Connection"
UrlOpt = Annotated[
    str | None,
    typer.Option("--url", help=f"server address (default ${ENV_URL} or {DEFAULT_URL})",
                 rich_help_panel=_PANEL),
]  # fmt: skip
KeyOpt = Annotated[
    str | None,
    typer.Option("--key", help=f"API key secret (default ${ENV_KEY})", rich_help_panel=_PANEL),
]
TimeoutOpt = Annotated[
    float, typer.Option("--timeout", help="seconds per request", rich_help_panel=_PANEL)
]
JsonOpt = Annotated[bool, typer.Option("--json", help="print the server's JSON instead of tables")]


@dataclass
class Conn:
    """The connection options of one invocation, and how to print its answer."""

    url: str | None
    key: str | None
    timeout: float
    json: bool

    def client(self) -> ApportionClient:
        return ApportionClient(self.url, self.key, timeout=self.timeout)

    def emit(self, data: Any, human: Callable[[], RenderableType]) -> None:
        """The answer's JSON with --json, else its rendering for people."""
        if self.json:
            print(json.dumps(as_json(data), indent=2, default=str))
        else:
            console().print(human())

    @contextmanager
    def progress(self, label: str) -> Iterator[ProgressCallback | None]:
        """A progress bar on stderr fed by the job waiter (none with --json)."""
        if self.json:
            yield None
            return
        with job_progress(label, console(stderr=True)) as bar:
            yield bar


def client_command(group: typer.Typer, name: str, help: str) -> Callable[[Callable[..., Any]], Any]:
    """Registers `fn(conn, ...)` as a command of `group` with the connection options and --json
    added after its own parameters (typer reads the signature made here)."""

    def register(fn: Callable[..., Any]) -> Callable[..., Any]:
        hints = get_type_hints(fn, include_extras=True)
        own = [
            p.replace(annotation=hints[p.name])
            for p in inspect.signature(fn).parameters.values()
            if p.name != "conn"
        ]
        kw = inspect.Parameter.KEYWORD_ONLY
        extra = [
            inspect.Parameter("url", kw, default=None, annotation=UrlOpt),
            inspect.Parameter("api_key", kw, default=None, annotation=KeyOpt),
            inspect.Parameter("timeout", kw, default=DEFAULT_TIMEOUT, annotation=TimeoutOpt),
            inspect.Parameter("as_json", kw, default=False, annotation=JsonOpt),
        ]

        @functools.wraps(fn)
        def run(**kwargs: Any) -> Any:
            conn = Conn(kwargs.pop("url"), kwargs.pop("api_key"), kwargs.pop("timeout"),
                        kwargs.pop("as_json"))  # fmt: skip
            return fn(conn, **kwargs)

        del run.__wrapped__  # typer reads the signature below, not fn's
        run.__signature__ = inspect.Signature(own + extra)  # type: ignore[attr-defined]
        run.__annotations__ = {p.name: p.annotation for p in own + extra}
        group.command(name, help=help)(run)
        return fn

    return register


# ---- argument helpers --------------------------------------------------------------------------


def parse_value(text: str) -> Any:
    """`--param`/`--feature` values: JSON when it parses (5, 0.5, true, null, "10", [1,2]),
    otherwise the text itself (beginner). Quote a number to send it as a string: level='"10"'."""
    try:
        return json.loads(text)
    except ValueError:
        return text


def parse_pairs(items: Sequence[str] | None, what: str) -> dict[str, Any]:
    """NAME=VALUE options as a dict (values through parse_value)."""
    out: dict[str, Any] = {}
    for item in items or []:
        k, sep, v = item.partition("=")
        if not sep or not k:
            raise LocalError(f"{what} must look like name=value, got '{item}'")
        out[k.strip()] = parse_value(v)
    return out


def read_json_file(path: str) -> Any:
    """A JSON file's content ('-' reads stdin)."""
    try:
        text = sys.stdin.read() if path == "-" else Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise LocalError(f"cannot read {path}: {exc.strerror or exc}") from exc
    try:
        return json.loads(text)
    except ValueError as exc:
        raise LocalError(f"{path} is not valid JSON: {exc}") from exc


def read_upload(file: str, content_type: str | None) -> tuple[bytes, str]:
    """(bytes, content type) of an upload file; the type from the extension unless given."""
    path = Path(file)
    ctype = content_type or CONTENT_TYPES.get(path.suffix.lower())
    if ctype is None:
        raise LocalError(
            f"cannot tell the format of '{path.name}' from its extension; give --content-type "
            f"({', '.join(sorted(set(CONTENT_TYPES.values())))})"
        )
    try:
        return path.read_bytes(), ctype
    except OSError as exc:
        raise LocalError(f"cannot read {path}: {exc.strerror or exc}") from exc
