"""create_app(settings) -> FastAPI: routers, problem+json handlers, lifespan (migrations, key cache,
live plans and their poller, the in-process job worker)."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from functools import partial
from typing import Any

from fastapi import FastAPI

from apportion import __version__
from apportion.api import openapi, problems
from apportion.api.routes import (
    assign,
    audit,
    comparisons,
    experiments,
    health,
    jobs,
    keys,
    models,
    plans,
    ui,
    watch,
)
from apportion.config import Settings, get_settings
from apportion.observability import RequestContextMiddleware, configure_logging, show_labels
from apportion.usecases import live, operations
from apportion.usecases.auth import KeyCache
from apportion.usecases.context import Services
from apportion.usecases.jobs import JobRunner

log = logging.getLogger("apportion.app")

DESCRIPTION = (
    "Turns a finished randomized experiment's readout into a personalized, guardrail-aware allocation: "
    "cohort models, plan versions with impact reports, review and activation, per-member assignment, "
    "a tamper-evident audit trail, and a guardrail watch with rollback."
)


def build_services(settings: Settings) -> Services:
    db = operations.open_database(settings, pool_size=settings.db_pool_size)
    services = Services(settings=settings, db=db)
    services.keys = KeyCache(db)
    services.plans = live.new_registry()
    return services


def start(services: Services) -> None:
    """Bring a process up: migrations (unless told not to), caches, poller, job worker."""
    settings = services.settings
    if settings.migrate_on_start:
        operations.upgrade_database(services.db)
    if not operations.schema_is_current(services.db):
        log.warning(
            "the database schema is behind; /readyz answers 503 until 'apportion db upgrade' runs"
        )
        return
    services.keys.refresh()
    live.start_poller(services)
    if settings.run_jobs_in_process:
        services.jobs = JobRunner(services, worker_name="in-process")
        services.jobs.start()


def stop(services: Services) -> None:
    if services.jobs is not None:
        services.jobs.stop()
    if services.poller is not None:
        services.poller.stop()
    services.db.dispose()


class ApportionApp(FastAPI):
    """FastAPI whose ASGI entry point is `front`: the lookup gateway, which hands every request
    that is not a lookup to FastAPI itself."""

    front: Any = None

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        await self.front(scope, receive, send)


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or get_settings()
    configure_logging(settings.log_level)
    services = build_services(settings)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        start(services)
        try:
            yield
        finally:
            stop(services)

    app = ApportionApp(
        title="Apportion",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url="/docs" if settings.api_docs else None,
        redoc_url=None,
    )
    app.state.services = services
    show_labels(settings.metrics_labels)
    problems.install(app)
    openapi.install(app)
    # the lookup routes first: route matching walks the routers in this order
    for r in (
        assign,
        health,
        keys,
        audit,
        experiments,
        comparisons,
        models,
        jobs,
        plans,
        watch,
        ui,
    ):
        app.include_router(r.router)
    app.add_middleware(RequestContextMiddleware)
    # in front of everything, FastAPI's own per-request work included: the lookups skip the
    # shared middleware and the router (routes/assign.py says what the gateway does instead)
    app.front = assign.LookupGateway(partial(FastAPI.__call__, app), services)
    return app
