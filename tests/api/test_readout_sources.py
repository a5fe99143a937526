"""Readouts by reference: only URIs under the allowed prefixes are read (no `..`, no symlink out,
no other scheme); the import runs as a job, snapshots the rows into the blob store (a later change
of the source does not change the readout) and records the source in the audit trail."""

from __future__ import annotations

import io
import os

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select
from support import EXPERIMENT, make_settings, rows_csv, wait_job

from apportion.store.tables import AuditEntry, Job, Readout

URL = "/v1/experiments/checkout-copy/readouts"


@pytest.fixture
def lake(tmp_path):
    root = tmp_path / "lake"
    (root / "exp").mkdir(parents=True)
    (tmp_path / "private").mkdir()
    return root


@pytest.fixture
def client(db_url: str, lake):  # type: ignore[no-untyped-def]
    from apportion.app import create_app

    app = create_app(make_settings(db_url, readout_source_prefixes=[str(lake) + "/"]))
    with TestClient(app, raise_server_exceptions=False) as c:
        yield c


def _table(n: int, seed: int) -> pa.Table:
    return pacsv.read_csv(io.BytesIO(rows_csv(n, seed=seed)))


def _declare(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert r.status_code == 201, r.text


def _post(client, keys, source: str, **extra):  # type: ignore[no-untyped-def]
    return client.post(URL, json={"source": source, **extra}, headers=keys.h(keys.analyst))


def _readouts(client: TestClient) -> int:
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        return s.scalar(select(func.count()).select_from(Readout))


def test_a_file_is_imported_in_a_job_and_snapshotted(client: TestClient, keys, lake) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    path = lake / "exp" / "rows.parquet"
    pq.write_table(_table(300, 1), path)
    r = _post(client, keys, str(path))
    assert r.status_code == 202, r.text
    job = wait_job(client, keys, r.json()["job"])
    assert job["status"] == "done" and job["progress"] == 1.0, job
    version = job["result"]["readout_version"]
    first = client.get(f"{URL}/{version}", headers=keys.h(keys.reader)).json()
    assert first["n_rows"] == 300
    pq.write_table(_table(50, 2), path)  # the source changes afterwards
    services = client.app.state.services  # type: ignore[attr-defined]
    from apportion.usecases.experiments import load_readout_table

    with services.db.read() as s:
        rid = s.scalar(select(Readout.id).where(Readout.version == version))
        entry = s.execute(
            select(AuditEntry).where(AuditEntry.action == "readout.import")
        ).scalar_one()
    table, _ = load_readout_table(services.db, readout_id=rid)
    assert table.n == 300  # the snapshot, not the changed source
    assert str(path) in entry.payload and entry.actor_name


def test_a_hive_partitioned_directory_and_a_glob(client: TestClient, keys, lake) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    t = _table(200, 3)
    hive = lake / "exp" / "hive"
    for plan in ("free", "pro"):
        part = t.filter(pa.compute.equal(t["plan"], plan)).drop_columns(["plan"])
        (hive / f"plan={plan}").mkdir(parents=True)
        pq.write_table(part, hive / f"plan={plan}" / "data.parquet")
    r = _post(client, keys, str(hive), partitioning="hive")
    job = wait_job(client, keys, r.json()["job"])
    assert job["status"] == "done", job["error"]
    view = client.get(f"{URL}/{job['result']['readout_version']}", headers=keys.h(keys.reader))
    assert view.json()["n_rows"] == 200
    r2 = _post(client, keys, str(hive) + "/plan=free/*.parquet", partitioning="hive")
    job2 = wait_job(client, keys, r2.json()["job"])
    assert job2["status"] == "done", job2["error"]
    got = client.get(f"{URL}/{job2['result']['readout_version']}", headers=keys.h(keys.reader))
    assert got.json()["n_rows"] == int(pa.compute.sum(pa.compute.equal(t["plan"], "free")).as_py())


def test_sources_outside_the_prefixes_are_refused_before_any_job(
    client: TestClient, keys, lake, tmp_path
) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    secret = tmp_path / "private" / "rows.parquet"
    pq.write_table(_table(20, 4), secret)
    os.symlink(secret, lake / "exp" / "link.parquet")  # inside the lake, pointing outside
    os.symlink(tmp_path / "private", lake / "exp" / "linkdir")
    attempts = [
        str(secret),
        f"file://{secret}",
        str(lake / "exp" / ".." / ".." / "private" / "rows.parquet"),
        str(lake) + "/../private/rows.parquet",
        str(lake / "exp" / "link.parquet"),
        str(lake / "exp" / "linkdir"),
        str(lake / "exp" / "linkdir" / "*.parquet"),
        str(lake) + "-sibling/rows.parquet",  # shares the text prefix, not the directory
        "s3://bucket" + str(secret),
        "http://example.invalid/rows.parquet",
        "hdfs://namenode/rows.parquet",
        "/etc/passwd",
        "rows.parquet",
    ]
    for source in attempts:
        r = _post(client, keys, source)
        assert r.status_code == 403, (source, r.status_code, r.text)
        assert r.headers["content-type"].startswith("application/problem+json")
        assert "allowed" in r.json()["detail"] or "'..'" in r.json()["detail"], source
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        assert s.scalar(select(func.count()).select_from(Job)) == 0
    assert _readouts(client) == 0


def test_missing_and_bad_sources_and_bodies(client: TestClient, keys, lake) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    assert _post(client, keys, str(lake / "exp" / "none.parquet")).status_code == 404
    r = client.post(URL, json={"source": str(lake), "extra": 1}, headers=keys.h(keys.analyst))
    assert r.status_code == 422
    bad = lake / "exp" / "bad.parquet"
    pq.write_table(_table(30, 5).drop_columns(["spend"]), bad)
    job = wait_job(client, keys, _post(client, keys, str(bad)).json()["job"])
    assert (
        job["status"] == "failed" and "spend" in job["error"] and "missing column" in job["error"]
    )
    assert _readouts(client) == 0


def test_no_prefixes_configured_means_by_reference_is_off(db_url: str, keys_factory=None) -> None:  # type: ignore[no-untyped-def]
    from apportion.errors import Forbidden
    from apportion.usecases.sources import resolve_source

    with pytest.raises(Forbidden, match="no source prefixes"):
        resolve_source("/tmp/anything.parquet", [])
