"""API keys (admin)."""

from __future__ import annotations

from fastapi import APIRouter, status

from apportion.api.body import GuardedRoute
from apportion.api.deps import AdminDep, ServicesDep
from apportion.api.fields import IdPath
from apportion.schemas.keys import KeyCreate, KeyCreated, KeyOut
from apportion.usecases import auth

router = APIRouter(prefix="/v1/keys", tags=["keys"], route_class=GuardedRoute)


@router.post(
    "", status_code=status.HTTP_201_CREATED, response_model=KeyCreated, summary="Create an API key"
)
def create_key(body: KeyCreate, actor: AdminDep, services: ServicesDep) -> KeyCreated:
    rec, secret = auth.create_key(
        services.db, name=body.name, owner=body.owner, role=body.role, actor=actor
    )
    services.keys.refresh()
    return KeyCreated(**rec.public(), secret=secret)  # type: ignore[arg-type]


@router.delete(
    "/{key_id}",
    response_model=KeyOut,
    summary="Revoke an API key (never the last active admin key: 409)",
)
def revoke_key(key_id: IdPath, actor: AdminDep, services: ServicesDep) -> KeyOut:
    rec = auth.revoke_key(services.db, key_id=key_id, actor=actor)
    services.keys.refresh()
    return KeyOut(**rec.public())  # type: ignore[arg-type]
