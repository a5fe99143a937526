"""The checked-in OpenAPI schema is what the app generates (regenerate with `make openapi`)."""

from __future__ import annotations

from pathlib import Path

from service.openapi_export import render

SPEC = Path(__file__).resolve().parents[1] / "openapi" / "openapi.json"


def test_checked_in_schema_has_not_drifted() -> None:
    assert SPEC.exists(), "openapi/openapi.json is missing: run `make openapi`"
    assert SPEC.read_text() == render(), (
        "openapi/openapi.json differs from the app: run `make openapi` and commit it"
    )
