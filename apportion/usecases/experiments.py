"""Declaring experiments and storing readouts: validated whole, stored with their audit entry in one
transaction, immutable and content-hashed (the same bytes twice give the same version).

Longer than most modules (about 530 lines): the declaration's validation and the readout's
upload share the experiment's specs (`specs_of`) and its view, and a readout is checked against
the declaration it belongs to; a split into declaring and readouts would pass both around."""

from __future__ import annotations

import hashlib
import os
import tempfile
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow.fs as pafs

from apportion.domain import Actor
from apportion.errors import InvalidInput
from apportion.ingest.dataset import MANIFEST, Manifest, read_dataset
from apportion.ingest.formats import media_format
from apportion.ingest.problems import Problems
from apportion.ingest.stream import Ingested, Source, file_source, ingest
from apportion.schemas.experiments import (
    Declaration,
    ExperimentIn,
    ExperimentView,
    ReadoutListed,
    ReadoutSummary,
    ReadoutView,
)
from apportion.stats.estimates import CellMoments, cell_moments, metric_estimates
from apportion.stats.srm import sample_ratio_check
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable
from apportion.store import audit, blobs
from apportion.store import experiments as repo
from apportion.store.db import Database

RESERVED_COLUMNS = {"unit_id", "arm", "member_id", "holdout"}


@dataclass(frozen=True)
class ExperimentSpecs:
    """The declaration in the shapes the statistics use (arms control first)."""

    key: str
    arm_keys: tuple[str, ...]
    design_shares: np.ndarray
    metrics: tuple[MetricSpec, ...]
    features: tuple[FeatureSpec, ...]

    def metric(self, key: str) -> MetricSpec | None:
        return next((m for m in self.metrics if m.key == key), None)


def specs_of(declaration: dict[str, Any]) -> ExperimentSpecs:
    arms = declaration["arms"]
    control = declaration["control"]
    ordered = [a for a in arms if a["key"] == control] + [a for a in arms if a["key"] != control]
    return ExperimentSpecs(
        key=declaration["key"],
        arm_keys=tuple(a["key"] for a in ordered),
        design_shares=np.array([float(a["share"]) for a in ordered]),
        metrics=tuple(
            MetricSpec(
                m["key"],
                m["kind"],
                m.get("direction", "higher"),
                m.get("numerator"),
                m.get("denominator"),
            )
            for m in declaration["metrics"]
        ),
        features=tuple(
            FeatureSpec(
                f["key"], f["kind"], tuple(f.get("levels") or ()), bool(f.get("personalize", True))
            )
            for f in declaration["features"]
        ),
    )


def validate_declaration(decl: dict[str, Any]) -> None:
    """Cross-field rules that a schema cannot say; raises InvalidInput naming every problem."""
    errs: list[dict[str, Any]] = []
    arm_keys = [a["key"] for a in decl["arms"]]
    if len(set(arm_keys)) != len(arm_keys):
        errs.append({"field": "arms", "problem": "arm keys must be unique"})
    total = sum(float(a["share"]) for a in decl["arms"])
    if abs(total - 1.0) > 1e-6:
        errs.append(
            {"field": "arms", "problem": f"designed shares must sum to 1; they sum to {total:.6g}"}
        )
    if decl["control"] not in arm_keys:
        errs.append(
            {
                "field": "control",
                "problem": f"control arm '{decl['control']}' is not one of the arms {arm_keys}",
            }
        )
    names: dict[str, str] = {}
    for m in decl["metrics"]:
        cols = [m["key"]] if m["kind"] != "ratio" else [m.get("numerator"), m.get("denominator")]
        if m["kind"] == "ratio" and (not m.get("numerator") or not m.get("denominator")):
            errs.append(
                {
                    "field": f"metrics.{m['key']}",
                    "problem": "a ratio metric needs numerator and denominator columns",
                }
            )
            continue
        if m["kind"] == "ratio" and m["numerator"] == m["denominator"]:
            errs.append(
                {
                    "field": f"metrics.{m['key']}",
                    "problem": "numerator and denominator must be different columns",
                }
            )
        if m["key"] in names:
            errs.append({"field": f"metrics.{m['key']}", "problem": "metric keys must be unique"})
        names[m["key"]] = f"metric '{m['key']}'"
        for c in cols:
            if c in RESERVED_COLUMNS:
                errs.append(
                    {"field": f"metrics.{m['key']}", "problem": f"column name '{c}' is reserved"}
                )
            elif c != m["key"]:  # a ratio's component columns are read from the upload too
                names.setdefault(c, f"a column of ratio metric '{m['key']}'")
    for f in decl["features"]:
        if f["key"] in RESERVED_COLUMNS:
            errs.append(
                {
                    "field": f"features.{f['key']}",
                    "problem": f"column name '{f['key']}' is reserved",
                }
            )
        elif f["key"] in names:
            errs.append(
                {
                    "field": f"features.{f['key']}",
                    "problem": f"feature '{f['key']}' is already {names[f['key']]}; a column is "
                    "either a feature or a metric, once",
                }
            )
        names[f["key"]] = f"feature '{f['key']}'"
        errs.extend(_level_problems(f))
        if f.get("personalize", True) is False and not (f.get("reason") or "").strip():
            errs.append(
                {
                    "field": f"features.{f['key']}.reason",
                    "problem": f"feature '{f['key']}' is declared not for personalization; "
                    "say why in 'reason'",
                }
            )
        if f.get("personalize", True) and f.get("reason") is not None:
            errs.append(
                {
                    "field": f"features.{f['key']}.reason",
                    "problem": "a reason goes with personalize: false only",
                }
            )
        if f["kind"] == "numeric" and f.get("levels"):
            errs.append(
                {
                    "field": f"features.{f['key']}",
                    "problem": "only categorical features have levels",
                }
            )
    if errs:
        raise InvalidInput(
            f"the experiment declaration has {len(errs)} problem(s): "
            + "; ".join(e["problem"] for e in errs[:3]),
            errors=errs,
        )


