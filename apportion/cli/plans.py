"""`apportion plan draft|list|show|approve|reject|activate|rollback` and `apportion assign`."""

from __future__ import annotations

from enum import Enum, StrEnum
from typing import Annotated, Any

import typer

from apportion.cli.common import (
    Conn,
    LocalError,
    client_command,
    parse_pairs,
    read_json_file,
)
from apportion.client import render
from apportion.schemas.plans import PlanVersionView

plan_app = typer.Typer(help="draft, review, activate and roll back plans (HTTP)",
                       no_args_is_help=True)  # fmt: skip
top = typer.Typer()  # `assign` sits at the top level; the app adds this group's commands


class DecisionMethod(StrEnum):
    deterministic = "deterministic"
    chance = "chance"
    stochastic = "stochastic"


class Allocation(StrEnum):
    mixed = "mixed"
    pure = "pure"


class Baseline(StrEnum):
    control = "control"
    best_arm = "best_arm"
    live = "live"


def draft_spec(base: dict[str, Any], **given: Any) -> dict[str, Any]:
    """The draft body: the spec file, then the options given on the command line."""
    spec = dict(base)
    holdout = dict(spec.get("holdout") or {})
    for name, value in (("share", given.pop("holdout_share")), ("arm", given.pop("holdout_arm"))):
        if value is not None:
            holdout[name] = value
    if holdout:
        spec["holdout"] = holdout
    for k, v in given.items():
        if v is not None:
            spec[k] = v.value if isinstance(v, Enum) else v
    if "model_id" not in spec:
        raise LocalError("give the cohort model with --model ID (or model_id in the spec file)")
    return spec


@client_command(plan_app, "draft", "draft a plan version from a cohort model")
def draft(
    conn: Conn,
    plan: str,
    model: Annotated[int | None, typer.Option("--model", help="cohort model id")] = None,
    spec: Annotated[str | None, typer.Option(
        "--spec", help="JSON file: success_metric, guardrails, method...")] = None,
    success_metric: Annotated[str | None, typer.Option("--success-metric")] = None,
    method: Annotated[DecisionMethod | None, typer.Option("--method")] = None,
    allocation: Annotated[Allocation | None, typer.Option("--allocation")] = None,
    baseline: Annotated[Baseline | None, typer.Option("--baseline")] = None,
    holdout_share: Annotated[float | None, typer.Option("--holdout-share")] = None,
    holdout_arm: Annotated[str | None, typer.Option("--holdout-arm")] = None,
    draws: Annotated[int | None, typer.Option(
        "--draws", help="bootstrap draws of the impact report")] = None,
    seed: Annotated[int | None, typer.Option("--seed")] = None,
    notes: Annotated[str | None, typer.Option("--notes")] = None,
    comparison: Annotated[int | None, typer.Option(
        "--comparison", help="the comparison number this method follows")] = None,
    no_wait: Annotated[bool, typer.Option(
        "--no-wait", help="do not wait for a report job")] = False,
) -> None:  # fmt: skip
    body = draft_spec(
        read_json_file(spec) if spec else {},
        model_id=model, success_metric=success_metric, method=method, allocation=allocation,
        baseline=baseline, draws=draws, seed=seed, notes=notes, comparison=comparison,
        holdout_share=holdout_share, holdout_arm=holdout_arm,
    )  # fmt: skip
    with conn.client() as api:
        got = api.draft_plan(plan, body)
        if not no_wait:
            got = api.settle_draft(got, progress=conn.progress)
    conn.emit(got, lambda: render.version_view(got))


@client_command(plan_app, "list", "all plans with their live version")
def list_(conn: Conn) -> None:
    with conn.client() as api:
        got = api.plans()
    conn.emit(got, lambda: render.plans_table(got))


@client_command(plan_app, "show", "a plan's versions and activations, or one version")
def show(
    conn: Conn,
    plan: str,
    version: Annotated[
        int | None,
        typer.Option("--version", help="one version in full (report, cohorts, held-out figures)"),
    ] = None,
) -> None:
    with conn.client() as api:
        if version is not None:
            got = api.version(plan, version)
            conn.emit(got, lambda: render.version_view(got))
            return
        overview = api.plan(plan)
    conn.emit(overview, lambda: render.plan_view(overview))


Reason = Annotated[str, typer.Option("--reason", help="why (kept in the audit trail)")]


def _decided(conn: Conn, got: PlanVersionView) -> None:
    conn.emit(got, lambda: (f"plan version {got.plan}/{got.version} is {got.status} "
                            f"(by {got.decided_by})"))  # fmt: skip


@client_command(plan_app, "approve", "approve a draft version, with a reason")
def approve(conn: Conn, plan: str, version: int, reason: Reason) -> None:
    with conn.client() as api:
        _decided(conn, api.approve(plan, version, reason))


@client_command(plan_app, "reject", "reject a draft version, with a reason")
def reject(conn: Conn, plan: str, version: int, reason: Reason) -> None:
    with conn.client() as api:
        _decided(conn, api.reject(plan, version, reason))


@client_command(plan_app, "activate", "make an approved version live")
def activate(
    conn: Conn,
    plan: str,
    version: int,
    reason: Reason,
    expected_revision: Annotated[int | None, typer.Option(
        "--expected-revision",
        help="the revision you reviewed (default: read the current one first)")] = None,
) -> None:  # fmt: skip
    with conn.client() as api:
        got = api.activate(plan, version, reason, expected_revision)
    conn.emit(got, lambda: render.switch_line(got, plan, "activated"))


@client_command(plan_app, "rollback", "return to the previously live version")
def rollback(
    conn: Conn,
    plan: str,
    reason: Reason,
    to: Annotated[int | None, typer.Option(
        "--to", help="a named earlier approved version")] = None,
) -> None:  # fmt: skip
    with conn.client() as api:
        got = api.rollback(plan, reason, to)
    conn.emit(got, lambda: render.switch_line(got, plan, "rolled back"))


@client_command(top, "assign", "which arm for this member?")
def assign(
    conn: Conn,
    plan: str,
    member: Annotated[str | None, typer.Argument()] = None,
    feature: Annotated[list[str] | None, typer.Option(
        "--feature", metavar="NAME=VALUE",
        help="a feature value (repeatable); numbers parse as numbers, quote to force text")] = None,
    batch: Annotated[str | None, typer.Option(
        "--batch", help="JSON file of members [{member_id, features}]")] = None,
) -> None:  # fmt: skip
    with conn.client() as api:
        if batch:
            body = read_json_file(batch)
            members = body.get("members") if isinstance(body, dict) else body
            if not isinstance(members, list):
                raise LocalError(f"{batch} must hold a list of members or {{'members': [...]}}")
            many = api.assign_batch(plan, members)
            ids = [str(m.get("member_id")) if isinstance(m, dict) else "?" for m in members]
            conn.emit({"assignments": many}, lambda: render.assignments_table(many, ids))
            return
        if not member:
            raise LocalError("give a MEMBER id (or --batch FILE)")
        one = api.assign(plan, member, parse_pairs(feature, "--feature"))
    conn.emit(one, lambda: render.assignments_table([one], [member]))
