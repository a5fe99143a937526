"""Cone-constrained plans by outer approximation.

Each guardrail reads mu_k(x) + coef_k * sd_k(x) <= rhs_k, a second-order-cone constraint (convex
for coef_k >= 0; Boyd and Vandenberghe 2004, section 4.4.2). `coef` is z_conf for the chance method
(Charnes and Cooper 1959) and the normal CVaR multiplier for the pure stochastic plan. We solve
a sequence of LPs (Kelley 1960): add a tangent cut for every violated cone, re-solve, stop when
the worst violation is below `tol` (relative to the allowed harm). Both mu_k and sd_k are
positively homogeneous in x - b, so moving the last point toward the baseline b by
lambda = min_k rhs_k / f_k(x) makes it exactly feasible and loses at most a tol/(1 + tol) share of
the objective (the last LP point is optimal for a relaxation).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from apportion.optimize.linear import Linear
from apportion.optimize.lp import LPModel, cut_row


@dataclass
class ConeResult:
    x: np.ndarray | None
    iterations: int
    lp_iterations: int
    cuts_a: list[np.ndarray] = field(default_factory=list)
    cuts_b: list[float] = field(default_factory=list)
    max_violation: float = 0.0  # relative, before the final scaling
    scaled_by: float = 1.0
    duals: np.ndarray | None = None


def constraint_scale(lin: Linear) -> np.ndarray:
    """(K,) the scale of each guardrail used for relative tolerances: its allowed harm, or for a
    zero threshold the largest harm any plan could do."""
    centred = lin.G - (lin.b * lin.G).sum(axis=2, keepdims=True)
    reach = np.einsum("c,kc->k", lin.p, np.abs(np.where(lin.avail, centred, 0.0)).max(axis=2))
    return np.where(lin.rhs > 0, lin.rhs, np.maximum(reach, 1e-12))


def cone_values(lin: Linear, x: np.ndarray, coef: np.ndarray) -> np.ndarray:
    out: np.ndarray = lin.harm_lift(x) + coef * lin.harm_sd(x)
    return out


def solve_cone(
    model: LPModel,
    lin: Linear,
    coef: np.ndarray,
    *,
    pure: bool = False,
    tol: float = 1e-3,
    max_iter: int = 60,
    cuts_a: list[np.ndarray] | None = None,
    cuts_b: list[float] | None = None,
    duals: np.ndarray | None = None,
) -> ConeResult:
    """Kelley loop; `duals` warm-starts the first LP (later LPs reuse the previous multipliers,
    zero for new cuts), which lets HiGHS solve a small restricted LP (LPModel._restricted)."""
    cuts_a = list(cuts_a or [])
    cuts_b = list(cuts_b or [])
    scale = constraint_scale(lin)
    tol_eff = 1e-9 if pure else tol  # pure points are vertices: iterate until exactly feasible
    lp_iter = 0
    x = None
    viol = np.zeros(len(coef))
    it = 0
    for it in range(1, max_iter + 1):
        res = model.solve(
            np.array(cuts_a) if cuts_a else None,
            np.array(cuts_b) if cuts_b else None,
            pure=pure,
            duals=duals,
        )
        duals = res.duals
        lp_iter += res.iterations
        if res.x is None:
            return ConeResult(None, it, lp_iter, cuts_a, cuts_b)
        x = res.x
        viol = (cone_values(lin, x, coef) - lin.rhs) / scale
        if viol.size == 0 or viol.max() <= tol_eff:
            break
        for k in np.flatnonzero(viol > tol_eff):
            cut = cut_row(lin, int(k), x, float(coef[k]))
            if cut is not None:
                cuts_a.append(cut[0])
                cuts_b.append(cut[1])
    assert x is not None
    worst = float(viol.max(initial=0.0))
    lam = 1.0
    if not pure and worst > 0:
        f = cone_values(lin, x, coef)
        over = f > lin.rhs
        lam = float(np.min(lin.rhs[over] / f[over]))
        x = lin.b + lam * (x - lin.b)
    return ConeResult(x, it, lp_iter, cuts_a, cuts_b, worst, lam, duals)
