"""Schema fuzzing: schemathesis generates requests for every operation of the app's own OpenAPI
document and checks each answer against that document.

Checks, from schemathesis itself: no 5xx (`not_a_server_error`), every status code is one the
document declares for the operation (`status_code_conformance`), the content type is a declared one
(`content_type_conformance`) and the body matches the declared schema
(`response_schema_conformance`). Each operation runs with an admin key and with a reader key.

Bounded and repeatable: Hypothesis runs derandomized (a fixed seed derived from the test), with
`EXAMPLES` examples per operation and key, no example database, on SQLite in a temporary file.
The experiment, readout, model and live plan the scenario builders make give the generated
requests something real to find (the document's path examples name them)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, Phase, given, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)
from support import make_keys, make_settings

from apportion.app import create_app
from apportion.errors import Unauthenticated

EXAMPLES = 12  # per operation and key: 28 operations x 2 keys x 12 = at most 672 requests

# Defects the fuzzer finds that belong to another change in flight, listed so that this suite can
# run now without hiding them: each must still fail exactly so, and the test fails as soon as one
# is fixed (then delete its line). Integers beyond 64 bits in a path reach SQLite and give 500
# (bounded on every request integer).
KNOWN_DEFECTS: dict[tuple[str, str], str] = {}
CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
]


@pytest.fixture(scope="module")
def fuzzed_app(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    db = tmp_path_factory.mktemp("fuzz") / "apportion.db"
    app = create_app(make_settings(f"sqlite:///{db}", run_jobs_in_process=False))
    with TestClient(app):  # runs the lifespan: migrations, key cache, registry
        yield app


def _live_secret(app: Any, role: str, made: dict[str, str]) -> str:
    """A working key of `role`: the fuzzer may revoke keys (DELETE /v1/keys/{id} is an operation
    like any other), so a revoked one is replaced before the next request."""
    services = app.state.services
    secret = made.get(role)
    if secret is not None:
        try:
            services.keys.authenticate(f"Bearer {secret}")
            return secret
        except Unauthenticated:
            pass
    keys = make_keys(services, prefix=f"fuzz{len(made)}")
    made[role] = getattr(keys, role)
    return made[role]


@pytest.mark.parametrize("role", ["admin", "reader"])
def test_every_operation_answers_as_documented(fuzzed_app: Any, role: str) -> None:
    schema = schemathesis.openapi.from_asgi("/openapi.json", fuzzed_app)
    made: dict[str, str] = {}
    failures: dict[str, str] = {}
    requests = 0
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) == len(
        [m for item in fuzzed_app.openapi()["paths"].values() for m in item]
    )
    for operation in operations:

        @settings(
            max_examples=EXAMPLES,
            deadline=None,
            derandomize=True,
            database=None,
            phases=[Phase.explicit, Phase.generate],
            suppress_health_check=list(HealthCheck),
        )
        @given(case=operation.as_strategy())
        def fuzz(case: Any) -> None:
            nonlocal requests
            secret = _live_secret(fuzzed_app, role, made)
            requests += 1
            case.call_and_validate(headers={"Authorization": f"Bearer {secret}"}, checks=CHECKS)

        name = f"{operation.method.upper()} {operation.path}"
        try:
            fuzz()
        except Exception as exc:  # one line per failing operation, all of them in one report
            failures[name] = str(exc).split("\n\n")[0]
    print(f"schema fuzzing as {role}: {requests} requests over {len(operations)} operations")
    assert requests >= len(operations) * 2  # every operation was called
    known = {op: why for (who, op), why in KNOWN_DEFECTS.items() if who == role}
    fixed = sorted(op for op in known if op not in failures)
    assert not fixed, f"fixed now, delete from KNOWN_DEFECTS: {fixed}"
    for op, why in known.items():
        assert why in failures.pop(op), (op, failures.get(op))
    assert not failures, "\n".join(f"{op}: {why}" for op, why in failures.items())
