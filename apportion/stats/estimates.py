"""Per-cell estimates (cohort x arm x metric): the one implementation shared by readouts, cohort
models, plans and the watch.

Sufficient statistics per (cohort, arm) cell are the count, the component sums and the sums of
cross-products, gathered with `np.bincount`. Metric-level numbers come from the components:
a ratio metric R = sum(num)/sum(den) gets the delta-method variance of Deng, Knoblich and Lu (2018),
(1/(n mu_d^2)) (s_nn - 2 R s_nd + R^2 s_dd); effects against control use Welch's variance
s_j^2/n_j + s_0^2/n_0.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from apportion.stats.table import MetricSpec


@dataclass(frozen=True)
class CellMoments:
    """Component moments per cell.

    n: (C, J) unit counts; mean: (C, J, Q) component means; cov: (C, J, Q, Q) unit-level sample
    covariance of the components (ddof=1; NaN where a cell has fewer than two units).
    """

    components: tuple[str, ...]
    n: np.ndarray
    mean: np.ndarray
    cov: np.ndarray

    @property
    def shape(self) -> tuple[int, int, int]:
        c, j, q = self.mean.shape
        return c, j, q


def cell_moments(
    cohort: np.ndarray,
    n_cohorts: int,
    arm: np.ndarray,
    n_arms: int,
    values: np.ndarray,
    components: tuple[str, ...],
) -> CellMoments:
    """Moments of `values` (n, Q) per (cohort, arm) cell; `cohort` and `arm` are int codes."""
    values = np.asarray(values, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    q = values.shape[1]
    cells = n_cohorts * n_arms
    idx = np.asarray(cohort, dtype=np.int64) * n_arms + np.asarray(arm, dtype=np.int64)
    n = np.bincount(idx, minlength=cells).astype(np.float64)
    sums = np.empty((cells, q))
    for a in range(q):
        sums[:, a] = np.bincount(idx, weights=values[:, a], minlength=cells)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = sums / n[:, None]
    # Centre on the cell mean before the cross-products: numerically stable for large means.
    centred = values - mean[idx]
    cross = np.empty((cells, q, q))
    for a in range(q):
        for b in range(a, q):
            s = np.bincount(idx, weights=centred[:, a] * centred[:, b], minlength=cells)
            cross[:, a, b] = s
            cross[:, b, a] = s
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = np.where((n > 1)[:, None, None], cross / (n - 1)[:, None, None], np.nan)
    return CellMoments(
        components=tuple(components),
        n=n.reshape(n_cohorts, n_arms).astype(np.int64),
        mean=mean.reshape(n_cohorts, n_arms, q),
        cov=cov.reshape(n_cohorts, n_arms, q, q),
    )


def pool_moments(a: CellMoments, b: CellMoments) -> CellMoments:
    """The moments of two disjoint sets of units, from each set's moments (the pairwise update
    of Chan, Golub and LeVeque (1979): M2 = M2_a + M2_b + d d' n_a n_b / n, d = mean_b - mean_a),
    so that a readout streamed in batches gets the moments of the whole."""
    na, nb = a.n.astype(np.float64), b.n.astype(np.float64)
    n = na + nb
    ma, mb = np.nan_to_num(a.mean), np.nan_to_num(b.mean)
    d = mb - ma
    with np.errstate(invalid="ignore", divide="ignore"):
        w = np.where(n > 0, nb / n, 0.0)
        mean = np.where((n > 0)[..., None], ma + d * w[..., None], np.nan)
        m2a = np.where(
            (na > 1)[..., None, None], np.nan_to_num(a.cov) * (na - 1)[..., None, None], 0
        )
        m2b = np.where(
            (nb > 1)[..., None, None], np.nan_to_num(b.cov) * (nb - 1)[..., None, None], 0
        )
        m2 = (
            m2a
            + m2b
            + d[..., :, None] * d[..., None, :] * np.where(n > 0, na * nb / n, 0)[..., None, None]
        )
        cov = np.where((n > 1)[..., None, None], m2 / (n - 1)[..., None, None], np.nan)
    return CellMoments(components=a.components, n=(a.n + b.n), mean=mean, cov=cov)


def metric_gradients(
    moments: CellMoments, metrics: tuple[MetricSpec, ...]
) -> tuple[np.ndarray, np.ndarray]:
    """Point estimates (C, J, K) and their gradients (C, J, K, Q) with respect to the component
    means: identity rows for mean/proportion metrics, (1/mu_d, -R/mu_d) for ratio metrics."""
    c, j, q = moments.shape
    k = len(metrics)
    value = np.empty((c, j, k))
    grad = np.zeros((c, j, k, q))
    pos = {name: i for i, name in enumerate(moments.components)}
    for m_i, m in enumerate(metrics):
        if m.kind == "ratio":
            a, b = pos[m.ratio_columns[0]], pos[m.ratio_columns[1]]
            mu_n, mu_d = moments.mean[..., a], moments.mean[..., b]
            with np.errstate(invalid="ignore", divide="ignore"):
                r = mu_n / mu_d
                grad[..., m_i, a] = 1.0 / mu_d
                grad[..., m_i, b] = -r / mu_d
            value[..., m_i] = r
        else:
            a = pos[m.key]
            value[..., m_i] = moments.mean[..., a]
            grad[..., m_i, a] = 1.0
    return value, grad


@dataclass(frozen=True)
class MetricEstimates:
    """Metric-level estimates per cell. All arrays (C, J, K) unless stated.

    mean: the metric's value in the cell (ratio: sum num / sum den); var: unit-level (linearized)
    variance; se: standard error of `mean`; effect, effect_se: against control (arm 0), Welch;
    mean_cov: (C, J, K, K) covariance between the metrics' estimates within a cell.
    """

    metric_keys: tuple[str, ...]
    n: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    se: np.ndarray
    effect: np.ndarray
    effect_se: np.ndarray
    mean_cov: np.ndarray


def metric_estimates(moments: CellMoments, metrics: tuple[MetricSpec, ...]) -> MetricEstimates:
    value, grad = metric_gradients(moments, metrics)
    # unit-level covariance of the linearized metrics: G S G^T per cell
    unit_cov = np.einsum("cjkq,cjqr,cjlr->cjkl", grad, moments.cov, grad)
    n = moments.n.astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_cov = unit_cov / n[:, :, None, None]
    var = np.diagonal(unit_cov, axis1=2, axis2=3).copy()
    se2 = np.diagonal(mean_cov, axis1=2, axis2=3).copy()
    se = np.sqrt(se2)
    effect = value - value[:, :1, :]
    effect_se = np.sqrt(se2 + se2[:, :1, :])
    effect_se[:, 0, :] = 0.0
    return MetricEstimates(
        metric_keys=tuple(m.key for m in metrics),
        n=moments.n,
        mean=value,
        var=var,
        se=se,
        effect=effect,
        effect_se=effect_se,
        mean_cov=mean_cov,
    )


def pool_cohorts(moments: CellMoments) -> CellMoments:
    """Collapse all cohorts into one (C = 1), combining counts, means and covariances exactly."""
    n = moments.n.astype(np.float64)  # (C, J)
    tot = n.sum(axis=0)  # (J,)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.einsum("cj,cjq->jq", n, np.nan_to_num(moments.mean)) / tot[:, None]
        within = np.einsum("cj,cjqr->jqr", np.maximum(n - 1, 0), np.nan_to_num(moments.cov))
        dev = np.nan_to_num(moments.mean) - mean[None]
        between = np.einsum("cj,cjq,cjr->jqr", n, dev, dev)
        cov = np.where(
            (tot > 1)[:, None, None], (within + between) / (tot - 1)[:, None, None], np.nan
        )
    return CellMoments(
        components=moments.components,
        n=tot.astype(np.int64)[None],
        mean=mean[None],
        cov=cov[None],
    )
