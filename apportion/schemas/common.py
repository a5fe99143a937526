"""Shared field types and bounds, the answer base class, the problem document and health answers.

Bounds every request field declares, once: integers fit the databases' 64-bit columns and text
holds no NUL (PostgreSQL cannot store it). A value outside them is a 422 from the schema itself,
before any use case runs, on every backend alike; the exported OpenAPI document shows them."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StringConstraints

INT64_MAX = 2**63 - 1  # BIGINT (PostgreSQL) and INTEGER (SQLite) are signed 64-bit
NO_NUL = r"^[^\x00]*$"
# a reason must say something: at least one character that is neither blank nor NUL
REASON_PATTERN = r"^[^\x00]*[^\s\x00][^\x00]*$"
# plan and experiment keys: lower-case letters, digits, '-' and '_', starting with a letter or digit
KEY_PATTERN = r"^[a-z0-9][a-z0-9_-]{0,99}$"
# column names of uploaded rows (arms, metrics, features)
COLUMN_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]{0,99}$"

Text = Annotated[str, StringConstraints(pattern=NO_NUL)]
ShortText = Annotated[str, StringConstraints(max_length=200, pattern=NO_NUL)]
Reason = Annotated[
    str,
    Field(
        min_length=1,
        max_length=5000,
        pattern=REASON_PATTERN,
        description="why; recorded in the audit trail",
    ),
]
Count = Annotated[int, Field(ge=1, le=INT64_MAX)]
Timestamp = Annotated[str, Field(description="ISO-8601 UTC, e.g. 2026-12-03T16:51:10.123456Z")]
JobStatus = Literal["queued", "running", "done", "failed"]


class Answer(BaseModel):
    """Base of every answer model: built from the service's own data (never from a caller), so
    it is not strict about extra keys in what it reads, and sends only the fields it declares.
    The tests validate real answers with `model_validate(data, extra="forbid")` (pydantic's
    run-time override, applied at every depth), so a key a producer adds without the schema
    fails there instead of being dropped silently."""

    model_config = ConfigDict(extra="ignore")


class OpenAnswer(Answer):
    """An answer part that passes on keys it does not declare instead of dropping them, so a key
    a producer adds reaches readers before the schema names it (the tests' validation with
    extra="forbid" still refuses it, so it does not stay undeclared)."""

    model_config = ConfigDict(extra="allow")


class Override(BaseModel):
    """Go on although a check failed, saying why (recorded in the audit trail)."""

    reason: str = Field(min_length=3, max_length=2000, pattern=REASON_PATTERN)


class ProblemField(BaseModel):
    field: str | None = None
    problem: str | None = None
    type: str | None = None


class Problem(BaseModel):
    """RFC 9457 problem details; `errors` lists each field that is wrong."""

    model_config = ConfigDict(extra="allow", title="Problem")
    type: str = Field(json_schema_extra={"format": "uri"})
    title: str
    status: int = Field(ge=400, le=599)
    detail: str
    instance: str | None = None
    request_id: str | None = None
    errors: list[ProblemField] | None = None


class Liveness(Answer):
    status: Literal["ok"]


class Readiness(Answer):
    status: Literal["ready", "not ready"]
    checks: dict[str, bool] = Field(
        description="database, migrations, plans_loaded: each true when it passed"
    )


class JobLink(Answer):
    """A queued job: where to follow it."""

    job_id: str
    job: str = Field(description="the job's URL, /v1/jobs/{id}")
    status: Literal["queued"]


def dump(model: BaseModel) -> dict[str, Any]:
    """The JSON-ready dict of an answer as the routes send it (unset optional fields left out)."""
    return model.model_dump(mode="json", exclude_unset=True)
