"""Experiments and their readouts."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from apportion.errors import Conflict, NotFound
from apportion.store.db import next_number, utcnow
from apportion.store.tables import Experiment, Readout


def add_experiment(
    *, session: Session, key: str, name: str, declaration: dict[str, Any], created_by: str
) -> Experiment:
    if session.execute(select(Experiment.id).where(Experiment.key == key)).first():
        raise Conflict(f"an experiment with key '{key}' already exists")
    row = Experiment(
        key=key, name=name, declaration=declaration, created_at=utcnow(), created_by=created_by
    )
    session.add(row)
    try:
        session.flush()
    except IntegrityError as exc:  # a concurrent insert of the same key
        raise Conflict(f"an experiment with key '{key}' already exists") from exc
    return row


def get_experiment(*, session: Session, key: str, lock: bool = False) -> Experiment:
    """The experiment; with `lock`, its row is locked for the rest of the transaction (level 1 of
    the lock order in store/db.py: readout and model numbers and content hashes are decided
    under it)."""
    q = select(Experiment).where(Experiment.key == key)
    if lock:
        q = q.with_for_update().execution_options(populate_existing=True)
    row = session.execute(q).scalar_one_or_none()
    if row is None:
        raise NotFound(f"no experiment with key '{key}'")
    return row


def list_readouts(*, session: Session, experiment_id: int) -> list[Readout]:
    q = select(Readout).where(Readout.experiment_id == experiment_id).order_by(Readout.version)
    return list(session.execute(q).scalars())


def find_readout_by_hash(
    *, session: Session, experiment_id: int, content_hash: str
) -> Readout | None:
    q = select(Readout).where(
        Readout.experiment_id == experiment_id, Readout.content_hash == content_hash
    )
    return session.execute(q).scalar_one_or_none()


def add_readout(
    *,
    session: Session,
    experiment: Experiment,
    content_hash: str,
    content_type: str,
    blob_sha256: str,
    n_rows: int,
    summary: dict[str, Any],
    created_by: str,
) -> Readout:
    """The next version of the experiment's readouts; the caller holds the experiment's lock."""
    row = Readout(
        experiment_id=experiment.id,
        version=next_number(session, Readout.version, Readout.experiment_id == experiment.id),
        content_hash=content_hash,
        content_type=content_type,
        blob_sha256=blob_sha256,
        n_rows=n_rows,
        summary=summary,
        created_at=utcnow(),
        created_by=created_by,
    )
    session.add(row)
    session.flush()
    return row


def get_readout(*, session: Session, experiment_id: int, version: int) -> Readout:
    q = select(Readout).where(Readout.experiment_id == experiment_id, Readout.version == version)
    row = session.execute(q).scalar_one_or_none()
    if row is None:
        raise NotFound(f"no readout version {version} for this experiment")
    return row


def get_readout_by_id(*, session: Session, readout_id: int) -> Readout:
    row = session.get(Readout, readout_id)
    if row is None:
        raise NotFound(f"no readout with id {readout_id}")
    return row