def _level_problems(f: dict[str, Any]) -> list[dict[str, Any]]:
    """Declared levels are the codes of a categorical feature: each must be a distinct non-empty
    text (an empty field in an upload means missing, so an empty level could never be seen)."""
    levels = f.get("levels") or []
    field = f"features.{f['key']}.levels"
    out = []
    if any(not str(v).strip() for v in levels):
        out.append({"field": field, "problem": f"feature '{f['key']}' declares an empty level"})
    dups = sorted(v for v, k in Counter(levels).items() if k > 1)
    if dups:
        out.append(
            {
                "field": field,
                "problem": f"feature '{f['key']}' declares levels more than once: "
                + ", ".join(repr(v) for v in dups[:10]),
            }
        )
    return out


def declare(db: Database, *, command: ExperimentIn, actor: Actor) -> ExperimentView:
    declaration = command.model_dump(exclude_none=True)
    validate_declaration(declaration)
    with db.write() as s:
        row = repo.add_experiment(
            session=s,
            key=declaration["key"],
            name=declaration.get("name") or declaration["key"],
            declaration=declaration,
            created_by=actor.name,
        )
        audit.append(
            s,
            actor=actor,
            action="experiment.declare",
            entity="experiment",
            entity_id=row.key,
            payload=declaration,
        )
        return experiment_view(row, [])


def experiment_view(row: Any, readouts: list[Any]) -> ExperimentView:
    """The stored declaration (validated as it is read) with who declared it and its readouts."""
    declared = Declaration.model_validate(row.declaration)
    return ExperimentView.model_validate(
        {
            **declared.model_dump(exclude_unset=True),
            "name": row.name,
            "created_at": row.created_at,
            "created_by": row.created_by,
            "readouts": [
                ReadoutListed(
                    version=r.version,
                    n_rows=r.n_rows,
                    content_hash=r.content_hash,
                    created_at=r.created_at,
                    sample_ratio=ReadoutSummary.model_validate(r.summary).sample_ratio,
                )
                for r in readouts
            ],
        }
    )


def get(db: Database, *, key: str) -> ExperimentView:
    with db.read() as s:
        row = repo.get_experiment(session=s, key=key)
        return experiment_view(row, repo.list_readouts(session=s, experiment_id=row.id))


def summarize(table: UnitTable) -> dict[str, Any]:
    """Per arm and metric n, mean and standard error (delta method for ratios), and the SRM check."""
    zeros = np.zeros(table.n, dtype=np.int64)
    moments = cell_moments(
        zeros, 1, table.arm, table.n_arms, table.component_matrix(), table.component_names()
    )
    return summarize_moments(moments, table.arm_keys, table.metrics, table.design_shares)


