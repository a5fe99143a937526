"""Readout datasets: a UnitTable written as Parquet parts with bounded row groups reads back
exactly, another reader (pyarrow.dataset) sees the same rows, and the content address covers
every byte."""

from __future__ import annotations

import threading

import numpy as np
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq
import pytest

from apportion.errors import InvalidInput
from apportion.ingest.dataset import (
    MANIFEST,
    DatasetWriter,
    Manifest,
    read_dataset,
    spec_of_table,
    table_batch,
    write_table,
)
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable
from apportion.store.blobstore import BlobStore


def _table(n: int, seed: int = 5) -> UnitTable:
    rng = np.random.default_rng(seed)
    return UnitTable(
        unit_ids=np.array([f"m{i}" for i in range(n)], dtype=object),
        arm=rng.integers(0, 3, size=n).astype(np.int64),
        arm_keys=("control", "a", "b"),
        design_shares=np.array([0.5, 0.25, 0.25]),
        features=(
            FeatureSpec("tenure", "numeric"),
            FeatureSpec("region", "categorical", ("east", "north", "west")),
        ),
        feature_values={
            "tenure": rng.normal(size=n),
            "region": rng.integers(-1, 3, size=n).astype(np.int32),
        },
        metrics=(
            MetricSpec("spend", "mean"),
            MetricSpec("rate", "ratio", "lower", "num", "den"),
        ),
        columns={
            "spend": rng.gamma(2.0, 3.0, size=n),
            "num": rng.integers(0, 3, size=n).astype(float),
            "den": rng.integers(3, 6, size=n).astype(float),
        },
    )


def _write(tmp_path, table: UnitTable, rows_per_group: int, groups_per_file: int) -> Manifest:
    fs = pafs.LocalFileSystem()
    spec = spec_of_table(table)
    w = DatasetWriter(
        fs=fs,
        directory=str(tmp_path),
        schema=spec.schema(),
        row_group_rows=rows_per_group,
        file_row_groups=groups_per_file,
    )
    batch = table_batch(table)
    for start in range(0, table.n, 37):  # uneven batches, as a streamed upload sends them
        w.write(batch.slice(start, 37))
    return w.close(spec)


def test_round_trip_through_bounded_row_groups_and_several_parts(tmp_path) -> None:
    table = _table(1000)
    manifest = _write(tmp_path, table, rows_per_group=100, groups_per_file=3)
    assert [f["rows"] for f in manifest.files] == [300, 300, 300, 100]
    paths = [str(tmp_path / f["name"]) for f in manifest.files]
    for p in paths:
        meta = pq.ParquetFile(p).metadata
        assert all(meta.row_group(i).num_rows <= 100 for i in range(meta.num_row_groups))
    back, flags = read_dataset(pafs.LocalFileSystem(), paths, manifest)
    assert flags == {}
    assert list(back.unit_ids) == list(table.unit_ids)
    np.testing.assert_array_equal(back.arm, table.arm)
    for key, values in table.feature_values.items():
        np.testing.assert_array_equal(back.feature_values[key], values)
    for c, values in table.columns.items():
        np.testing.assert_array_equal(back.columns[c], values)
    # another reader of the same files (pyarrow.dataset) sees the same rows and labels
    other = ds.dataset(paths, format="parquet").to_table()
    assert other.num_rows == 1000
    region = other.column(manifest.spec.feature_column("region")).to_pylist()
    codes = table.feature_values["region"]
    expected = [None if c < 0 else ("east", "north", "west")[c] for c in codes]
    assert region == expected


def test_manifest_hash_changes_with_any_byte_and_reading_checks_rows(tmp_path) -> None:
    table = _table(200)
    for name in "abc":
        (tmp_path / name).mkdir()
    a = _write(tmp_path / "a", table, 64, 2)
    b = _write(tmp_path / "b", table, 64, 2)
    assert a.sha256 == b.sha256  # deterministic: the same rows give the same address
    table.columns["spend"][5] += 1.0
    c = _write(tmp_path / "c", table, 64, 2)
    assert c.sha256 != a.sha256
    assert Manifest.from_bytes((tmp_path / "a" / MANIFEST).read_bytes()) == a
    short = Manifest(spec=a.spec, n_rows=a.n_rows + 1, files=a.files)
    paths = [str(tmp_path / "a" / f["name"]) for f in a.files]
    with pytest.raises(InvalidInput, match="201"):
        read_dataset(pafs.LocalFileSystem(), paths, short)


def test_racing_publishers_of_the_same_content_leave_one_dataset(tmp_path) -> None:
    store = BlobStore(str(tmp_path / "blobs"))
    table = _table(300)
    stagings = [store.new_staging() for _ in range(6)]
    manifests = [write_table(store.fs, s, table) for s in stagings]
    assert len({m.sha256 for m in manifests}) == 1
    barrier = threading.Barrier(len(stagings))
    out: list[str] = []

    def publish(staging: str, sha: str) -> None:
        barrier.wait()
        out.append(store.publish_dataset(staging, sha))

    threads = [
        threading.Thread(target=publish, args=(s, m.sha256))
        for s, m in zip(stagings, manifests, strict=True)
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(set(out)) == 1
    assert [p.name for p in (tmp_path / "blobs" / "datasets").iterdir()] == [manifests[0].sha256]
    assert list((tmp_path / "blobs" / "staging").iterdir()) == []
    assert store.files(out[0]) == [store.path(f"{out[0]}/{f['name']}") for f in manifests[0].files]


def test_objects_are_stored_once_at_their_hash(tmp_path) -> None:
    store = BlobStore(str(tmp_path / "blobs"))
    sha1, loc1 = store.put_object(b"abc")
    sha2, loc2 = store.put_object(b"abc")
    assert (sha1, loc1) == (sha2, loc2)
    # sha256("abc") from FIPS 180-2, appendix B.1 (a published worked example)
    assert sha1 == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert store.get_object(loc1) == b"abc"
    assert len(list((tmp_path / "blobs" / "objects").rglob("*"))) == 2  # one dir, one file
