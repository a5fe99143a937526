"""The honest criterion of Athey and Imbens (2016, PNAS) for J arms and K metrics.

Trees grow on a structure half and are estimated on an estimation half. The per-leaf criterion is
the leaf-count form of AI's honest -EMSE, one term per (treated arm j, metric k),

    g_jk(l) = (N_l / N_tr) * [ tau_jkl^2 - (1 + N_tr / N_est) * (s2_jkl / n_jl + s2_0kl / n_0l) ],

and the criterion of a partition is sum_l sum_jk W_jk g_jk(l), with W_jk = w_k / v_jk: the metric
weight over the pair's root-level variance (computed once at the root, never per node).
"""

from __future__ import annotations

import numpy as np

from apportion.stats.table import UnitTable


def honest_split(arm: np.ndarray, seed: int, estimation_fraction: float = 0.5) -> np.ndarray:
    """(n,) bool, True = estimation row. Stratified by arm: round(fraction * n_j) rows of every arm j
    are drawn without replacement with `np.random.default_rng(seed)`, arms in code order."""
    arm = np.asarray(arm)
    rng = np.random.default_rng(seed)
    mask = np.zeros(arm.shape[0], dtype=bool)
    for j in range(int(arm.max()) + 1 if arm.size else 0):
        rows = np.flatnonzero(arm == j)  # arm j's rows in row order (one arm's index at a time)
        c = rows.size
        k = int(round(estimation_fraction * c))
        mask[rows[rng.permutation(c)[:k]]] = True
    return mask


def criterion_outcomes(table: UnitTable, rows: np.ndarray) -> np.ndarray:
    """(n, K) per-unit outcome of every metric, centred and scaled at the root of `rows`.

    A ratio metric uses its linearized per-unit value (num - R_root * den) / mu_den_root, with R_root
    and mu_den_root from `rows` (all arms pooled): the first-order (delta-method) expansion of the
    cell ratio, so squared lifts and variances of this column approximate those of the ratio.
    Centring and scaling by the root's mean and sd keeps sums of squares well conditioned; the
    criterion is scale-free anyway because every pair is divided by its root variance.
    """
    out = np.empty((table.n, len(table.metrics)))
    for k, m in enumerate(table.metrics):
        if m.kind == "ratio":
            num = table.columns[m.ratio_columns[0]]
            den = table.columns[m.ratio_columns[1]]
            mu_den = den[rows].mean()
            r_root = num[rows].sum() / den[rows].sum()
            y = (num - r_root * den) / mu_den
        else:
            y = np.asarray(table.columns[m.key], dtype=np.float64)
        mu, sd = y[rows].mean(), y[rows].std()
        out[:, k] = (y - mu) / (sd if sd > 0 else 1.0)
    return out


def root_pair_variance(y: np.ndarray, arm: np.ndarray, n_arms: int) -> np.ndarray:
    """(J-1, K) v_jk: the pooled within-arm variance of arms j and 0 at the root (the mean of the
    two unbiased variances), computed once."""
    var = np.stack([y[arm == j].var(axis=0, ddof=1) for j in range(n_arms)])  # (J, K)
    half: np.ndarray = 0.5 * (var[1:] + var[:1])
    return half


def pair_weights(v: np.ndarray, metric_weights: np.ndarray) -> np.ndarray:
    """(J-1, K) W_jk = w_k / v_jk; a pair with zero or undefined variance gets weight 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(v > 0, metric_weights[None, :] / v, 0.0)
    return np.nan_to_num(w)


def leaf_criterion(
    n: np.ndarray, s: np.ndarray, ss: np.ndarray, weights: np.ndarray, n_tr: int, n_est: int
) -> np.ndarray:
    """sum_jk W_jk g_jk for leaves given by sufficient statistics.

    n: (..., J) counts; s, ss: (..., J, K) sums and sums of squares; weights: (J-1, K).
    Returns (...). Leaves with fewer than two units of some arm give NaN (callers exclude them).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        nn = n[..., None]
        mean = s / nn
        var = (ss - s * mean) / (nn - 1)
        var = np.maximum(var, 0.0)  # rounding can make a zero variance slightly negative
        tau = mean[..., 1:, :] - mean[..., :1, :]
        v = var[..., 1:, :] / nn[..., 1:, :] + var[..., :1, :] / nn[..., :1, :]
        g = tau * tau - (1.0 + n_tr / n_est) * v
        share = n.sum(axis=-1) / n_tr
        weighted: np.ndarray = share * np.einsum("...jk,jk->...", g, weights)
        return weighted