def summarize_moments(
    moments: CellMoments,
    arm_keys: tuple[str, ...],
    metrics: tuple[MetricSpec, ...],
    design_shares: np.ndarray,
) -> dict[str, Any]:
    """The readout summary from per-arm component moments (one cohort): what a streamed upload
    has at its end without the rows in memory."""
    est = metric_estimates(moments, metrics)
    counts = moments.n[0]
    srm = sample_ratio_check(counts, np.asarray(design_shares, dtype=np.float64))
    arms = []
    for j, arm in enumerate(arm_keys):
        arms.append(
            {
                "arm": arm,
                "n": int(counts[j]),
                "metrics": {
                    m.key: {
                        "mean": _f(est.mean[0, j, k]),
                        "se": _f(est.se[0, j, k]),
                        "effect": _f(est.effect[0, j, k]) if j else None,
                        "effect_se": _f(est.effect_se[0, j, k]) if j else None,
                    }
                    for k, m in enumerate(metrics)
                },
            }
        )
    return {
        "n_rows": int(counts.sum()),
        "arm_counts": {a: int(c) for a, c in zip(arm_keys, counts, strict=True)},
        "sample_ratio": srm.to_dict(),
        "arms": arms,
        "control": arm_keys[0],
    }


def _f(x: float) -> float | None:
    x = float(x)
    return None if not np.isfinite(x) else x


def upload_readout(
    db: Database, *, key: str, body: bytes, content_type: str, actor: Actor
) -> tuple[ReadoutView, bool]:
    """An upload held in memory: spooled to a temporary file, then `upload_readout_file`."""
    fd, path = tempfile.mkstemp(prefix="apportion-upload-")
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(body)
        return upload_readout_file(
            db,
            key=key,
            path=path,
            content_hash=hashlib.sha256(body).hexdigest(),
            content_type=content_type,
            actor=actor,
        )
    finally:
        os.unlink(path)


def upload_readout_file(
    db: Database,
    *,
    key: str,
    path: str,
    content_hash: str,
    content_type: str,
    actor: Actor,
    work_dir: str | None = None,
) -> tuple[ReadoutView, bool]:
    """Validate an upload spooled to `path` in batches and store it as a readout version.

    Returns (readout view, created); the same bytes a second time return the existing version.
    Memory stays bounded whatever the row count (see ingest/stream.py); nothing is stored when
    any check fails."""
    with db.read() as s:
        exp = repo.get_experiment(session=s, key=key)
        existing = repo.find_readout_by_hash(
            session=s, experiment_id=exp.id, content_hash=content_hash
        )
        if existing is not None:
            return readout_view(exp.key, existing), False
        declaration = exp.declaration
    fmt = media_format(content_type)
    problems = Problems()
    ingested = _ingest_into_store(
        db,
        declaration,
        lambda: file_source(path, fmt, problems),
        problems=problems,
        work_dir=work_dir,
    )
    return record_readout(
        db,
        key=key,
        ingested=ingested,
        content_hash=content_hash,
        content_type=content_type.split(";")[0].strip(),
        actor=actor,
        action="readout.upload",
        extra={},
    )


def _ingest_into_store(
    db: Database,
    declaration: dict[str, Any],
    open_source: Callable[[], Source],
    *,
    problems: Problems,
    work_dir: str | None = None,
    progress: Callable[[int], None] | None = None,
) -> tuple[Ingested, str, str, int]:
    """Validate a source batch by batch into a staging directory and publish it; (ingested,
    sha256, location, bytes)."""
    specs = specs_of(declaration)
    out: list[Ingested] = []

    def write(fs: pafs.FileSystem, staging: str) -> Manifest:
        result = ingest(
            open_source(),
            fs=fs,
            directory=staging,
            arms=specs.arm_keys,
            control=specs.arm_keys[0],
            design_shares=list(specs.design_shares),
            metrics=specs.metrics,
            features=specs.features,
            problems=problems,
            progress=progress,
            work_dir=work_dir,
        )
        out.append(result)
        return result.manifest

    sha, location, size = store_dataset(db, write)
    return out[0], sha, location, size


