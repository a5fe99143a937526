"""Euclidean projection onto a product of probability simplices, one row per cohort.

Duchi, Shalev-Shwartz, Singer and Chandra (ICML 2008), Fig. 1, vectorized over rows: sort each row
descending, find the last index rho with u_rho - (cumsum_rho - 1)/rho > 0, shift by
theta = (cumsum_rho - 1)/rho and clip at 0. O(J log J) per row.
"""

from __future__ import annotations

import numpy as np


def project_rows(v: np.ndarray, mask: np.ndarray | None = None) -> np.ndarray:
    """Project each row of v (C, J) onto {w >= 0, sum w = 1}. Entries where `mask` is False are
    forced to 0 (the projection onto the face of the simplex spanned by the allowed arms)."""
    v = np.asarray(v, dtype=np.float64)
    if mask is not None:
        # Far below any allowed entry: sorted last, never inside the support, clipped to 0.
        low = v[mask].min(initial=0.0) - 1e6 * (1.0 + np.abs(v[mask]).max(initial=0.0))
        v = np.where(mask, v, low)
    c, j = v.shape
    u = -np.sort(-v, axis=1)
    css = np.cumsum(u, axis=1) - 1.0
    k = np.arange(1, j + 1)
    cond = u - css / k > 0
    rho = j - 1 - np.argmax(cond[:, ::-1], axis=1)  # last True per row (index 0 always True)
    theta = css[np.arange(c), rho] / (rho + 1)
    w = np.maximum(v - theta[:, None], 0.0)
    if mask is not None:
        w = np.where(mask, w, 0.0)
    out: np.ndarray = w
    return out
