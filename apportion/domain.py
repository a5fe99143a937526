"""Who acts, and with which role: the one definition every layer shares (the routes' key checks,
the use cases' separation of duties, the audit entries, the command line's choices).

Roles are ranked: each one may do what the roles before it may, plus its own work.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

Role = Literal["reader", "analyst", "approver", "admin"]
ROLES: tuple[Role, ...] = ("reader", "analyst", "approver", "admin")
ROLE_RANK: dict[str, int] = {role: i for i, role in enumerate(ROLES)}


@dataclass(frozen=True)
class Actor:
    """Who acts: the key's name and role, and the owner (the person or system identity the key
    belongs to; one owner may hold several keys). Separation of duties compares `identity`."""

    name: str
    role: str
    key_id: int | None = None
    owner: str | None = None

    @property
    def identity(self) -> str:
        return self.owner or self.name
