"""Post-launch uploads of the guardrail watch, per plan version."""

from __future__ import annotations

from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from apportion.store.db import next_number, utcnow
from apportion.store.tables import WatchUpload


def uploads(*, session: Session, plan: str, version: int) -> list[WatchUpload]:
    q = (
        select(WatchUpload)
        .where(WatchUpload.plan == plan, WatchUpload.version == version)
        .order_by(WatchUpload.seq)
    )
    return list(session.execute(q).scalars())


def add_upload(
    *,
    session: Session,
    plan: str,
    version: int,
    blob_sha256: str,
    n_rows: int,
    result: dict[str, Any],
    created_by: str,
) -> WatchUpload:
    """The next upload number of the plan version; the caller holds the plan's pointer lock."""
    row = WatchUpload(
        plan=plan,
        version=version,
        seq=next_number(
            session, WatchUpload.seq, WatchUpload.plan == plan, WatchUpload.version == version
        ),
        blob_sha256=blob_sha256,
        n_rows=n_rows,
        result=result,
        created_at=utcnow(),
        created_by=created_by,
    )
    session.add(row)
    session.flush()
    return row


def latest_version_watched(*, session: Session, plan: str) -> int | None:
    return session.execute(
        select(func.max(WatchUpload.version)).where(WatchUpload.plan == plan)
    ).scalar()
