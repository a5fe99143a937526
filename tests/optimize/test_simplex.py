"""Projection onto the product of simplices (Duchi et al. 2008) against a general QP solver."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import LinearConstraint, minimize

from apportion.optimize.simplex import project_rows


def qp_projection(v: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """min ||w - v||^2 s.t. sum w = 1, w >= 0, w = 0 off the mask (scipy SLSQP)."""
    j = v.size
    bounds = [(0.0, 1.0 if m else 0.0) for m in mask]
    res = minimize(
        lambda w: 0.5 * np.sum((w - v) ** 2),
        x0=mask / mask.sum(),
        jac=lambda w: w - v,
        bounds=bounds,
        constraints=[LinearConstraint(np.ones((1, j)), 1.0, 1.0)],
        method="SLSQP",
        options={"ftol": 1e-14, "maxiter": 500},
    )
    return res.x


@pytest.mark.parametrize("j", [2, 3, 7])
def test_projection_equals_scipy_minimize_qp(j):
    # reference: scipy.optimize.minimize (SLSQP) on the same QP; Duchi et al. (ICML 2008), Fig. 1
    rng = np.random.default_rng(j)
    v = rng.normal(0.0, 2.0, (40, j))
    mask = rng.random((40, j)) > 0.25
    mask[np.arange(40), rng.integers(0, j, 40)] = True
    w = project_rows(v, mask)
    for i in range(40):
        ref = qp_projection(v[i], mask[i])
        # tolerance: SLSQP stops at ftol 1e-14 on the objective, ~1e-7 on the point
        np.testing.assert_allclose(w[i], ref, atol=1e-6)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-12)
    assert (w[~mask] == 0).all() and (w >= 0).all()


def test_points_inside_the_simplex_are_fixed():
    rng = np.random.default_rng(3)
    x = rng.dirichlet(np.ones(5), size=20)
    np.testing.assert_allclose(project_rows(x), x, atol=1e-12)
