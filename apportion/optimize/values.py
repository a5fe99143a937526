"""A plan's exact metric values and the delta-method standard error of its lift, from the cells'
component means and covariances: the figures the solvers, the impact report and the problem's
own checks (the single-arm baselines) all read. The delta method: Casella and Berger,
"Statistical Inference", 2nd ed., 2002, section 5.5.4.
"""

from __future__ import annotations

import numpy as np

from apportion.stats.table import MetricSpec


def metric_values(
    x: np.ndarray,
    shares: np.ndarray,
    mean: np.ndarray,
    metrics: tuple[MetricSpec, ...],
    components: tuple[str, ...],
) -> dict[str, float]:
    """Exact metric values under plan x (C, J) with component means `mean` (C, J, Q): a ratio
    is total numerator over total denominator, others the share-weighted mean."""
    pos = {name: i for i, name in enumerate(components)}
    w = shares[:, None] * x
    safe = np.where(w[..., None] > 0, mean, 0.0)
    tot = np.einsum("cj,cjq->q", w, safe)
    out: dict[str, float] = {}
    for m in metrics:
        if m.kind == "ratio":
            out[m.key] = float(tot[pos[m.ratio_columns[0]]] / tot[pos[m.ratio_columns[1]]])
        else:
            out[m.key] = float(tot[pos[m.key]])
    return out


def lift_sd(
    x: np.ndarray,
    b: np.ndarray,
    shares: np.ndarray,
    mean: np.ndarray,
    cov: np.ndarray,
    n: np.ndarray,
    metric: MetricSpec,
    components: tuple[str, ...],
) -> float:
    """Delta-method standard error of the estimated lift M(x) - M(b), cells independent."""
    q = len(components)
    pos = {name: i for i, name in enumerate(components)}
    avail = n >= 2
    mu = np.where(avail[..., None], mean, 0.0)
    if metric.kind == "ratio":
        a, d = pos[metric.ratio_columns[0]], pos[metric.ratio_columns[1]]
        wx, wb = shares[:, None] * x, shares[:, None] * b
        nx, dx = (wx * mu[..., a]).sum(), (wx * mu[..., d]).sum()
        nb, db = (wb * mu[..., a]).sum(), (wb * mu[..., d]).sum()
        gx, gb = np.zeros(q), np.zeros(q)
        gx[a], gx[d] = 1.0 / dx, -(nx / dx) / dx
        gb[a], gb[d] = 1.0 / db, -(nb / db) / db
        grad = wx[..., None] * gx - wb[..., None] * gb  # (C, J, Q)
    else:
        g = np.zeros(q)
        g[pos[metric.key]] = 1.0
        grad = (shares[:, None] * (x - b))[..., None] * g
    safe_cov = np.where(avail[..., None, None], np.nan_to_num(cov), 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv_n = np.where(avail, 1.0 / np.maximum(n, 1), 0.0)
    var = np.einsum("cjq,cjqr,cjr,cj->", grad, safe_cov, grad, inv_n)
    return float(np.sqrt(max(var, 0.0)))
