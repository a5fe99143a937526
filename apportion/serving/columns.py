"""Feature columns of a UnitTable in the form the lookup takes (numbers with NaN for missing,
level strings with None for missing), for batch assignment of stored or simulated rows."""

from __future__ import annotations

from typing import Any

import numpy as np

from apportion.stats.table import FeatureSpec


def lookup_columns(
    features: tuple[FeatureSpec, ...], values: dict[str, np.ndarray]
) -> dict[str, list[Any]]:
    out: dict[str, list[Any]] = {}
    for f in features:
        v = values[f.key]
        if f.kind == "numeric":
            out[f.key] = v.astype(np.float64).tolist()
        else:
            levels = np.array(list(f.levels) + [None], dtype=object)
            out[f.key] = levels[np.where(v < 0, len(f.levels), v)].tolist()
    return out
