"""Tail-risk guardrails by cooperative stochastic approximation (CSA; Lan and Zhou 2020).

Each guardrail k must keep the conditional value at risk of the plan's estimated harm lift L_k(x)
at level beta_k = confidence within its allowed harm (Rockafellar and Uryasev 2000):

    min_eta  eta + E[(L_k(x, xi) - eta)+] / (1 - beta_k)  <=  rhs_k

Choice for eta: it is an extra decision variable per guardrail, projected onto a box. The pair
(x, eta_k) enters phi_k(x, eta_k) = eta_k + E[(L_k - eta_k)+]/(1 - beta_k) jointly convexly, and
"exists eta with phi_k <= rhs_k" is the CVaR constraint, so the problem is exactly Lan and Zhou's
expectation-constrained convex program and a minibatch mean of phi_k is an unbiased estimate of
it. (Computing eta per minibatch as a sample quantile would instead give a CVaR estimate biased
low for small batches: with a 5 % tail and 64 draws only ~3 draws define it.) Widening the tail to
1 (`options["tail"] = 1.0`) makes phi_k = E[max(L_k, eta_k)], minimized at the bottom of the box:
the guardrail on the mean lift, i.e. the deterministic LP.

Sampling (default `sampler="cells"`): every draw takes the linearized cell means from their normal
sampling distribution (within-cell covariance across guardrails from the component covariances,
cells independent) and forms the lift against the baseline on the same draw, so the shared control
(and the baseline's own noise) is respected. `sampler="marginal"` draws instead each guardrail's
plan lift from its exact normal law N(mu_k(x), sd_k(x)^2) and differentiates through it
(reparameterization); it has the same phi_k and costs O(C J K) per step instead of O(B C J K^2).

Iteration (Lan and Zhou 2020, Algorithm CSA, Euclidean prox = projection): if every normalized
estimate (phi_k - rhs_k)/s_k is within the tolerance, step on the objective (exact gradient: the
objective is linear in x and its expectation is known) and mark the iterate; else step on the most
violated guardrail's stochastic subgradient. x is projected onto the product of simplices (Duchi et
al. 2008), eta onto its box. Output: the step-weighted average of the marked iterates from
`start` on. Constant steps gamma = D / (M sqrt(N)) per block (x and eta), N iterations.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from apportion.optimize.chance import cone_values, constraint_scale
from apportion.optimize.linear import Linear, cvar_multiplier
from apportion.optimize.simplex import project_rows

MAX_AUTO_BATCH = 4096
DEFAULTS: dict[str, Any] = {
    "iterations": 40000,
    "batch": None,  # None: ~32 draws in the thinnest tail, at least 16 (antithetic pairs)
    "noise_allowance": 2.0,  # the good-iterate test also allows this many standard errors of phi
    "tol": 0.01,  # allowed normalized violation in the good-iterate test (share of allowed harm)
    "start": 0.5,  # average marked iterates from this share of the run on
    "step": 10.0,  # multiplier of the theoretical constant step (D_x = 1 is a loose bound)
    "sampler": "marginal",  # or "cells"; see the module docstring
    "repair": True,  # scale the output toward the baseline until the normal-CVaR holds exactly
}


@dataclass
class CSAResult:
    x: np.ndarray
    iterations: int
    diagnostics: dict[str, Any]


def _cell_chol(lin: Linear) -> np.ndarray:
    """(C, J, K, K) Cholesky factors of the guardrail coefficients' within-cell covariance."""
    c, j, k = lin.shape
    cov = lin.cellcov + np.eye(k) * 1e-300
    jitter = 1e-12 * np.maximum(np.diagonal(cov, axis1=2, axis2=3).max(axis=-1), 1e-300)
    try:
        return np.linalg.cholesky(cov + jitter[..., None, None] * np.eye(k))
    except np.linalg.LinAlgError:
        vals, vecs = np.linalg.eigh(cov)
        out: np.ndarray = vecs * np.sqrt(np.clip(vals, 0.0, None))[..., None, :]
        return out


