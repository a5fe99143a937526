"""SQLAlchemy 2.0 table models. One metadata, one migration history for SQLite and PostgreSQL.

Timestamps that enter the audit hash are stored as ISO-8601 UTC text so that the bytes hashed at
write time are the bytes read back on either database.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Float,
    ForeignKey,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map = {dict[str, Any]: JSON, list[Any]: JSON}


class Experiment(Base):
    __tablename__ = "experiments"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    key: Mapped[str] = mapped_column(String(100), unique=True)
    name: Mapped[str] = mapped_column(String(200))
    declaration: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(100))


class Blob(Base):
    """Metadata of a content-addressed blob; the bytes live in the blob store (store/blobstore.py).

    kind 'object': single bytes (compressed Arrow IPC of watch rows, estimation masks);
    kind 'dataset': a readout's Parquet dataset, `sha256` the hash of its manifest.
    `location` is relative to the blob store's root (APPORTION_BLOB_URI)."""

    __tablename__ = "blobs"
    sha256: Mapped[str] = mapped_column(String(64), primary_key=True)
    size: Mapped[int] = mapped_column(BigInteger)
    kind: Mapped[str] = mapped_column(String(20))
    location: Mapped[str] = mapped_column(String(300))
    created_at: Mapped[str] = mapped_column(String(40))


class Readout(Base):
    __tablename__ = "readouts"
    __table_args__ = (
        UniqueConstraint("experiment_id", "version", name="uq_readouts_experiment_version"),
        UniqueConstraint("experiment_id", "content_hash", name="uq_readouts_experiment_hash"),
    )
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    experiment_id: Mapped[int] = mapped_column(ForeignKey("experiments.id"), index=True)
    version: Mapped[int] = mapped_column(Integer)
    content_hash: Mapped[str] = mapped_column(String(64))
    content_type: Mapped[str] = mapped_column(String(100))
    blob_sha256: Mapped[str] = mapped_column(ForeignKey("blobs.sha256"))
    n_rows: Mapped[int] = mapped_column(Integer)
    summary: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(100))


class Job(Base):
    __tablename__ = "jobs"
    id: Mapped[str] = mapped_column(String(36), primary_key=True)
    kind: Mapped[str] = mapped_column(String(40))
    status: Mapped[str] = mapped_column(String(20), index=True)
    progress: Mapped[float] = mapped_column(Float, default=0.0)
    payload: Mapped[dict[str, Any]] = mapped_column(JSON)
    error: Mapped[str | None] = mapped_column(Text, nullable=True)
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    worker: Mapped[str | None] = mapped_column(String(100), nullable=True)
    created_at: Mapped[str] = mapped_column(String(40))
    started_at: Mapped[str | None] = mapped_column(String(40), nullable=True)
    finished_at: Mapped[str | None] = mapped_column(String(40), nullable=True)
    heartbeat_at: Mapped[float | None] = mapped_column(Float, nullable=True)


class ApiKey(Base):
    __tablename__ = "api_keys"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    name: Mapped[str] = mapped_column(String(100))
    # the person or system identity the key belongs to; the author rule compares owners, not names
    owner: Mapped[str] = mapped_column(String(100), index=True)
    role: Mapped[str] = mapped_column(String(20))
    secret_sha256: Mapped[str] = mapped_column(String(64), unique=True)
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(100))
    revoked_at: Mapped[str | None] = mapped_column(String(40), nullable=True)


class AuditEntry(Base):
    """Append-only; hash = sha256(prev_hash + canonical JSON of the entry)."""

    __tablename__ = "audit_log"
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    at: Mapped[str] = mapped_column(String(40), index=True)
    actor_name: Mapped[str] = mapped_column(String(100), index=True)
    actor_role: Mapped[str] = mapped_column(String(20))
    action: Mapped[str] = mapped_column(String(60))
    entity: Mapped[str] = mapped_column(String(40), index=True)
    entity_id: Mapped[str] = mapped_column(String(200))
    reason: Mapped[str | None] = mapped_column(Text, nullable=True)
    payload: Mapped[str] = mapped_column(Text)
    prev_hash: Mapped[str] = mapped_column(String(64))
    hash: Mapped[str] = mapped_column(String(64))


class AuditHead(Base):
    """One row: the chain's last sequence number and hash; locked to append (serializes writers)."""

    __tablename__ = "audit_head"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    seq: Mapped[int] = mapped_column(Integer)
    hash: Mapped[str] = mapped_column(String(64))


# ---- added by migration 0002: cohort models, plans, the watch ------------------------------


