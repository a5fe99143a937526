"""A readout as a Parquet dataset: its files in row order, their row counts and the experiment's
specs (arms control first, features, metrics). The engines read the files; nothing here loads rows.

Two column layouts: the upload format (`unit_id`, `arm` holding the arm key, one column per
feature named by its key, numeric or strings for a categorical feature, null or empty is missing,
and one per metric component named by it) and the blob store's readout datasets
(`apportion.ingest.dataset`: `arm` holding the arm code, features in `f0..`, components in `c0..`),
opened with `ReadoutDataset.stored`. `column(name)` gives the Parquet column of a feature key or
component name either way.
"""

from __future__ import annotations

import glob
import os
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow.parquet as pq

from apportion.errors import InvalidInput
from apportion.stats.table import FeatureSpec, MetricSpec


@dataclass(frozen=True)
class ReadoutDataset:
    files: tuple[str, ...]  # in row order
    file_rows: tuple[int, ...]
    arm_keys: tuple[str, ...]  # control first
    design_shares: np.ndarray
    features: tuple[FeatureSpec, ...]
    metrics: tuple[MetricSpec, ...]
    columns: tuple[tuple[str, str], ...] = ()  # (feature key or component, Parquet column)
    arm_coded: bool = False  # `arm` holds the arm's code (control 0) instead of its key

    def column(self, name: str) -> str:
        """The Parquet column holding feature `name` or metric component `name`."""
        return dict(self.columns).get(name, name)

    @property
    def n_rows(self) -> int:
        return int(sum(self.file_rows))

    @property
    def components(self) -> tuple[str, ...]:
        out: list[str] = []
        for m in self.metrics:
            out += [c for c in m.columns if c not in out]
        return tuple(out)

    @staticmethod
    def open(
        location: str,
        *,
        arm_keys: tuple[str, ...],
        design_shares: Any,
        features: tuple[FeatureSpec, ...],
        metrics: tuple[MetricSpec, ...],
    ) -> ReadoutDataset:
        """`location`: a Parquet file or a directory of them (read in sorted path order)."""
        if os.path.isdir(location):
            files = sorted(glob.glob(os.path.join(location, "**", "*.parquet"), recursive=True))
        else:
            files = [location] if os.path.exists(location) else []
        if not files:
            raise InvalidInput(f"no Parquet files at {location!r}")
        rows = tuple(int(pq.ParquetFile(f).metadata.num_rows) for f in files)
        return ReadoutDataset(tuple(files), rows, tuple(arm_keys),
                              np.asarray(design_shares, dtype=np.float64), tuple(features),
                              tuple(metrics))  # fmt: skip

    @staticmethod
    def stored(paths: Any, manifest: Any) -> ReadoutDataset:
        """A readout version in the blob store: its part files (local paths, in order) and its
        manifest (`apportion.ingest.dataset.Manifest`), whose spec carries the discovered levels."""
        spec = manifest.spec
        cols = [(f.key, f"f{i}") for i, f in enumerate(spec.features)]
        cols += [(c, f"c{i}") for i, c in enumerate(spec.columns)]
        rows = tuple(int(f["rows"]) for f in manifest.files)
        if len(paths) != len(rows) or sum(rows) != manifest.n_rows:
            raise InvalidInput(f"the dataset lists {len(rows)} part files with {sum(rows)} rows; "
                               f"got {len(paths)} paths and a manifest of {manifest.n_rows} rows")  # fmt: skip
        return ReadoutDataset(tuple(str(p) for p in paths), rows, tuple(spec.arm_keys),
                              np.asarray(spec.design_shares, dtype=np.float64),
                              tuple(spec.features), tuple(spec.metrics), tuple(cols),
                              arm_coded=True)  # fmt: skip
