"""The blob store: files addressed by URI, through any filesystem pyarrow supports.

`APPORTION_BLOB_URI` names the root: a local directory by default (`./var/blobs`), or object
storage such as `s3://bucket/prefix` in production. The database keeps each blob's metadata (hash,
size, kind, location relative to the root); the bytes live here.

Layout under the root (every final location is a function of the content hash, so two racing
writers of the same content write the same names and can never leave two copies):

    objects/<sha[:2]>/<sha>           single objects (bytes)
    datasets/<sha>/manifest.json      a Parquet dataset: its manifest names the part files and
    datasets/<sha>/part-00000.parquet their hashes; the dataset's hash is the manifest's hash
    staging/<random>/                 work in progress; never read by anything else

A dataset is written into a staging directory first and published by `publish_dataset`: on a
local disk one directory rename (atomic), elsewhere file by file with the manifest last, so a
reader that finds the manifest finds every part. Publishing is idempotent.
"""

from __future__ import annotations

import hashlib
import os
import uuid
from dataclasses import dataclass

import pyarrow.fs as pafs

from apportion.errors import NotFound

MANIFEST = "manifest.json"


def _resolve(uri: str) -> tuple[pafs.FileSystem, str]:
    """(filesystem, root path in it). Plain paths (relative or absolute) are local directories."""
    if "://" not in uri:
        return pafs.LocalFileSystem(), os.path.abspath(uri)
    fs, path = pafs.FileSystem.from_uri(uri)
    return fs, path.rstrip("/")


@dataclass
class BlobStore:
    """A root URI and its filesystem. Thread-safe (pyarrow filesystems are)."""

    uri: str

    def __post_init__(self) -> None:
        self.fs, self.root = _resolve(self.uri)
        self.local = isinstance(self.fs, pafs.LocalFileSystem)
        self.fs.create_dir(self.root, recursive=True)

    # ---- paths -------------------------------------------------------------------------------

    def path(self, location: str) -> str:
        """The filesystem path of a location relative to the root."""
        return f"{self.root}/{location}"

    def url(self, location: str) -> str:
        """A URI for a location: what an engine (DuckDB, Spark) is given to read it."""
        path = self.path(location)
        if self.local:
            return path
        scheme = self.uri.split("://", 1)[0]
        return f"{scheme}://{path}"

    @staticmethod
    def object_location(sha256: str) -> str:
        return f"objects/{sha256[:2]}/{sha256}"

    @staticmethod
    def dataset_location(sha256: str) -> str:
        return f"datasets/{sha256}"

    # ---- single objects ----------------------------------------------------------------------

    def put_object(self, data: bytes) -> tuple[str, str]:
        """Store bytes at their hash; (sha256, location). Writing the same bytes twice is a no-op."""
        sha = hashlib.sha256(data).hexdigest()
        location = self.object_location(sha)
        target = self.path(location)
        if self._exists(target):
            return sha, location
        self.fs.create_dir(target.rsplit("/", 1)[0], recursive=True)
        tmp = f"{target}.{uuid.uuid4().hex}.tmp"
        with self.fs.open_output_stream(tmp) as out:
            out.write(data)
        self.fs.move(tmp, target)  # a rename on a local disk: readers never see half an object
        return sha, location

    def get_object(self, location: str) -> bytes:
        try:
            with self.fs.open_input_stream(self.path(location)) as f:
                return f.read()
        except (FileNotFoundError, OSError) as exc:
            raise NotFound(f"blob {location} is missing from the blob store") from exc

    # ---- datasets ----------------------------------------------------------------------------

    def new_staging(self) -> str:
        """A fresh staging directory (a filesystem path) for one dataset being written."""
        path = self.path(f"staging/{uuid.uuid4().hex}")
        self.fs.create_dir(path, recursive=True)
        return path

    def discard(self, staging: str) -> None:
        """Remove a staging directory and everything in it (after a failure, or after a twin)."""
        try:
            self.fs.delete_dir(staging)
        except (FileNotFoundError, OSError):
            pass

    def publish_dataset(self, staging: str, sha256: str) -> str:
        """Move a complete staging directory (manifest included) to its content address."""
        location = self.dataset_location(sha256)
        target = self.path(location)
        if self._exists(f"{target}/{MANIFEST}"):
            self.discard(staging)  # the same content is already there
            return location
        self.fs.create_dir(target.rsplit("/", 1)[0], recursive=True)
        if self.local:
            try:
                os.rename(staging, target)
            except OSError:  # a racing twin renamed first: same names, same bytes
                if not self._exists(f"{target}/{MANIFEST}"):
                    raise
                self.discard(staging)
            return location
        self.fs.create_dir(target, recursive=True)
        names = sorted(
            info.base_name
            for info in self.fs.get_file_info(pafs.FileSelector(staging))
            if info.type == pafs.FileType.File
        )
        for name in [n for n in names if n != MANIFEST] + [MANIFEST]:
            self.fs.move(f"{staging}/{name}", f"{target}/{name}")
        self.discard(staging)
        return location

    def files(self, location: str) -> list[str]:
        """Sorted filesystem paths of the Parquet parts of a published dataset."""
        selector = pafs.FileSelector(self.path(location))
        try:
            infos = self.fs.get_file_info(selector)
        except (FileNotFoundError, OSError) as exc:
            raise NotFound(f"dataset {location} is missing from the blob store") from exc
        return sorted(i.path for i in infos if i.base_name.endswith(".parquet"))

    def read_text(self, path: str) -> str:
        try:
            with self.fs.open_input_stream(path) as f:
                return f.read().decode("utf-8")
        except (FileNotFoundError, OSError) as exc:
            raise NotFound(f"{path} is missing from the blob store") from exc

    def _exists(self, path: str) -> bool:
        return self.fs.get_file_info(path).type != pafs.FileType.NotFound
