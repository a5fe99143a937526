"""API keys (admin)."""

from __future__ import annotations

from typing import Literal

from fastapi import APIRouter, status
from pydantic import BaseModel, Field

from apportion.api.body import GuardedRoute
from apportion.api.deps import AdminDep, ServicesDep
from apportion.api.fields import IdPath
from apportion.usecases import auth

router = APIRouter(prefix="/v1/keys", tags=["keys"], route_class=GuardedRoute)


IDENTITY = r"^[A-Za-z0-9_.@-]+$"


class KeyCreate(BaseModel):
    name: str = Field(
        min_length=1,
        max_length=100,
        pattern=IDENTITY,
        description="the key's label, e.g. 'ci-deploy'",
    )
    owner: str = Field(
        min_length=1,
        max_length=100,
        pattern=IDENTITY,
        description="the person or system identity the key belongs to (e.g. 'ana@example.org'); "
        "separation of duties compares owners, so one owner's keys never approve that owner's drafts",
    )
    role: Literal["reader", "analyst", "approver", "admin"]


class KeyOut(BaseModel):
    id: int
    name: str
    owner: str
    role: str
    created_at: str
    created_by: str
    revoked_at: str | None = None


class KeyCreated(KeyOut):
    secret: str = Field(description="shown once; only its SHA-256 is stored")


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