def csa(lin: Linear, *, seed: int = 0, options: dict[str, Any] | None = None) -> CSAResult:
    opts = DEFAULTS | dict(options or {})
    n_iter = int(opts["iterations"])
    tails0 = (
        (1.0 - lin.conf)
        if opts.get("tail") is None
        else np.full(len(lin.keys), float(opts["tail"]))
    )
    # ~32 draws in the thinnest tail, at least 16, at most MAX_AUTO_BATCH (a 0.9999 confidence
    # would otherwise ask for 320,000 draws a step)
    auto = min(MAX_AUTO_BATCH, max(16, int(np.ceil(32.0 / float(tails0.min(initial=1.0))))))
    half = max(1, int(opts["batch"] or auto) // 2)
    batch = 2 * half  # antithetic pairs (Hammersley and Morton 1956): xi and -xi around the mean
    tol = float(opts["tol"])
    noise = float(opts["noise_allowance"])
    rng = np.random.default_rng(seed)
    c, j, k = lin.shape
    tail = (1.0 - lin.conf) if opts.get("tail") is None else np.full(k, float(opts["tail"]))
    p2 = lin.p[:, None]
    avail = lin.avail
    b = lin.b

    # Normalization: objective and guardrails in units of their value scales, so the good-iterate
    # tolerance is a share of each guardrail's allowed harm (Lan and Zhou's g = max_k g_k / s_k).
    # Rows are centred on the baseline's value: a constant per row does not change a projected
    # step (projection onto the simplex commutes with adding a constant to a row).
    objc = np.where(avail, lin.obj - (b * lin.obj).sum(axis=1, keepdims=True), 0.0)
    gc = np.where(avail, lin.G - (b * lin.G).sum(axis=2, keepdims=True), 0.0)
    s = constraint_scale(lin)
    obj_scale = float(np.einsum("c,c->", lin.p, np.abs(objc).max(axis=1)))
    obj_scale = obj_scale if obj_scale > 0 else 1.0
    grad_obj = -(p2 * objc) / obj_scale

    # eta_k = s_k * theta_k with theta in a box holding every plan's lift up to 8 sd.
    reach = np.einsum("c,kc->k", lin.p, np.abs(gc).max(axis=2))
    sd_max = np.sqrt(np.einsum("c,kc->k", lin.p**2, 2.0 * np.where(avail, lin.V, 0.0).max(axis=2)))
    box = (reach + 8.0 * sd_max) / s
    theta = np.zeros(k)

    # Prox geometry: the share-weighted Euclidean distance V(x, z) = 1/2 sum_c p_c ||x_c - z_c||^2,
    # a valid Bregman distance for CSA that makes every cohort move at the same speed whatever
    # its share; the prox step is still a row-wise projection, of x_c - gamma h_c / p_c.
    # Constant steps per block (Lan and Zhou 2020, CSA): D_x^2 = sum_c p_c = 1 (from a vertex), M^2 the
    # largest dual norm sum_c ||h_c||^2 / p_c of a normalized objective or guardrail gradient.
    inv_p = np.where(lin.p > 0, 1.0 / np.where(lin.p > 0, lin.p, 1.0), 0.0)[:, None]
    m_obj = np.sqrt(((grad_obj**2) * inv_p).sum())
    m_g = np.sqrt(((p2 * gc) ** 2 * inv_p).sum(axis=(1, 2))) / s
    m_x = max(float(m_obj), float(m_g.max(initial=0.0)), 1e-300)
    gamma_x = float(opts["step"]) / (m_x * np.sqrt(n_iter))
    gamma_t = float(opts["step"]) * (2.0 * box) / ((1.0 / tail) * np.sqrt(n_iter))

    chol = _cell_chol(lin) if opts["sampler"] == "cells" else None
    start = int(float(opts["start"]) * n_iter)
    x = b.copy()
    acc = np.zeros((c, j))
    weight = 0.0
    allow = np.zeros(k)  # step-weighted allowance of the marked iterates (normalized)
    marked = 0
    for t in range(n_iter):
        d = p2 * (x - b)
        mu = np.einsum("cj,kcj->k", d, lin.G)
        if chol is not None:
            z = rng.standard_normal((half, c, j, k))
            z = np.concatenate([z, -z])
            eps = np.einsum("cjkl,bcjl->bcjk", chol, z)
            lifts = mu + np.einsum("cj,bcjk->bk", d, eps)  # (B, K)
        else:
            sd = np.sqrt(np.einsum("cj,kcj->k", d * d, lin.V))
            z = rng.standard_normal((half, k))
            z = np.concatenate([z, -z])
            lifts = mu + sd * z
        eta = s * theta
        over = lifts > eta  # (B, K)
        terms = eta + np.where(over, lifts - eta, 0.0) / tail  # (B, K)
        phi = terms.mean(axis=0)
        # Lan and Zhou: with an estimated constraint the tolerance must absorb its noise; the
        # standard error comes from the antithetic pair means (pairs are not independent draws).
        pair = 0.5 * (terms[:half] + terms[half:])
        se = pair.std(axis=0) / np.sqrt(half) if half > 1 else np.zeros(k)
        g = (phi - lin.rhs) / s
        if k == 0 or (g <= tol + noise * se / s).all():
            h = grad_obj
            if t >= start:
                acc += gamma_x * x
                weight += gamma_x
                allow += gamma_x * (tol + noise * se / s)
                marked += 1
            x = project_rows(x - gamma_x * h * inv_p, avail)
            continue
        kk = int(np.argmax(g))
        ind = over[:, kk]
        frac = ind.mean()
        if chol is not None:
            tail_noise = np.einsum("b,bcj->cj", ind.astype(np.float64), eps[..., kk]) / batch
            hx = p2 * (frac * gc[kk] + tail_noise)
        else:
            sdk = sd[kk]
            grad_sd = (p2 * d * lin.V[kk]) / sdk if sdk > 0 else np.zeros((c, j))
            hx = p2 * frac * gc[kk] + (z[:, kk] * ind).mean() * grad_sd
        hx = hx / (tail[kk] * s[kk])
        x = project_rows(x - gamma_x * hx * inv_p, avail)
        theta[kk] = np.clip(theta[kk] - gamma_t[kk] * (1.0 - frac / tail[kk]), -box[kk], box[kk])

    x_bar = acc / weight if weight > 0 else b.copy()
    x_bar = x_bar / x_bar.sum(axis=1, keepdims=True)
    mult = cvar_multiplier(lin.conf, opts.get("tail"))
    before = (cone_values(lin, x_bar, mult) - lin.rhs) / s
    lam = 1.0
    if opts["repair"] and k and before.max() > 0:
        f = cone_values(lin, x_bar, mult)
        over_k = f > lin.rhs
        lam = float(np.min(lin.rhs[over_k] / f[over_k]))
        x_bar = b + lam * (x_bar - b)
    diag = {
        "solver": "csa",
        "sampler": opts["sampler"],
        "iterations": n_iter,
        "batch": batch,
        "marked_iterates": marked,
        "tail": tail.tolist(),
        # stated tolerance: the marked iterates' step-weighted allowance (tol plus the noise
        # allowance), in the thresholds' units; with the tail widened to 1 the minibatch phi is
        # never below the exact mean lift, so the average plan's mean lift is within rhs + this.
        "violation_tolerance": ((allow / weight if weight > 0 else np.full(k, tol)) * s).tolist(),
        "normalized_tolerance": tol,
        "max_violation_before_repair": float(before.max(initial=0.0)),
        "scaled_toward_baseline": lam,
        "eta": (s * theta).tolist(),
    }
    return CSAResult(x_bar, n_iter, diag)
