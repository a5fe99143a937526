"""Blobs move out of the database into the blob store; readouts become Parquet datasets

Every row of `blobs` loses its bytes (`data`) and gains `kind` and `location`: a readout's blob
(compressed Arrow IPC) is rewritten as a Parquet dataset and the readout is pointed at the
dataset's hash; every other blob is copied as is to `objects/`. One blob at a time, so memory stays
at the size of the largest blob. The blob store is the one the caller of `upgrade` names
(`blob_uri`), else APPORTION_BLOB_URI.

Revision ID: 0004
Revises: 0003
Create Date: 2026-12-03
"""

import hashlib

import sqlalchemy as sa
from alembic import context, op

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

blobs = sa.table(
    "blobs",
    sa.column("sha256", sa.String),
    sa.column("size", sa.BigInteger),
    sa.column("data", sa.LargeBinary),
    sa.column("kind", sa.String),
    sa.column("location", sa.String),
    sa.column("created_at", sa.String),
)
readouts = sa.table("readouts", sa.column("blob_sha256", sa.String))
watch_uploads = sa.table("watch_uploads", sa.column("blob_sha256", sa.String))


def _store():  # type: ignore[no-untyped-def]
    from apportion.config import Settings
    from apportion.store.blobstore import BlobStore

    uri = context.config.attributes.get("blob_uri") or Settings().blob_uri
    return BlobStore(uri)


def upgrade() -> None:
    from apportion.ingest.codec import decode_table
    from apportion.ingest.dataset import write_table

    # No table rebuild (SQLite's batch "recreate" would drop `blobs`, which readouts reference):
    # columns are added with defaults and `data` is dropped in place (SQLite >= 3.35).
    with op.batch_alter_table("blobs", schema=None, recreate="never") as batch_op:
        batch_op.add_column(
            sa.Column("kind", sa.String(length=20), nullable=False, server_default="object")
        )
        batch_op.add_column(
            sa.Column("location", sa.String(length=300), nullable=False, server_default="")
        )

    conn = op.get_bind()
    store = None
    shas = [r[0] for r in conn.execute(sa.select(blobs.c.sha256).order_by(blobs.c.sha256))]
    of_readouts = {r[0] for r in conn.execute(sa.select(readouts.c.blob_sha256).distinct())}
    for sha in shas:
        store = store or _store()
        row = conn.execute(
            sa.select(blobs.c.data, blobs.c.created_at).where(blobs.c.sha256 == sha)
        ).one()
        data = bytes(row.data)
        if sha in of_readouts:
            table, flags = decode_table(data)
            staging = store.new_staging()
            manifest = write_table(store.fs, staging, table, flags)
            new_sha = manifest.sha256
            new_location = store.publish_dataset(staging, new_sha)
            known = conn.execute(sa.select(blobs.c.sha256).where(blobs.c.sha256 == new_sha))
            if known.first() is None:
                conn.execute(
                    blobs.insert().values(
                        sha256=new_sha,
                        size=sum(int(f["bytes"]) for f in manifest.files),
                        kind="dataset",
                        location=new_location,
                        created_at=row.created_at,
                        data=b"",  # the column is dropped below; it is NOT NULL until then
                    )
                )
            conn.execute(
                readouts.update().where(readouts.c.blob_sha256 == sha).values(blob_sha256=new_sha)
            )
            shared = conn.execute(
                sa.select(watch_uploads.c.blob_sha256).where(watch_uploads.c.blob_sha256 == sha)
            ).first()
            if shared is None:  # only the readout used these bytes: the dataset replaces them
                conn.execute(blobs.delete().where(blobs.c.sha256 == sha))
                continue
        _, location = store.put_object(data)
        conn.execute(
            blobs.update().where(blobs.c.sha256 == sha).values(kind="object", location=location)
        )

    with op.batch_alter_table("blobs", schema=None, recreate="never") as batch_op:
        batch_op.drop_column("data")


def downgrade() -> None:
    from apportion.ingest.codec import encode_table
    from apportion.ingest.dataset import MANIFEST, Manifest, read_dataset

    with op.batch_alter_table("blobs", schema=None, recreate="never") as batch_op:
        batch_op.add_column(sa.Column("data", sa.LargeBinary(), nullable=True))
    conn = op.get_bind()
    rows = conn.execute(
        sa.select(blobs.c.sha256, blobs.c.kind, blobs.c.location, blobs.c.created_at)
    ).all()
    store = _store() if rows else None
    for sha, kind, location, created_at in rows:
        assert store is not None
        if kind == "object":
            data = store.get_object(location)
            conn.execute(blobs.update().where(blobs.c.sha256 == sha).values(data=data))
            continue
        manifest = Manifest.from_bytes(store.get_object(f"{location}/{MANIFEST}"))
        table, flags = read_dataset(store.fs, store.files(location), manifest)
        data = encode_table(table, flags)
        old_sha = hashlib.sha256(data).hexdigest()
        if conn.execute(sa.select(blobs.c.sha256).where(blobs.c.sha256 == old_sha)).first() is None:
            conn.execute(
                blobs.insert().values(
                    sha256=old_sha,
                    size=len(data),
                    data=data,
                    kind="object",
                    location="",
                    created_at=created_at,
                )
            )
        conn.execute(
            readouts.update().where(readouts.c.blob_sha256 == sha).values(blob_sha256=old_sha)
        )
        conn.execute(blobs.delete().where(blobs.c.sha256 == sha))
    with op.batch_alter_table("blobs", schema=None, recreate="never") as batch_op:
        batch_op.drop_column("location")
        batch_op.drop_column("kind")