class CohortModel(Base):
    __tablename__ = "cohort_models"
    __table_args__ = (
        UniqueConstraint("experiment_id", "version", name="uq_cohort_models_experiment_version"),
    )
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    experiment_id: Mapped[int] = mapped_column(ForeignKey("experiments.id"), index=True)
    version: Mapped[int] = mapped_column(Integer)
    readout_id: Mapped[int] = mapped_column(ForeignKey("readouts.id"))
    method: Mapped[str] = mapped_column(String(40))
    params: Mapped[dict[str, Any]] = mapped_column(JSON)
    status: Mapped[str] = mapped_column(String(20))
    job_id: Mapped[str] = mapped_column(ForeignKey("jobs.id"))
    result: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(100))


class PlanVersion(Base):
    __tablename__ = "plan_versions"
    __table_args__ = (UniqueConstraint("plan", "version", name="uq_plan_versions_plan_version"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    plan: Mapped[str] = mapped_column(String(100), index=True)
    version: Mapped[int] = mapped_column(Integer)
    model_id: Mapped[int] = mapped_column(ForeignKey("cohort_models.id"))
    status: Mapped[str] = mapped_column(String(20))
    spec: Mapped[dict[str, Any]] = mapped_column(JSON)
    allocation: Mapped[dict[str, Any]] = mapped_column(JSON)
    report: Mapped[dict[str, Any]] = mapped_column(JSON)
    salt: Mapped[str] = mapped_column(String(64))
    content_hash: Mapped[str] = mapped_column(String(64))
    author: Mapped[str] = mapped_column(String(100))
    author_owner: Mapped[str] = mapped_column(String(100))  # the owner of the author's key
    created_at: Mapped[str] = mapped_column(String(40))
    decided_by: Mapped[str | None] = mapped_column(String(100), nullable=True)
    decided_at: Mapped[str | None] = mapped_column(String(40), nullable=True)
    decision_reason: Mapped[str | None] = mapped_column(Text, nullable=True)


class PlanPointer(Base):
    __tablename__ = "plan_pointers"
    plan: Mapped[str] = mapped_column(String(100), primary_key=True)
    active_version: Mapped[int | None] = mapped_column(Integer, nullable=True)
    revision: Mapped[int] = mapped_column(Integer, default=0)
    updated_at: Mapped[str] = mapped_column(String(40))
    auto_rollback: Mapped[dict[str, Any]] = mapped_column(JSON)


class PlanActivation(Base):
    """History of what was live when: one row per activation or rollback."""

    __tablename__ = "plan_activations"
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    plan: Mapped[str] = mapped_column(String(100), index=True)
    version: Mapped[int] = mapped_column(Integer)
    revision: Mapped[int] = mapped_column(Integer)
    kind: Mapped[str] = mapped_column(String(20))
    actor: Mapped[str] = mapped_column(String(100))
    reason: Mapped[str] = mapped_column(Text)
    at: Mapped[str] = mapped_column(String(40))


class WatchUpload(Base):
    __tablename__ = "watch_uploads"
    __table_args__ = (
        UniqueConstraint("plan", "version", "seq", name="uq_watch_uploads_plan_version_seq"),
    )
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    plan: Mapped[str] = mapped_column(String(100), index=True)
    version: Mapped[int] = mapped_column(Integer)
    seq: Mapped[int] = mapped_column(Integer)
    blob_sha256: Mapped[str] = mapped_column(ForeignKey("blobs.sha256"))
    n_rows: Mapped[int] = mapped_column(Integer)
    result: Mapped[dict[str, Any]] = mapped_column(JSON)
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(100))


# ---- added by migration 0005: method comparisons -------------------------------------------


class Comparison(Base):
    """A method comparison on one readout: numbered per experiment (1, 2, ...), run as a job;
    `result` holds the held-out table once the job is done (or {"error": ...} when it failed)."""

    __tablename__ = "comparisons"
    __table_args__ = (
        UniqueConstraint("experiment_id", "number", name="uq_comparisons_experiment_number"),
    )
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    experiment_id: Mapped[int] = mapped_column(ForeignKey("experiments.id"), index=True)
    number: Mapped[int] = mapped_column(Integer)
    readout_id: Mapped[int] = mapped_column(ForeignKey("readouts.id"))
    model_id: Mapped[int | None] = mapped_column(ForeignKey("cohort_models.id"), nullable=True)
    spec: Mapped[dict[str, Any]] = mapped_column(JSON)
    status: Mapped[str] = mapped_column(String(20))
    job_id: Mapped[str] = mapped_column(ForeignKey("jobs.id"))
    result: Mapped[dict[str, Any] | None] = mapped_column(JSON, nullable=True)
    created_at: Mapped[str] = mapped_column(String(40))
    created_by: Mapped[str] = mapped_column(String(100))
