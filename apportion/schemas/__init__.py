"""The service's typed contract: pydantic v2 models for every request body and every answer.

One module per resource (experiments and readouts, models, jobs, comparisons, plans, watch,
assignments, audit, keys; `common` holds the shared field types, the problem document and the
health answers). The routes declare these models, so the exported OpenAPI document describes
each answer; the use cases take the request models (commands) and return the answer models
(views); the HTTP client library parses answers into them.

Conventions:
- Request models (`...In`) forbid nothing they did not forbid before; their defaults are the
  service's defaults, stated once here.
- Answer models derive from `common.Answer`. A field an answer sends only in some states (a
  model's cohorts once it is fitted) has a default and is left out of the JSON while unset
  (the routes use `response_model_exclude_unset`), so the wire form is what it always was.
- Timestamps are ISO-8601 UTC text as the store writes them (`2026-12-03T16:51:10.123456Z`).

This package imports pydantic only: no web framework, no database."""
