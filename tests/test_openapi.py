"""The checked-in OpenAPI schema is what the app generates (regenerate with `make openapi`)."""

from __future__ import annotations

from pathlib import Path

from apportion.openapi_export import render

SPEC = Path(__file__).resolve().parents[1] / "openapi" / "openapi.json"


def test_checked_in_schema_has_not_drifted() -> None:
    assert SPEC.exists(), "openapi/openapi.json is missing: run `make openapi`"
    assert SPEC.read_text() == render(), (
        "openapi/openapi.json differs from the app: run `make openapi` and commit it"
    )


def _refs(node: object) -> list[str]:
    if isinstance(node, dict):
        return [v for k, v in node.items() if k == "$ref"] + [
            r for k, v in node.items() if k != "$ref" for r in _refs(v)
        ]
    if isinstance(node, list):
        return [r for v in node for r in _refs(v)]
    return []


def test_the_document_passes_an_openapi_validator() -> None:
    """openapi-spec-validator (the reference validator of the OpenAPI 3.x specification, an
    outside check) accepts the document; it resolves every $ref on the way."""
    from openapi_spec_validator import validate

    from apportion.openapi_export import openapi_document

    doc = openapi_document()
    validate(doc)
    for ref in _refs(doc):  # and each one points into this document's components
        assert ref.startswith("#/components/schemas/"), ref
        assert ref.rsplit("/", 1)[1] in doc["components"]["schemas"], ref


def test_every_key_route_declares_its_security_and_its_problems() -> None:
    from apportion.openapi_export import openapi_document

    doc = openapi_document()
    assert doc["components"]["securitySchemes"]["apiKey"] == {
        **doc["components"]["securitySchemes"]["apiKey"],
        "type": "http",
        "scheme": "bearer",
    }
    assert "HTTPValidationError" not in doc["components"]["schemas"]
    for path, item in doc["paths"].items():
        for method, op in item.items():
            responses = op["responses"]
            for code, answer in responses.items():
                if code.startswith(("4", "5")) and path != "/readyz":  # 422 included
                    assert list(answer["content"]) == ["application/problem+json"], (
                        method,
                        path,
                        code,
                    )
            if path.startswith("/v1/"):
                assert op["security"] == [{"apiKey": []}], (method, path)
                assert {"401", "403"} <= set(responses), (method, path)
            if "{" in path:
                assert "404" in responses, (method, path)
            if "requestBody" in op:
                assert "413" in responses, (method, path)
    for route in ("activate", "rollback"):
        assert "409" in doc["paths"][f"/v1/plans/{{plan}}/{route}"]["post"]["responses"]


def _named_fields(schema: dict, components: dict) -> set[str]:  # type: ignore[type-arg]
    while "$ref" in schema:
        schema = components["schemas"][schema["$ref"].rsplit("/", 1)[1]]
    return set(schema.get("properties") or {})


def test_every_answer_of_every_operation_has_a_schema() -> None:
    """Each documented answer says what its body is: a media type with a schema for every status
    that carries a body, and a JSON body's schema names its fields (a bare `object` says
    nothing); 204 and 304 carry no body (RFC 9110 sections 15.3.5 and 15.4.5), so for them the
    document must not promise one."""
    from apportion.openapi_export import openapi_document

    doc = openapi_document()
    components = doc["components"]
    missing, promised = [], []
    answers = 0
    for path, item in doc["paths"].items():
        for method, op in item.items():
            for code, answer in op["responses"].items():
                answers += 1
                content = answer.get("content") or {}
                if code in ("204", "304"):
                    if content:
                        promised.append((method, path, code))
                    continue
                if not content:
                    missing.append((method, path, code, "no content"))
                for media, spec in content.items():
                    schema = spec.get("schema") or {}
                    if "json" in media and not _named_fields(schema, components):
                        missing.append((method, path, code, media))
                    elif not schema:
                        missing.append((method, path, code, media))
    assert answers > 100  # every operation answers at least 401/403/500 besides its success
    assert missing == [], missing
    assert promised == [], promised
