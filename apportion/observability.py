"""Prometheus metrics, JSON-lines logging and the request-id middleware (pure ASGI, cheap enough to
sit in front of the assignment route). Logs never carry secrets or feature payloads."""

from __future__ import annotations

import json
import logging
import sys
import time
import uuid
from collections.abc import Iterable
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram

REGISTRY = CollectorRegistry(auto_describe=True)

# Business labels (plan names, versions, arms, guardrail metrics) reveal what is being tested to
# anyone who can read /metrics, which needs no key: it belongs behind the cluster network. Each
# may be turned off (APPORTION_METRICS_LABELS); a label that is off is reported as "redacted".
BUSINESS_LABELS = ("plan", "version", "arm", "metric")
REDACTED = "redacted"
_shown_labels: set[str] = set(BUSINESS_LABELS)


def show_labels(labels: Iterable[str]) -> None:
    """Which business labels this process reports (set from the settings when the app is made;
    process-wide like the registry itself)."""
    unknown = set(labels) - set(BUSINESS_LABELS)
    if unknown:
        raise ValueError(f"unknown metric labels {sorted(unknown)}; known: {BUSINESS_LABELS}")
    _shown_labels.clear()
    _shown_labels.update(labels)


def _redact(names: tuple[str, ...], values: tuple[str, ...]) -> tuple[str, ...]:
    return tuple(
        v if n not in BUSINESS_LABELS or n in _shown_labels else REDACTED
        for n, v in zip(names, values, strict=True)
    )


class _RedactingCounter(Counter):
    def labels(self, *values: Any, **kw: Any) -> Any:
        if kw:
            values = tuple(kw[n] for n in self._labelnames)
        return super().labels(*_redact(self._labelnames, tuple(str(v) for v in values)))


class _RedactingGauge(Gauge):
    def labels(self, *values: Any, **kw: Any) -> Any:
        if kw:
            values = tuple(kw[n] for n in self._labelnames)
        return super().labels(*_redact(self._labelnames, tuple(str(v) for v in values)))


REQUESTS = Counter(
    "apportion_http_requests_total",
    "HTTP requests by route and status",
    ["route", "method", "status"],
    registry=REGISTRY,
)
LATENCY = Histogram(
    "apportion_http_request_seconds",
    "HTTP request latency by route",
    ["route"],
    registry=REGISTRY,
    buckets=(0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10),
)
ASSIGNMENTS = _RedactingCounter(
    "apportion_assignments_total",
    "Assignments served by plan, version and arm",
    ["plan", "version", "arm"],
    registry=REGISTRY,
)
JOB_SECONDS = Histogram(
    "apportion_job_seconds",
    "Job durations by kind",
    ["kind"],
    registry=REGISTRY,
    buckets=(0.1, 0.5, 1, 2, 5, 10, 30, 60, 120, 300, 600, 1800),
)
JOB_FAILURES = Counter(
    "apportion_job_failures_total", "Failed jobs by kind", ["kind"], registry=REGISTRY
)
REFRESH_AGE = Gauge(
    "apportion_plans_refresh_age_seconds",
    "Seconds since this process last refreshed its live plans",
    registry=REGISTRY,
)
LIVE_VERSION = _RedactingGauge(
    "apportion_live_plan_version",
    "The live version of each plan in this process",
    ["plan"],
    registry=REGISTRY,
)
WATCH_STATUS = _RedactingGauge(
    "apportion_guardrail_breached",
    "1 when the watch finds a guardrail breached",
    ["plan", "metric"],
    registry=REGISTRY,
)


class JsonFormatter(logging.Formatter):
    _skip = set(vars(logging.LogRecord("", 0, "", 0, "", (), None))) | {"message", "asctime"}

    def format(self, record: logging.LogRecord) -> str:
        out: dict[str, Any] = {
            "ts": time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
            + f".{int(record.msecs):03d}Z",
            "level": record.levelname,
            "logger": record.name,
            "msg": record.getMessage(),
        }
        for k, v in vars(record).items():
            if k not in self._skip and not k.startswith("_"):
                out[k] = v
        if record.exc_info:
            out["exc"] = self.formatException(record.exc_info)
        return json.dumps(out, default=str)


def configure_logging(level: str) -> None:
    root = logging.getLogger("apportion")
    root.setLevel(level)
    if not any(isinstance(h.formatter, JsonFormatter) for h in root.handlers):
        h = logging.StreamHandler(sys.stderr)
        h.setFormatter(JsonFormatter())
        root.addHandler(h)
    root.propagate = False


access_log = logging.getLogger("apportion.access")


class RequestContextMiddleware:
    """Takes X-Request-ID (or makes one), returns it, times the request and counts it by route."""

    def __init__(self, app: Any) -> None:
        self.app = app

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        rid = None
        for k, v in scope.get("headers", ()):
            if k == b"x-request-id":
                rid = v.decode("latin-1")[:100]
                break
        rid = rid or uuid.uuid4().hex
        scope.setdefault("state", {})["request_id"] = rid
        status = [500]
        raw_rid = rid.encode("latin-1")

        async def send_wrapper(message: dict[str, Any]) -> None:
            if message["type"] == "http.response.start":
                status[0] = message["status"]
                message["headers"] = [*message.get("headers", []), (b"x-request-id", raw_rid)]
            await send(message)

        start = time.perf_counter()
        try:
            await self.app(scope, receive, send_wrapper)
        finally:
            elapsed = time.perf_counter() - start
            route = scope.get("route")
            label = getattr(route, "path", None) or "unmatched"
            REQUESTS.labels(label, scope["method"], str(status[0])).inc()
            LATENCY.labels(label).observe(elapsed)
            if (
                access_log.isEnabledFor(logging.INFO)
                and not label.endswith("/assign")
                and label != "/healthz"
            ):
                access_log.info(
                    "request",
                    extra={
                        "request_id": rid,
                        "method": scope["method"],
                        "route": label,
                        "status": status[0],
                        "ms": round(elapsed * 1000, 3),
                    },
                )
