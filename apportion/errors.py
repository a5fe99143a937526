"""One exception tree for the whole service; translated to HTTP in one place (api/problems.py).

    ApportionError
    ├── InvalidInput        422  a request or an upload that cannot be accepted (carries `errors`)
    │   ├── Infeasible      422  no allocation satisfies the guardrails (carries per-guardrail bests)
    │   └── UnsupportedMediaType 415  an upload in a format we do not read
    ├── PayloadTooLarge     413
    ├── Unauthenticated     401
    ├── Forbidden           403
    ├── NotFound            404
    ├── Conflict            409  a stale revision, a duplicate key
    │   ├── InvalidTransition 409  a lifecycle step that the version's state does not allow
    │   └── JobLost         409  a worker's job was reclaimed while it ran (jobs only, never HTTP)
    └── NotReady            503

Domain code raises these with messages that carry the values; it never imports the web layer.
"""

from __future__ import annotations

from typing import Any


class ApportionError(Exception):
    status = 500
    title = "Internal error"
    slug = "internal"

    def __init__(self, detail: str, *, errors: list[dict[str, Any]] | None = None, **extra: Any):
        super().__init__(detail)
        self.detail = detail
        self.errors = errors or []
        self.extra = extra


class InvalidInput(ApportionError):
    status = 422
    title = "Invalid input"
    slug = "invalid-input"


class Infeasible(InvalidInput):
    title = "No allocation satisfies the guardrails"
    slug = "infeasible"


class UnsupportedMediaType(InvalidInput):
    status = 415
    title = "Unsupported media type"
    slug = "unsupported-media-type"


class PayloadTooLarge(ApportionError):
    status = 413
    title = "Upload too large"
    slug = "payload-too-large"


class Unauthenticated(ApportionError):
    status = 401
    title = "Authentication required"
    slug = "unauthenticated"


class Forbidden(ApportionError):
    status = 403
    title = "Forbidden"
    slug = "forbidden"


class NotFound(ApportionError):
    status = 404
    title = "Not found"
    slug = "not-found"


class Conflict(ApportionError):
    status = 409
    title = "Conflict"
    slug = "conflict"


class InvalidTransition(Conflict):
    title = "Transition not allowed"
    slug = "invalid-transition"


class NotReady(ApportionError):
    status = 503
    title = "Not ready"
    slug = "not-ready"


class JobLost(Conflict):
    """The job was reclaimed (its heartbeat looked stale) while this worker still ran it: the
    worker's late writes are refused and its transaction rolled back."""

    def __init__(self, job_id: str) -> None:
        super().__init__(f"job {job_id} was reclaimed while it ran; its result was not stored")
