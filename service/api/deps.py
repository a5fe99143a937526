"""Dependencies shared by the routes, as Annotated aliases."""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from service.store.audit import Actor
from service.usecases.auth import check_role
from service.usecases.context import Services


def get_services(request: Request) -> Services:
    return request.app.state.services


ServicesDep = Annotated[Services, Depends(get_services)]


def _require(role: str):  # type: ignore[no-untyped-def]
    def dependency(request: Request) -> Actor:
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
