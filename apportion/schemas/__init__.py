"""The service's typed contract: pydantic v2 models for every request body and every answer.

One module per resource (experiments and readouts, models, jobs, comparisons, plans, watch,
assignments, audit, keys; `common` holds the shared field types, the problem document and the
health answers; `fitparams` the cohort models' resolved parameters per method, shared by models
and comparisons; `reportparts` the impact report's nested parts). The routes declare these models, so the exported OpenAPI document describes
each answer; the use cases take the request models (commands) and return the answer models
(views); the HTTP client library parses answers into them.

Conventions:
- Request models (`...In`) forbid nothing they did not forbid before; their defaults are the
  service's defaults, stated once here.
- Answer models derive from `common.Answer`. A field an answer sends only in some states (a
  model's cohorts once it is fitted) has a default and is left out of the JSON while unset
  (the routes use `response_model_exclude_unset`), so the wire form is what it always was.
- Nested answer parts are models too. Where a part's shape depends on a method, a union picks
  the model: by a key of the part itself (`method` of fit diagnostics, `solver` of solver
  diagnostics, `kind` of an outcome model), or, for parameters that carry no method key, by the
  answer's method (`fitparams.for_method` tags them for the union's discriminator).
- The tests validate real answers with `model_validate(data, extra="forbid")`, which refuses
  undeclared keys at every depth, so a producer and its schema cannot drift apart unnoticed.
- Timestamps are ISO-8601 UTC text as the store writes them (`2026-12-03T16:51:10.123456Z`).

This package imports pydantic only: no web framework, no database."""
