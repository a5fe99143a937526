"""Dependencies shared by the routes, as Annotated aliases, and the route class that
authenticates before anything else."""

from __future__ import annotations

from collections.abc import Callable, Coroutine
from typing import Annotated, Any

from fastapi import Depends, Request, Response
from fastapi.routing import APIRoute
from starlette.concurrency import run_in_threadpool

from apportion.domain import Actor
from apportion.usecases.auth import check_role
from apportion.usecases.context import Services


def get_services(request: Request) -> Services:
    return request.app.state.services


ServicesDep = Annotated[Services, Depends(get_services)]


class AuthenticatedRoute(APIRoute):
    """A route that checks the API key before FastAPI reads, decodes or validates anything of the
    request: without a valid key the answer is 401 whatever the body holds (a malformed body is
    no reason to tell an unauthenticated caller about the schema). The role check stays in the
    route's dependency, which reuses the actor found here."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def authenticate_first(request: Request) -> Response:
            services: Services = request.app.state.services
            request.state.actor = await run_in_threadpool(
                services.keys.authenticate, request.headers.get("authorization")
            )
            return await handler(request)

        return authenticate_first


def _require(role: str):  # type: ignore[no-untyped-def]
    def dependency(request: Request) -> Actor:
        actor = getattr(request.state, "actor", None)
        if actor is None:  # a route outside AuthenticatedRoute (the review fragments)
            services: Services = request.app.state.services
            actor = services.keys.authenticate(request.headers.get("authorization"))
        check_role(actor, role)
        return actor

    dependency.__name__ = f"require_{role}"
    return dependency


ReaderDep = Annotated[Actor, Depends(_require("reader"))]
AnalystDep = Annotated[Actor, Depends(_require("analyst"))]
ApproverDep = Annotated[Actor, Depends(_require("approver"))]
AdminDep = Annotated[Actor, Depends(_require("admin"))]
