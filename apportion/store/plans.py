"""Plan versions, the plan pointer (active version + revision for optimistic concurrency) and the
activation history. A version's content is immutable once it leaves draft: a flush that would
change it raises, whoever tries."""

from __future__ import annotations

from typing import Any

from sqlalchemy import event, inspect, select
from sqlalchemy.orm import Session

from apportion.errors import Conflict, InvalidTransition, NotFound
from apportion.store.db import insert_or_ignore, next_number, utcnow
from apportion.store.tables import PlanActivation, PlanPointer, PlanVersion

IMMUTABLE = (
    "plan",
    "version",
    "model_id",
    "spec",
    "allocation",
    "report",
    "salt",
    "content_hash",
    "author",
    "author_owner",
    "created_at",
)


class ImmutableVersion(InvalidTransition):
    title = "Plan version is immutable"


@event.listens_for(Session, "before_flush")
def _guard_versions(session: Session, _ctx: Any, _instances: Any) -> None:
    for obj in session.dirty:
        if not isinstance(obj, PlanVersion):
            continue
        state = inspect(obj)
        status_hist = state.attrs.status.history
        committed_status = status_hist.deleted[0] if status_hist.deleted else obj.status
        changed = [name for name in IMMUTABLE if state.attrs[name].history.has_changes()]
        if changed and committed_status != "draft":
            raise ImmutableVersion(
                f"plan version {obj.plan}/{obj.version} is {committed_status} and cannot change ({', '.join(changed)})"
            )
        if changed and obj.status != "draft" and committed_status == "draft":
            raise ImmutableVersion(
                f"plan version {obj.plan}/{obj.version}: content and approval cannot change together"
            )
    for obj in session.deleted:
        if isinstance(obj, PlanVersion) and obj.status != "draft":
            raise ImmutableVersion(
                f"plan version {obj.plan}/{obj.version} is {obj.status} and cannot be deleted"
            )


def pointer(*, session: Session, plan: str, lock: bool = False) -> PlanPointer | None:
    """The plan's pointer; with `lock`, its row is locked for the rest of the transaction (level 2
    of the lock order in store/db.py: every change to the plan takes it first)."""
    q = select(PlanPointer).where(PlanPointer.plan == plan)
    if lock:
        q = q.with_for_update().execution_options(populate_existing=True)
    return session.execute(q).scalar_one_or_none()


def ensure_pointer(*, session: Session, plan: str) -> PlanPointer:
    """Lock the plan's pointer, creating it first if the plan is new (two first drafts may race to
    create it: the insert skips an existing row, then both lock the one row)."""
    row = pointer(session=session, plan=plan, lock=True)
    if row is None:
        insert_or_ignore(
            session,
            PlanPointer,
            {
                "plan": plan,
                "active_version": None,
                "revision": 0,
                "updated_at": utcnow(),
                "auto_rollback": {"enabled": False},
            },
        )
        row = pointer(session=session, plan=plan, lock=True)
        assert row is not None
    return row


def next_version(*, session: Session, plan: str) -> int:
    """The plan's next version number; the caller holds the plan's pointer lock."""
    return next_number(session, PlanVersion.version, PlanVersion.plan == plan)


def add_version(*, session: Session, **fields: Any) -> PlanVersion:
    row = PlanVersion(status="draft", created_at=utcnow(), **fields)
    session.add(row)
    session.flush()
    return row


def get_version(*, session: Session, plan: str, version: int, lock: bool = False) -> PlanVersion:
    """One version; `lock` takes its row lock (level 4 of the lock order, store/db.py) for a
    read-modify-write of its report by a job."""
    q = select(PlanVersion).where(PlanVersion.plan == plan, PlanVersion.version == version)
    row = session.execute(q.with_for_update() if lock else q).scalar_one_or_none()
    if row is None:
        raise NotFound(f"plan '{plan}' has no version {version}")
    return row


def latest_version(*, session: Session, plan: str) -> PlanVersion | None:
    q = (
        select(PlanVersion)
        .where(PlanVersion.plan == plan)
        .order_by(PlanVersion.version.desc())
        .limit(1)
    )
    return session.execute(q).scalar_one_or_none()


def list_versions(*, session: Session, plan: str) -> list[PlanVersion]:
    return list(
        session.execute(
            select(PlanVersion).where(PlanVersion.plan == plan).order_by(PlanVersion.version)
        ).scalars()
    )


def list_plans(*, session: Session) -> list[PlanPointer]:
    return list(session.execute(select(PlanPointer).order_by(PlanPointer.plan)).scalars())


def revisions(*, session: Session) -> dict[str, tuple[int, int | None]]:
    rows = session.execute(
        select(PlanPointer.plan, PlanPointer.revision, PlanPointer.active_version)
    ).all()
    return {p: (r, v) for p, r, v in rows}


def add_activation(
    *, session: Session, plan: str, version: int, revision: int, kind: str, actor: str, reason: str
) -> None:
    session.add(
        PlanActivation(
            plan=plan,
            version=version,
            revision=revision,
            kind=kind,
            actor=actor,
            reason=reason,
            at=utcnow(),
        )
    )
    session.flush()


def activations(*, session: Session, plan: str) -> list[PlanActivation]:
    return list(
        session.execute(
            select(PlanActivation).where(PlanActivation.plan == plan).order_by(PlanActivation.id)
        ).scalars()
    )


def move_pointer(
    *, session: Session, ptr: PlanPointer, to_version: int | None, expected_revision: int | None
) -> int:
    """Point the plan at `to_version`; 409 when `expected_revision` is stale. Returns the new revision."""
    if expected_revision is not None and ptr.revision != expected_revision:
        raise Conflict(
            f"plan '{ptr.plan}' is at revision {ptr.revision}, not {expected_revision}: someone changed it; reload and retry",
            current_revision=ptr.revision,
        )
    ptr.active_version = to_version
    ptr.revision += 1
    ptr.updated_at = utcnow()
    session.flush()
    return ptr.revision
