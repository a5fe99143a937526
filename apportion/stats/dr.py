"""Doubly robust (AIPW) scores for J arms with known design shares (Robins, Rotnitzky and Zhao 1994).

    Gamma_ijq = mu_jq(X_i) + 1{W_i = j} (Y_iq - mu_jq(X_i)) / e_j,     Delta_ijq = Gamma_ijq - Gamma_i0q

(Robins, Rotnitzky and Zhao 1994; Dudik, Langford and Li 2011; the multi-action form of Zhou, Athey
and Wager 2023.) With the design shares e_j known and mu fitted without unit i (cross-fitting,
Chernozhukov et al. 2018), E[Gamma_ijq | X_i] = mu_jq(X_i) whatever the outcome model; a better model
only lowers the variance. Every score here is per metric component q; metrics that are linear in
the components (means, proportions, the linearized ratios of `decision.targets`) map through a
(Q, M) weight matrix.
"""

from __future__ import annotations

import math

import numpy as np

from apportion.errors import InvalidInput


def folds_by_arm(arm: np.ndarray, n_folds: int, seed: int) -> np.ndarray:
    """(n,) fold 0..n_folds-1 per row, stratified by arm: every arm's rows are dealt round-robin
    over the folds in a random order (`np.random.default_rng(seed)`), so each fold holds
    floor or ceil of n_j / n_folds rows of arm j."""
    arm = np.asarray(arm)
    if n_folds < 2:
        raise InvalidInput(f"cross-fitting needs at least 2 folds, got {n_folds}")
    rng = np.random.default_rng(seed)
    fold = np.empty(arm.shape[0], dtype=np.int64)
    for j in np.unique(arm):
        rows = np.flatnonzero(arm == j)
        fold[rows[rng.permutation(rows.size)]] = (np.arange(rows.size) + int(j)) % n_folds
    return fold


def dr_scores(
    values: np.ndarray, arm: np.ndarray, shares: np.ndarray, mu: np.ndarray
) -> np.ndarray:
    """(n, J, Q) AIPW scores Gamma from outcomes `values` (n, Q), arm codes (n,), design shares
    e (J,) and outcome predictions `mu` (n, J, Q) made without each row's own outcome."""
    values = np.asarray(values, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, None]
    shares = np.asarray(shares, dtype=np.float64)
    n, q = values.shape
    j = shares.shape[0]
    if mu.shape != (n, j, q):
        raise InvalidInput(f"outcome predictions must have shape {(n, j, q)}, got {mu.shape}")
    if np.any(shares[np.unique(arm)] <= 0):
        raise InvalidInput(f"rows sit in arms whose design share is 0: shares {shares.tolist()}")
    gamma = np.array(mu, dtype=np.float64, copy=True)
    rows = np.arange(n)
    gamma[rows, arm] += (values - mu[rows, arm]) / shares[arm][:, None]
    return gamma


def policy_value(scores: np.ndarray, probs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Value of a (possibly fractional) policy from per-unit scores.

    scores: (n, J, M) Gamma or Delta; probs: (n, J) the policy's arm shares for each unit.
    psi_im = sum_j probs_ij scores_ijm; returns (mean_i psi (M,), sd_i(psi)/sqrt(n) (M,))."""
    psi = np.einsum("nj,njm->nm", probs, scores)
    n = psi.shape[0]
    se = psi.std(axis=0, ddof=1) / math.sqrt(n) if n > 1 else np.full(psi.shape[1], np.nan)
    return psi.mean(axis=0), se
