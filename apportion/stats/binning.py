"""Bin the features of a unit table once, so trees work on small integer codes.

Numeric features get at most `max_bins` quantile bins; the thresholds are data values, and a row's
code is the number of thresholds <= x, so `code < b` is exactly `x < thresholds[b - 1]` (the
`Partition` convention). Categorical codes are the table's level codes. Missing values (NaN, -1)
get the last code of their feature, `n_bins[f] - 1`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from apportion.stats.table import FeatureSpec, UnitTable


@dataclass(frozen=True)
class FeatureBins:
    """codes: (F, n) uint8/uint16; n_bins: (F,) codes per feature including the missing code;
    thresholds: per feature, (n_bins - 2,) float64 for numeric features, None for categorical."""

    features: tuple[FeatureSpec, ...]
    codes: np.ndarray
    n_bins: np.ndarray
    thresholds: tuple[np.ndarray | None, ...]

    @property
    def max_bins(self) -> int:
        return int(self.n_bins.max()) if self.n_bins.size else 1


def numeric_thresholds(x: np.ndarray, max_bins: int) -> np.ndarray:
    """At most `max_bins - 1` increasing thresholds, data values at the quantiles i/max_bins."""
    x = x[~np.isnan(x)]
    if x.size == 0 or max_bins < 2:
        return np.empty(0)
    probs = np.arange(1, max_bins) / max_bins
    return thresholds_from_quantiles(np.quantile(x, probs, method="inverted_cdf"), x.min())


def thresholds_from_quantiles(q: np.ndarray, x_min: float) -> np.ndarray:
    """The distinct quantiles above the minimum (a threshold at the minimum would leave the left
    side empty); shared with the engines, which compute the quantiles where the rows live."""
    thr = np.unique(np.asarray(q, dtype=np.float64))
    return thr[thr > x_min]


def bin_features(
    table: UnitTable, keys: list[str], max_bins: int | dict[str, int] = 64
) -> FeatureBins:
    """Codes for the features `keys` of `table`; `max_bins` may differ per numeric feature."""
    specs = tuple(table.feature(k) for k in keys)
    n_bins = np.empty(len(specs), dtype=np.int64)
    thresholds: list[np.ndarray | None] = []
    raw: list[np.ndarray] = []
    for i, f in enumerate(specs):
        v = table.feature_values[f.key]
        if f.kind == "numeric":
            v = np.asarray(v, dtype=np.float64)
            mb = max_bins[f.key] if isinstance(max_bins, dict) else max_bins
            thr = numeric_thresholds(v, mb)
            code = np.searchsorted(thr, v, side="right")
            code[np.isnan(v)] = thr.size + 1
            n_bins[i] = thr.size + 2
            thresholds.append(thr)
        else:
            n_levels = len(f.levels)
            code = np.where(v < 0, n_levels, v)
            n_bins[i] = n_levels + 1
            thresholds.append(None)
        raw.append(code)
    dtype: type[np.unsignedinteger[Any] | np.signedinteger[Any]] = (
        np.uint8 if (n_bins.size == 0 or n_bins.max() <= 256) else np.uint16
    )
    if n_bins.size and n_bins.max() > 65536:
        dtype = np.int32
    codes = np.empty((len(specs), table.n), dtype=dtype)
    for i, c in enumerate(raw):
        codes[i] = c
    return FeatureBins(features=specs, codes=codes, n_bins=n_bins, thresholds=tuple(thresholds))
