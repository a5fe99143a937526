"""The operator's kit in deploy/ names only things that exist: probe paths are routes of the app,
APPORTION_ variables are Settings fields (with values Settings accepts), container commands parse
with the real `apportion` parser, and the manifests reference each other consistently.

No Docker engine or cluster is needed: the files are read as YAML / text and checked against the
code (a build or apply is not attempted here)."""

from __future__ import annotations

import json
import shlex
from pathlib import Path
from typing import Any

import pytest
import typer

from apportion.cli.app import app
from apportion.config import Settings

yaml = pytest.importorskip("yaml")

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"
PREFIX = "APPORTION_"


def _documents() -> list[dict[str, Any]]:
    docs = []
    for path in sorted((DEPLOY / "k8s").glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc:
                doc["_file"] = path.name
                docs.append(doc)
    return docs


DOCUMENTS = _documents()
MANIFESTS = [d for d in DOCUMENTS if d["kind"] != "Kustomization"]  # objects sent to the cluster


def _pod_specs() -> list[tuple[str, dict[str, Any]]]:
    return [
        (f"{d['_file']}:{d['metadata']['name']}", d["spec"]["template"]["spec"])
        for d in MANIFESTS
        if d["kind"] in ("Deployment", "Job", "StatefulSet", "DaemonSet")
    ]


def _containers() -> list[tuple[str, dict[str, Any]]]:
    return [
        (f"{where}/{c['name']}", c)
        for where, spec in _pod_specs()
        for c in spec.get("initContainers", []) + spec["containers"]
    ]


def _of_kind(kind: str) -> list[dict[str, Any]]:
    return [d for d in MANIFESTS if d["kind"] == kind]


@pytest.fixture(scope="module")
def route_paths(tmp_path_factory) -> set[str]:  # type: ignore[no-untyped-def]
    from apportion.app import create_app

    db = tmp_path_factory.mktemp("deploy") / "apportion.db"
    app = create_app(Settings(database_url=f"sqlite:///{db}", log_level="WARNING"))
    paths = set()
    for r in app.routes:
        if getattr(r, "path", None):
            if "GET" in (getattr(r, "methods", None) or {"GET"}):
                paths.add(r.path)
        elif hasattr(r, "effective_route_contexts"):  # FastAPI >= 0.165 keeps included routers
            paths |= {c.path for c in r.effective_route_contexts() if "GET" in c.methods}
    assert {"/healthz", "/readyz", "/metrics"} <= paths, sorted(paths)  # the walk found routers
    return paths


def _subcommands() -> set[str]:
    return set(typer.main.get_command(app).commands)  # type: ignore[attr-defined]


def _parse(args: list[str]) -> None:
    """Parse a command line with the real command tree (typer's commands) without running it:
    walk the groups by name, then let the command parse its arguments and options (it raises
    typer's usage error when they do not parse)."""
    command: Any = typer.main.get_command(app)
    ctx: typer.Context | None = None
    name = "apportion"
    while hasattr(command, "get_command"):  # a group of commands
        ctx = typer.Context(command, info_name=name, parent=ctx)
        assert args, f"`{name}` needs a subcommand"
        name, args = args[0], args[1:]
        command = command.get_command(ctx, name)
        assert command is not None, f"no command `{name}`"
    command.make_context(name, list(args), parent=ctx)


def _check_command(argv: list[str], where: str) -> None:
    assert argv and argv[0] == "apportion", f"{where}: {argv} does not run `apportion`"
    assert len(argv) > 1 and argv[1] in _subcommands(), (
        f"{where}: '{argv[1:2]}' is not an apportion subcommand {sorted(_subcommands())}"
    )
    try:  # the whole command line, options included, must parse with the real parser
        _parse(argv[1:])
    except Exception as exc:  # typer's usage errors, or the walk's assertions
        raise AssertionError(f"{where}: `{shlex.join(argv)}` does not parse: {exc}") from exc


def _check_settings(values: dict[str, str], where: str, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    fields = set(Settings.model_fields)
    for name in values:
        assert name.startswith(PREFIX), f"{where}: {name} is not an APPORTION_ variable"
        assert name[len(PREFIX) :].lower() in fields, f"{where}: {name} is not a Settings field"
    with monkeypatch.context() as m:  # the values must be accepted as environment variables too
        for name, value in values.items():
            m.setenv(name, str(value))
        Settings()


def test_manifests_cover_the_operators_kit() -> None:
    kinds = {(d["kind"], d["metadata"]["name"]) for d in MANIFESTS}
    for kind in ("Deployment", "Service", "HorizontalPodAutoscaler", "Job", "ConfigMap", "Secret"):
        assert any(k == kind for k, _ in kinds), f"no {kind} in deploy/k8s"
    commands = {c["command"][1] for _, c in _containers()}
    assert {"serve", "worker", "db"} <= commands, commands


def test_kustomization_lists_existing_files() -> None:
    kust = [d for d in DOCUMENTS if d["kind"] == "Kustomization"]
    assert len(kust) == 1
    listed = kust[0]["resources"]
    for name in listed:
        assert (DEPLOY / "k8s" / name).is_file(), name
    assert "secret.example.yaml" not in listed  # the example Secret is never applied as is
    assert "migrate-job.yaml" not in listed  # the Job runs on its own before each rollout


def test_probes_name_real_routes(route_paths: set[str]) -> None:
    seen = set()
    for where, c in _containers():
        ports = {p.get("name") for p in c.get("ports", [])} | {
            p["containerPort"] for p in c.get("ports", [])
        }
        for kind in ("readinessProbe", "livenessProbe", "startupProbe"):
            get = c.get(kind, {}).get("httpGet")
            if get is None:
                continue
            assert get["path"] in route_paths, f"{where} {kind}: {get['path']} is not a route"
            assert get["port"] in ports, f"{where} {kind}: port {get['port']} is not declared"
            seen.add((kind, get["path"]))
    assert {("readinessProbe", "/readyz"), ("livenessProbe", "/healthz")} <= seen, seen


def test_every_apportion_variable_is_a_settings_field(monkeypatch) -> None:  # type: ignore[no-untyped-def]
    for d in _of_kind("ConfigMap"):
        _check_settings(d["data"], f"{d['_file']}", monkeypatch)
    for d in _of_kind("Secret"):
        _check_settings(d.get("stringData", {}), f"{d['_file']}", monkeypatch)
    for where, c in _containers():  # inline env entries (valueFrom ones are checked by name only)
        named = {e["name"] for e in c.get("env", []) if e["name"].startswith(PREFIX)}
        fields = {f.upper() for f in Settings.model_fields}
        assert all(k[len(PREFIX) :] in fields for k in named), (where, sorted(named))
        values = {e["name"]: e["value"] for e in c.get("env", []) if "value" in e}
        _check_settings({k: v for k, v in values.items() if k in named}, where, monkeypatch)
    secret = next(d for d in _of_kind("Secret"))
    assert secret["stringData"]["APPORTION_DATABASE_URL"].startswith("postgresql+psycopg://")


def test_env_sources_exist_and_replicas_do_not_migrate() -> None:
    configs = {d["metadata"]["name"]: d for d in _of_kind("ConfigMap")}
    secrets = {d["metadata"]["name"] for d in _of_kind("Secret")}
    for where, c in _containers():
        refs = c.get("envFrom", [])
        assert refs, f"{where} takes no configuration"
        for ref in refs:
            if "configMapRef" in ref:
                assert ref["configMapRef"]["name"] in configs, where
            if "secretRef" in ref:
                assert ref["secretRef"]["name"] in secrets, where
    for cfg in configs.values():
        assert cfg["data"].get("APPORTION_MIGRATE_ON_START") == "false"


def test_container_commands_are_apportion_subcommands() -> None:
    for where, c in _containers():
        _check_command(list(c["command"]) + list(c.get("args", [])), where)
    job = _of_kind("Job")[0]["spec"]["template"]["spec"]["containers"][0]
    assert job["command"] == ["apportion", "db", "upgrade"]


def test_service_and_autoscaler_point_at_the_api() -> None:
    api = next(
        d
        for d in _of_kind("Deployment")
        if "serve" in d["spec"]["template"]["spec"]["containers"][0]["command"]
    )
    labels = api["spec"]["template"]["metadata"]["labels"]
    assert api["spec"]["selector"]["matchLabels"].items() <= labels.items()
    port_names = {p["name"] for p in api["spec"]["template"]["spec"]["containers"][0]["ports"]}
    for svc in _of_kind("Service"):
        assert svc["spec"]["selector"].items() <= labels.items()
        assert all(p["targetPort"] in port_names for p in svc["spec"]["ports"])
    for hpa in _of_kind("HorizontalPodAutoscaler"):
        ref = hpa["spec"]["scaleTargetRef"]
        assert (ref["kind"], ref["name"]) == ("Deployment", api["metadata"]["name"])
        assert 1 <= hpa["spec"]["minReplicas"] <= hpa["spec"]["maxReplicas"]


def _dockerfile() -> list[tuple[str, str]]:
    """(instruction, arguments) with line continuations joined and comments dropped."""
    out, buf = [], ""
    for line in (DEPLOY / "Dockerfile").read_text().splitlines():
        if not buf and (not line.strip() or line.lstrip().startswith("#")):
            continue
        buf += line.rstrip()
        if buf.endswith("\\"):
            buf = buf[:-1] + " "
            continue
        word, _, rest = buf.strip().partition(" ")
        out.append((word.upper(), rest.strip()))
        buf = ""
    return out


def test_dockerfile(route_paths: set[str], monkeypatch) -> None:  # type: ignore[no-untyped-def]
    ins = _dockerfile()
    froms = [a for i, a in ins if i == "FROM"]
    assert froms and froms[-1].startswith("python:3.11-slim"), froms
    users = [a for i, a in ins if i == "USER"]
    assert users and users[-1].split(":")[0] not in ("root", "0"), users

    cmd = [a for i, a in ins if i == "CMD"]
    assert len(cmd) == 1
    argv = json.loads(cmd[0])  # exec form, so the server gets the signals
    _check_command(argv, "Dockerfile CMD")
    assert argv == ["apportion", "serve", "--host", "0.0.0.0", "--port", "8000"]

    env: dict[str, str] = {}
    for i, a in ins:
        if i == "ENV":
            for pair in shlex.split(a):
                k, _, v = pair.partition("=")
                env[k] = v
    _check_settings(
        {k: v for k, v in env.items() if k.startswith(PREFIX)}, "Dockerfile", monkeypatch
    )
    assert env.get("APPORTION_MIGRATE_ON_START") == "false"

    health = [a for i, a in ins if i == "HEALTHCHECK"]
    assert len(health) == 1
    url = next(w for w in health[0].split("'") if w.startswith("http://"))
    path = "/" + url.split("://", 1)[1].split("/", 1)[1]
    assert path in route_paths and path == "/healthz", path
    assert any(i == "RUN" and "pip install ." in a for i, a in ins)
