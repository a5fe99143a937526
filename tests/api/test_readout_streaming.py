"""Readout uploads over HTTP: streamed to disk, validated in batches, stored as a Parquet dataset;
gzip and zstd bodies decoded; other encodings 415; nothing stored when a check fails."""

from __future__ import annotations

import gzip
import os

import numpy as np
import pyarrow as pa
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select
from support import EXPERIMENT, rows_csv

import apportion.ingest.stream as stream
from apportion.store.tables import AuditEntry, Blob, Readout
from apportion.usecases.experiments import load_readout_table, readout_data

URL = "/v1/experiments/checkout-copy/readouts"


def _declare(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert r.status_code == 201, r.text


def _counts(client: TestClient) -> tuple[int, int, int]:
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        return (
            s.scalar(select(func.count()).select_from(Readout)),
            s.scalar(select(func.count()).select_from(AuditEntry)),
            s.scalar(select(func.count()).select_from(Blob)),
        )


def _blob_files(client: TestClient) -> list[str]:
    root = client.app.state.services.db.blobs.root  # type: ignore[attr-defined]
    return sorted(
        os.path.relpath(os.path.join(d, f), root) for d, _, fs in os.walk(root) for f in fs
    )


def _zstd(data: bytes) -> bytes:
    sink = pa.BufferOutputStream()
    with pa.CompressedOutputStream(sink, "zstd") as out:
        out.write(data)
    return sink.getvalue().to_pybytes()


@pytest.mark.parametrize("encoding", ["identity", "gzip", "zstd"])
def test_encoded_bodies_give_the_same_readout(client: TestClient, keys, encoding) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    body = rows_csv(300, seed=4)
    sent = {"identity": body, "gzip": gzip.compress(body), "zstd": _zstd(body)}[encoding]
    headers = {**keys.h(keys.analyst), "content-type": "text/csv", "content-encoding": encoding}
    r = client.post(URL, content=sent, headers=headers)
    assert r.status_code == 201, r.text
    plain = client.post(
        URL, content=body, headers={**keys.h(keys.analyst), "content-type": "text/csv"}
    )
    assert plain.status_code == 200  # the decoded bytes are the content: the same version
    assert plain.json()["version"] == r.json()["version"] == 1
    assert r.json()["n_rows"] == 300


@pytest.mark.parametrize("encoding", ["br", "deflate", "compress", "gzip, zstd"])
def test_other_encodings_are_415_and_store_nothing(client: TestClient, keys, encoding) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    before = _counts(client)
    headers = {**keys.h(keys.analyst), "content-type": "text/csv", "content-encoding": encoding}
    r = client.post(URL, content=gzip.compress(rows_csv(20)), headers=headers)
    assert r.status_code == 415
    assert r.headers["content-type"].startswith("application/problem+json")
    assert encoding.split(",")[0] in r.json()["detail"]
    assert _counts(client) == before


def test_a_body_that_is_not_gzip_is_422_and_a_gzip_bomb_is_413(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    before = _counts(client)
    h = {**keys.h(keys.analyst), "content-type": "text/csv", "content-encoding": "gzip"}
    r = client.post(URL, content=rows_csv(20), headers=h)
    assert r.status_code == 422 and "gzip" in r.json()["detail"]
    limit = client.app.state.services.settings.max_upload_bytes  # type: ignore[attr-defined]
    client.app.state.services.settings.max_upload_bytes = 1 << 20  # type: ignore[attr-defined]
    try:
        bomb = gzip.compress(b"0" * (4 << 20))  # 4 MB of zeros in about 4 kB
        assert len(bomb) < 1 << 20
        r = client.post(URL, content=bomb, headers=h)
        assert r.status_code == 413 and "decoded" in r.json()["detail"]
    finally:
        client.app.state.services.settings.max_upload_bytes = limit  # type: ignore[attr-defined]
    assert _counts(client) == before


def test_bad_rows_across_batches_store_nothing(client: TestClient, keys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.setattr(stream, "BATCH_BYTES", 1024)
    _declare(client, keys)
    before, files = _counts(client), _blob_files(client)
    lines = rows_csv(400, seed=2).decode().splitlines()
    lines[350] = lines[12]  # a duplicate unit id 338 rows after its first use
    body = ("\n".join(lines) + "\n").encode()
    r = client.post(URL, content=body, headers={**keys.h(keys.analyst), "content-type": "text/csv"})
    assert r.status_code == 422
    dup = [e for e in r.json()["errors"] if e["problem"] == "duplicate unit id"]
    assert dup and dup[0]["rows"] == [350] and dup[0]["values"] == ["u11"]
    assert _counts(client) == before
    assert _blob_files(client) == files  # no dataset, no staging leftovers


def test_a_streamed_readout_is_stored_as_parquet_and_reads_back(
    client: TestClient, keys, monkeypatch
) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.setattr(stream, "BATCH_BYTES", 2048)  # many batches
    _declare(client, keys)
    body = rows_csv(500, seed=9)
    r = client.post(URL, content=body, headers={**keys.h(keys.analyst), "content-type": "text/csv"})
    assert r.status_code == 201, r.text
    services = client.app.state.services  # type: ignore[attr-defined]
    with services.db.read() as s:
        readout_id = s.scalar(select(Readout.id))
    data = readout_data(services.db, readout_id=readout_id)
    assert data.n_rows == 500 and all(os.path.exists(p) for p in data.paths)
    table, _ = load_readout_table(services.db, readout_id=readout_id)
    assert list(table.unit_ids[:3]) == ["u0", "u1", "u2"]
    spend = table.columns["spend"]
    # the summary's control mean against numpy over the stored rows (outside reference)
    control = r.json()["arms"][0]["metrics"]["spend"]["mean"]
    assert control == pytest.approx(float(np.mean(spend[table.arm == 0])), rel=1e-12)
    assert [f for f in _blob_files(client) if f.startswith("staging")] == []
