"""Readouts by reference: a Parquet dataset named by URI (a file, a directory or a glob,
hive-partitioned or not) is validated in a job with progress and snapshotted into the service's
own blob store, so the readout stays immutable whatever later happens to the source.

Only URIs under a configured allowed prefix (APPORTION_READOUT_SOURCE_PREFIXES) are read. The
check is made on what the filesystem resolves, not on the text: a local path is resolved with
every symlink followed (`os.path.realpath`) and each file found must lie under a resolved prefix;
a `..` segment is refused outright; the scheme must be a prefix's scheme (so `file://`, `s3://`
or `http://` cannot reach what the prefixes do not name)."""

from __future__ import annotations

import fnmatch
import os
from dataclasses import dataclass
from typing import Any
from urllib.parse import urlparse

import pyarrow as pa
import pyarrow.dataset as pads
import pyarrow.fs as pafs

from apportion.domain import Actor
from apportion.errors import Forbidden, InvalidInput, NotFound
from apportion.ingest.problems import Problems
from apportion.ingest.stream import dataset_source
from apportion.schemas.experiments import ReadoutImportQueued, ReadoutSourceIn
from apportion.store import audit
from apportion.store import experiments as repo
from apportion.store import jobs as job_repo
from apportion.store.tables import Job
from apportion.usecases import jobs
from apportion.usecases.context import Services
from apportion.usecases.experiments import _ingest_into_store, record_readout

_GLOB = set("*?[")


@dataclass(frozen=True)
class Resolved:
    """The files a source names, on their filesystem, and the base directory for partitions."""

    fs: pafs.FileSystem
    files: tuple[str, ...]
    base: str


def _split(uri: str) -> tuple[str, str]:
    """(scheme, path) with 'file' for plain paths."""
    if "://" not in uri:
        return "file", uri
    parsed = urlparse(uri)
    scheme = parsed.scheme.lower()
    if scheme == "file":
        return "file", parsed.path
    return scheme, f"{parsed.netloc}{parsed.path}"


def _refuse(uri: str, why: str) -> Forbidden:
    return Forbidden(
        f"the source '{uri}' is not readable by this service: {why}",
        errors=[{"field": "source", "problem": why}],
    )


def _under(path: str, prefix: str) -> bool:
    prefix = prefix.rstrip("/")
    return path == prefix or path.startswith(prefix + "/")


def resolve_source(uri: str, prefixes: list[str]) -> Resolved:
    """The Parquet files `uri` names, refusing anything not under an allowed prefix."""
    if not prefixes:
        raise _refuse(uri, "no source prefixes are configured (APPORTION_READOUT_SOURCE_PREFIXES)")
    if "\x00" in uri:
        raise _refuse(uri, "the URI holds a NUL byte")
    scheme, path = _split(uri)
    if ".." in path.split("/"):
        raise _refuse(uri, "'..' segments are not allowed")
    allowed = [(s, p) for s, p in (_split(x) for x in prefixes) if s == scheme]
    if not allowed:
        raise _refuse(uri, f"the scheme '{scheme}' is not one of the allowed prefixes' schemes")
    glob = any(c in path for c in _GLOB)
    parts = path.split("/")
    cut = next((i for i, part in enumerate(parts) if any(c in part for c in _GLOB)), len(parts))
    base = "/".join(parts[:cut]) or "/"
    if scheme == "file":
        fs: pafs.FileSystem = pafs.LocalFileSystem()
        base = os.path.realpath(base)
        roots = [os.path.realpath(p) for _, p in allowed]
    else:
        fs, _ = pafs.FileSystem.from_uri(uri if not glob else f"{scheme}://{base}")
        roots = [p for _, p in allowed]
    if not any(_under(base, r) for r in roots):
        raise _refuse(uri, "it is not under an allowed prefix")
    try:
        info = fs.get_file_info(base)
    except (OSError, ValueError) as exc:
        raise NotFound(f"the source '{uri}' cannot be read: {exc}") from exc
    if info.type == pafs.FileType.NotFound:
        raise NotFound(f"the source '{uri}' does not exist")
    if info.type == pafs.FileType.File and not glob:
        candidates = [base]
    else:
        selector = pafs.FileSelector(base, recursive=True)
        found = [i.path for i in fs.get_file_info(selector) if i.type == pafs.FileType.File]
        pattern = "/".join([base, *parts[cut:]]) if glob else None
        candidates = sorted(
            p
            for p in found
            if (pattern is None or fnmatch.fnmatchcase(p, pattern))
            and not os.path.basename(p).startswith((".", "_"))
        )
    files = []
    for p in candidates:
        real = os.path.realpath(p) if scheme == "file" else p
        if not any(_under(real, r) for r in roots):  # a symlink inside that points outside
            raise _refuse(uri, f"'{p}' resolves outside the allowed prefixes")
        files.append(real)
    if not files:
        raise NotFound(f"the source '{uri}' names no files")
    return Resolved(fs=fs, files=tuple(files), base=base)


