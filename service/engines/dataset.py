"""A readout as a Parquet dataset: its files in row order, their row counts and the experiment's
specs (arms control first, features, metrics). The engines read the files; nothing here loads rows.

Columns follow the upload format: `unit_id`, `arm` (the arm key), one column per feature (numeric,
or strings for a categorical feature; null or empty is missing) and one per metric component.
"""

from __future__ import annotations

import glob
import os
from dataclasses import dataclass

import numpy as np
import pyarrow.parquet as pq

from service.errors import InvalidInput
from service.stats.table import FeatureSpec, MetricSpec


@dataclass(frozen=True)
class ReadoutDataset:
    files: tuple[str, ...]  # in row order
    file_rows: tuple[int, ...]
    arm_keys: tuple[str, ...]  # control first
    design_shares: np.ndarray
    features: tuple[FeatureSpec, ...]
    metrics: tuple[MetricSpec, ...]

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
        design_shares,
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