def record_readout(
    db: Database,
    *,
    key: str,
    ingested: tuple[Ingested, str, str, int],
    content_hash: str,
    content_type: str,
    actor: Actor,
    action: str,
    extra: dict[str, Any],
) -> tuple[ReadoutView, bool]:
    """Store the readout row and its audit entry in one transaction (the dataset is published)."""
    result, sha, location, size = ingested
    exp_row = None
    with db.read() as s:
        exp_row = repo.get_experiment(session=s, key=key)
        declaration = exp_row.declaration
    specs = specs_of(declaration)
    summary = summarize_moments(result.moments, specs.arm_keys, specs.metrics, specs.design_shares)
    summary["warnings"] = list(result.warnings)
    with db.write() as s:
        # The experiment's lock (level 1, store/db.py) makes the hash check and the next version
        # number one decision: a concurrent upload waits here, then sees this one's row.
        exp = repo.get_experiment(session=s, key=key, lock=True)
        existing = repo.find_readout_by_hash(
            session=s, experiment_id=exp.id, content_hash=content_hash
        )
        if existing is not None:  # the same bytes arrived concurrently
            return readout_view(exp.key, existing), False
        blobs.add_dataset(session=s, sha256=sha, size=size, location=location)
        row = repo.add_readout(
            session=s,
            experiment=exp,
            content_hash=content_hash,
            content_type=content_type,
            blob_sha256=sha,
            n_rows=result.n_rows,
            summary=summary,
            created_by=actor.name,
        )
        audit.append(
            s,
            actor=actor,
            action=action,
            entity="readout",
            entity_id=f"{exp.key}/{row.version}",
            payload={
                "content_hash": content_hash,
                "n_rows": result.n_rows,
                "blob": sha,
                "sample_ratio_flagged": summary["sample_ratio"]["flagged"],
                **extra,
            },
        )
        return readout_view(exp.key, row), True


def readout_view(experiment_key: str, row: Any) -> ReadoutView:
    """The readout's row with its stored summary (validated as it is read)."""
    summary = ReadoutSummary.model_validate(row.summary)
    return ReadoutView(
        experiment=experiment_key,
        version=row.version,
        content_hash=row.content_hash,
        content_type=row.content_type,
        created_at=row.created_at,
        created_by=row.created_by,
        **summary.model_dump(exclude_unset=True),
    )


def get_readout(db: Database, *, key: str, version: int) -> ReadoutView:
    with db.read() as s:
        exp = repo.get_experiment(session=s, key=key)
        return readout_view(
            exp.key, repo.get_readout(session=s, experiment_id=exp.id, version=version)
        )


def store_dataset(
    db: Database, write: Callable[[pafs.FileSystem, str], Manifest]
) -> tuple[str, str, int]:
    """Write a dataset into a fresh staging directory with `write(fs, directory)`, then publish
    it at its content address; (sha256, location, bytes). On any failure the staging directory
    is removed, so nothing of a rejected upload remains. A published dataset that no readout ends
    up referencing (the database transaction failed after publishing) is harmless: its name is
    its hash, so a retry or a racing twin reuses it rather than writing a second copy."""
    store = db.blobs
    assert store is not None
    staging = store.new_staging()
    try:
        manifest = write(store.fs, staging)
    except BaseException:
        store.discard(staging)
        raise
    location = store.publish_dataset(staging, manifest.sha256)
    return manifest.sha256, location, sum(int(f["bytes"]) for f in manifest.files)


@dataclass(frozen=True)
class ReadoutData:
    """Where a readout version's rows live: a Parquet dataset in the blob store.

    `uri` is the dataset directory and `files` its part files as URIs an engine can read (plain
    paths for a local blob store, `s3://...` for object storage); `filesystem` with `paths` reads
    them through pyarrow. `manifest.spec` says what each column means (`spec.feature_column(key)`,
    `spec.component_column(name)`; arm codes index `spec.arm_keys`, the control is 0)."""

    readout_id: int
    sha256: str
    uri: str
    files: tuple[str, ...]
    filesystem: pafs.FileSystem
    paths: tuple[str, ...]
    manifest: Manifest

    @property
    def n_rows(self) -> int:
        return self.manifest.n_rows


def readout_data(db: Database, *, readout_id: int) -> ReadoutData:
    """The Parquet dataset of a readout version (by the readout's database id)."""
    with db.read() as s:
        row = repo.get_readout_by_id(session=s, readout_id=readout_id)
        sha = row.blob_sha256
        location = blobs.dataset_location(session=s, sha256=sha)
    store = db.blobs
    assert store is not None
    manifest = Manifest.from_bytes(store.get_object(f"{location}/{MANIFEST}"))
    paths = tuple(store.path(f"{location}/{f['name']}") for f in manifest.files)
    return ReadoutData(
        readout_id=readout_id,
        sha256=sha,
        uri=store.url(location),
        files=tuple(store.url(f"{location}/{f['name']}") for f in manifest.files),
        filesystem=store.fs,
        paths=paths,
        manifest=manifest,
    )


def load_readout_table(db: Database, *, readout_id: int) -> tuple[UnitTable, Any]:
    """The whole readout in memory (the numpy path, for readouts that fit)."""
    data = readout_data(db, readout_id=readout_id)
    table, _flags = read_dataset(data.filesystem, list(data.paths), data.manifest)
    with db.read() as s:
        row = repo.get_readout_by_id(session=s, readout_id=readout_id)
    return table, row