def import_readout(
    services: Services, *, key: str, command: ReadoutSourceIn, actor: Actor
) -> ReadoutImportQueued:
    """Check the source now (403/404 before any job), then queue the import job; 202 view."""
    source, partitioning = command.source, command.partitioning
    prefixes = list(services.settings.readout_source_prefixes)
    resolved = resolve_source(source, prefixes)
    with services.db.write() as s:
        exp = repo.get_experiment(session=s, key=key)
        job = job_repo.create_job(
            session=s,
            kind="readout-import",
            payload={
                "experiment": exp.key,
                "source": source,
                "partitioning": partitioning,
                "actor": {"name": actor.name, "role": actor.role, "key_id": actor.key_id},
            },
        )
        audit.append(
            s,
            actor=actor,
            action="readout.import.queue",
            entity="experiment",
            entity_id=exp.key,
            payload={"source": source, "files": len(resolved.files), "job": job.id},
        )
        job_id = job.id
    jobs.notify(services)
    return ReadoutImportQueued(
        job_id=job_id, job=f"/v1/jobs/{job_id}", status="queued", source=source
    )


@jobs.handler("readout-import")
def _run_import(services: Services, job: Job, progress: Any) -> None:
    p = job.payload
    actor = Actor(**p["actor"])
    resolved = resolve_source(p["source"], list(services.settings.readout_source_prefixes))
    hive = p.get("partitioning") == "hive"
    base = resolved.base
    while hive and "=" in base.rstrip("/").rsplit("/", 1)[-1]:  # a glob below key=value dirs
        base = base.rstrip("/").rsplit("/", 1)[0]
    try:
        dataset = pads.dataset(
            list(resolved.files),
            filesystem=resolved.fs,
            format="parquet",
            partitioning="hive" if hive else None,
            partition_base_dir=base if hive else None,
        )
        total = max(1, dataset.count_rows())
    except (pa.ArrowException, OSError) as exc:
        raise InvalidInput(
            f"the source '{p['source']}' is not a readable Parquet dataset: {exc}"
        ) from exc
    with services.db.read() as s:
        declaration = repo.get_experiment(session=s, key=p["experiment"]).declaration
    problems = Problems()
    ingested = _ingest_into_store(
        services.db,
        declaration,
        lambda: dataset_source(dataset),
        problems=problems,
        work_dir=services.settings.upload_dir,
        progress=lambda rows: progress(0.95 * min(1.0, rows / total)),
    )
    view, _created = record_readout(
        services.db,
        key=p["experiment"],
        ingested=ingested,
        content_hash=ingested[1],  # the snapshot's own address: the same data, the same version
        content_type="application/vnd.apache.parquet",
        actor=actor,
        action="readout.import",
        extra={"source": p["source"], "source_files": len(resolved.files)},
    )
    with services.db.write() as s:
        row = job_repo.get_job(session=s, job_id=job.id)
        row.payload = {**p, "result": {"readout_version": view.version}}
        job_repo.finish(session=s, job=job)
