"""The deterministic program: maximize the success lift subject to every guardrail
on point estimates, x on the product of simplices. Mixed plans are solved by the HiGHS dual
simplex (`linprog(method="highs-ds")`, which returns a vertex, so at most as many cohorts are
mixed as guardrails bind); pure plans (one arm per cohort) by `milp` with binary x.

The matrices are built once per problem and reused; extra rows (the chance method's tangent cuts)
are appended per call. Rows and objective are scaled to unit max coefficient for HiGHS.

The LPs go to HiGHS through its official Python bindings (`highspy`): the calibration re-solves a
few hundred small LPs per plan, and `linprog`'s input checks and conversions took about 90 % of
each call (bench/RESULTS.md, "Method comparison"). `linprog(method="highs-ds")` runs the same
solver with the same options and is the fallback where highspy is not installed (an environment
set up before it joined the dependencies); tests/optimize/test_lp.py checks both agree.
"""

from __future__ import annotations

import os
import sys
import threading
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.sparse as sp
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

from apportion.optimize.linear import Linear
from apportion.optimize.values import metric_values

try:  # the official HiGHS bindings (DEVELOPERS.md, "Dependencies")
    import highspy as _highspy

    HAVE_HIGHSPY = True
except ImportError:  # pragma: no cover - an environment installed before highspy was added
    HAVE_HIGHSPY = False


def _make_first_solver_quietly() -> None:
    """HiGHS writes a two-line banner to file descriptor 1 when the first solver of a process is
    made, before any option can turn its output off (later solvers print nothing). Made once here,
    at import, with descriptor 1 pointed at /dev/null, so a server's JSON-lines log and a bench's
    one JSON line on standard output stay what they say they are."""
    sys.stdout.flush()
    saved = os.dup(1)
    try:
        with open(os.devnull, "wb") as null:
            os.dup2(null.fileno(), 1)
            _highspy.Highs()
    finally:
        os.dup2(saved, 1)
        os.close(saved)


if HAVE_HIGHSPY:
    _make_first_solver_quietly()

TIE_BREAK = 1e-6  # relative weight of the secondary objective that prefers control, so ties keep members where they are


@dataclass
class LPResult:
    x: np.ndarray | None  # (C, J), None when infeasible
    status: int  # 0 optimal, 2 infeasible, other: solver trouble
    iterations: int
    message: str
    duals: np.ndarray | None = None  # (R,) >= 0 multipliers of the coupling rows (scaled rows)
    restricted: int = 0  # pricing rounds of the restricted LP (0: the full LP was solved)


class LPModel:
    """Reusable LP/MILP matrices for one linear form.

    Guardrail k: sum_cj p_c G[k,c,j] x[c,j] <= rhs_k + sum_cj p_c G[k,c,j] b[c,j].
    """

    def __init__(
        self,
        lin: Linear,
        *,
        tie_break: float = TIE_BREAK,
        presolve: bool = False,
        a_eq: sp.csr_matrix | None = None,
    ):
        c, j, k = lin.shape
        self.shape = (c, j)
        self.lin = lin
        self.presolve = presolve
        self.a_eq = a_eq if a_eq is not None else simplex_rows(c, j)
        rows = (lin.p[None, :, None] * lin.G).reshape(k, c * j)
        b_ub = lin.rhs + rows @ lin.b.ravel()
        self.row_scale = np.maximum(np.abs(rows).max(axis=1, initial=0.0), 1e-300)
        self.a_ub = rows / self.row_scale[:, None]
        self.b_ub = b_ub / self.row_scale
        cost = -(lin.p[:, None] * lin.obj).ravel()
        cmax = float(np.abs(cost).max(initial=0.0))
        cost = cost / cmax if cmax > 0 else cost
        pmax = float(lin.p.max(initial=0.0)) or 1.0
        tie = np.zeros((c, j))
        tie[:, 1:] = (lin.p / pmax)[:, None]
        self.cost = cost + tie_break * tie.ravel()
        self.upper = lin.avail.astype(np.float64).ravel()

    def _rows(
        self, cuts_a: np.ndarray | None, cuts_b: np.ndarray | None
    ) -> tuple[np.ndarray, np.ndarray]:
        if cuts_a is None or len(cuts_a) == 0:
            return self.a_ub, self.b_ub
        s = np.maximum(np.abs(cuts_a).max(axis=1), 1e-300)
        return np.vstack([self.a_ub, cuts_a / s[:, None]]), np.concatenate([self.b_ub, cuts_b / s])

    def solve(
        self,
        cuts_a: np.ndarray | None = None,
        cuts_b: np.ndarray | None = None,
        *,
        pure: bool = False,
        cost: np.ndarray | None = None,
        duals: np.ndarray | None = None,
    ) -> LPResult:
        """Solve the LP (or the MILP when `pure`). `duals`: warm multipliers of the coupling rows
        (guardrails, then cuts) from a nearby problem, which enable the restricted solve."""
        a_ub, b_ub = self._rows(cuts_a, cuts_b)
        cost = self.cost if cost is None else cost
        c, j = self.shape
        if pure:
            cons = [LinearConstraint(self.a_eq, 1.0, 1.0)]
            if a_ub.shape[0]:
                cons.append(LinearConstraint(a_ub, -np.inf, b_ub))
            res = milp(
                cost,
                constraints=cons,
                bounds=Bounds(0.0, self.upper),
                integrality=np.ones(c * j),
            )
            nit = int(getattr(res, "mip_node_count", 0) or 0)
            status = 0 if res.status == 0 else (2 if res.status == 2 else int(res.status))
        else:
            if duals is not None and a_ub.shape[0] and c > 64:
                warm = np.zeros(a_ub.shape[0])
                m = min(len(duals), a_ub.shape[0])
                warm[:m] = np.asarray(duals, dtype=np.float64)[:m]
                out = self._restricted(cost, a_ub, b_ub, warm)
                if out is not None:
                    return out
            return self._full(cost, a_ub, b_ub)
        if status != 0 or res.x is None:
            return LPResult(None, status, nit, str(res.message))
        x = np.round(np.clip(res.x.reshape(c, j), 0.0, None))
        x = x / x.sum(axis=1, keepdims=True)
        return LPResult(x, 0, nit, str(res.message))

    def _linprog(
        self, cost: np.ndarray, a_ub: Any, b_ub: np.ndarray, a_eq: Any, upper: Any
    ) -> LPOut:
        return solve_lp(cost, a_ub, b_ub, a_eq, upper, presolve=self.presolve)

    def _full(self, cost: np.ndarray, a_ub: Any, b_ub: np.ndarray) -> LPResult:
        c, j = self.shape
        res = self._linprog(cost, a_ub, b_ub, self.a_eq, self.upper)
        if res.status != 0 or res.x is None:
            return LPResult(None, int(res.status), int(res.nit), str(res.message))
        x = np.clip(res.x.reshape(c, j), 0.0, None)
        x = x / x.sum(axis=1, keepdims=True)
        duals = -res.ineq_marginals if a_ub.shape[0] else np.zeros(0)
        return LPResult(x, 0, int(res.nit), str(res.message), np.maximum(duals, 0.0))

    def _restricted(
        self, cost: np.ndarray, a_ub: Any, b_ub: np.ndarray, duals: np.ndarray
    ) -> LPResult | None:
        """Exact LP solve by a restricted problem and a pricing check (LP duality; e.g.
        Bertsimas and Tsitsiklis 1997, ch. 4 and 6): with multipliers lambda of the R coupling
        rows, each cohort's best arm minimizes cost_cj + lambda . a_cj. Cohorts with a clear best
        arm under warm multipliers (from a nearby problem) are fixed to it; the LP over the
        others gives new multipliers; if every fixed cohort's arm is still a minimizer of its
        reduced cost, primal and dual feasibility with complementary slackness hold, so the
        combined point is optimal for the full LP. Otherwise the offenders are freed and the
        loop repeats; None (fall back to the full LP) if it does not settle."""
        c, j = self.shape
        big = np.where(self.upper.reshape(c, j) > 0, 0.0, np.inf)
        cost2 = cost.reshape(c, j)
        a3 = a_ub.reshape(a_ub.shape[0], c, j)
        score = cost2 + np.einsum("r,rcj->cj", duals, a3) + big
        order = np.sort(score, axis=1)
        margin = order[:, 1] - order[:, 0] if j > 1 else np.full(c, np.inf)
        n_free = min(c, max(4 * a_ub.shape[0] + 32, c // 20))
        free = np.zeros(c, dtype=bool)
        free[np.argsort(margin)[:n_free]] = True
        tol = 1e-7 * max(1.0, float(np.abs(cost).max(initial=0.0)))  # HiGHS dual tolerance
        nit = 0
        for rounds in range(1, 9):
            fixed_arm = np.argmin(score, axis=1)
            fixed = ~free
            fx = np.flatnonzero(fixed)
            used = a3[:, fx, fixed_arm[fx]].sum(axis=1) if fx.size else np.zeros(a3.shape[0])
            fr = np.flatnonzero(free)
            cols = (fr[:, None] * j + np.arange(j)).ravel()
            res = self._linprog(
                cost[cols], a_ub[:, cols], b_ub - used, simplex_rows(fr.size, j), self.upper[cols]
            )
            nit += int(res.nit)
            if res.status != 0 or res.x is None:
                if free.all():
                    return None
                free |= margin <= np.sort(margin)[min(c - 1, 2 * free.sum())]
                continue
            lam = np.maximum(-res.ineq_marginals, 0.0)
            score = cost2 + np.einsum("r,rcj->cj", lam, a3) + big
            best = score.min(axis=1)
            chosen = score[fx, fixed_arm[fx]]
            bad = fx[chosen > best[fx] + tol]
            if bad.size == 0:
                x = np.zeros((c, j))
                x[fx, fixed_arm[fx]] = 1.0
                x[fr] = np.clip(res.x.reshape(fr.size, j), 0.0, None)
                x[fr] /= x[fr].sum(axis=1, keepdims=True)
                return LPResult(x, 0, nit, str(res.message), lam, rounds)
            free[bad] = True
            score_margin = np.sort(score, axis=1)
            margin = score_margin[:, 1] - score_margin[:, 0] if j > 1 else margin
        return None


def simplex_rows(c: int, j: int) -> sp.csr_matrix:
    """(C, C J) sparse rows sum_j x[c, j] = 1."""
    return sp.csr_matrix(
        (np.ones(c * j), np.arange(c * j), np.arange(0, c * j + 1, j)), shape=(c, c * j)
    )


@dataclass
class LPOut:
    """What the LP solve returns, in `linprog`'s terms."""

    status: int  # 0 optimal, 2 infeasible, 3 unbounded, 4 solver trouble
    x: np.ndarray | None
    nit: int
    message: str
    ineq_marginals: np.ndarray  # (R,) duals of the A_ub rows (<= 0 for a minimization)


def solve_lp(
    cost: np.ndarray,
    a_ub: np.ndarray,
    b_ub: np.ndarray,
    a_eq: sp.csr_matrix,
    upper: np.ndarray,
    *,
    presolve: bool = False,
    force_linprog: bool = False,
) -> LPOut:
    """min cost . x subject to a_ub x <= b_ub, a_eq x = 1, 0 <= x <= upper, by the HiGHS dual
    simplex: through highspy (one column-wise model handed to the solver as it is) or, without
    it or when `force_linprog`, `scipy.optimize.linprog(method="highs-ds")`."""
    if HAVE_HIGHSPY and not force_linprog:
        return _solve_highspy(cost, a_ub, b_ub, a_eq, upper, presolve)
    k = a_ub.shape[0]
    res = linprog(
        cost,
        A_ub=a_ub if k else None,
        b_ub=b_ub if k else None,
        A_eq=a_eq,
        b_eq=np.ones(a_eq.shape[0]),
        bounds=np.column_stack([np.zeros(cost.size), upper]),
        method="highs-ds",
        options={"presolve": presolve},
    )
    marg = np.asarray(res.ineqlin.marginals) if k and res.x is not None else np.zeros(k)
    return LPOut(int(res.status), res.x, int(res.nit), str(res.message), marg)


_HIGHS = threading.local()  # one solver per thread, reused: a new model replaces the last one


def _highs(presolve: bool) -> Any:
    h = getattr(_HIGHS, "solver", None)
    if h is None:
        h = _highspy.Highs()
        # linprog(method="highs-ds")'s settings: the dual simplex, no output
        h.setOptionValue("output_flag", False)
        h.setOptionValue("solver", "simplex")
        h.setOptionValue("simplex_strategy", 1)
        _HIGHS.solver = h
    h.setOptionValue("presolve", "on" if presolve else "off")
    return h


def _colwise(a_ub: np.ndarray, a_eq: sp.csr_matrix) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Column-wise (start, index, value) of the rows [a_ub; a_eq]: the nonzeros of the dense
    a_ub, then a_eq's, each column's entries in row order (numpy only: scipy's sparse stacking
    cost more than the solve on these small LPs)."""
    k, n = a_ub.shape
    col_u, row_u = np.nonzero(a_ub.T)
    eq = a_eq.tocsr()
    row_e = k + np.repeat(np.arange(eq.shape[0]), np.diff(eq.indptr))
    col = np.concatenate([col_u, eq.indices])
    row = np.concatenate([row_u, row_e])
    val = np.concatenate([a_ub.T[col_u, row_u], eq.data]).astype(np.float64)
    order = np.lexsort((row, col))
    start = np.zeros(n + 1, dtype=np.int32)
    np.cumsum(np.bincount(col, minlength=n), out=start[1:])
    return start, row[order].astype(np.int32), val[order]


def _solve_highspy(
    cost: np.ndarray,
    a_ub: np.ndarray,
    b_ub: np.ndarray,
    a_eq: sp.csr_matrix,
    upper: np.ndarray,
    presolve: bool,
) -> LPOut:
    n, k, m = cost.size, a_ub.shape[0], a_eq.shape[0]
    start, index, value = _colwise(np.asarray(a_ub, dtype=np.float64).reshape(k, n), a_eq)
    h = _highs(presolve)
    h.passModel(
        n, k + m, int(index.size), int(_highspy.MatrixFormat.kColwise),
        int(_highspy.ObjSense.kMinimize), 0.0,
        np.ascontiguousarray(cost, dtype=np.float64), np.zeros(n),
        np.ascontiguousarray(upper, dtype=np.float64),
        np.concatenate([np.full(k, -np.inf), np.ones(m)]),
        np.concatenate([np.asarray(b_ub, dtype=np.float64), np.ones(m)]),
        start, index, value, np.zeros(n, dtype=np.int32),  # every column continuous
    )  # fmt: skip
    h.run()
    ms = h.getModelStatus()
    nit = int(h.getInfo().simplex_iteration_count)
    message = h.modelStatusToString(ms)
    status_of = {
        _highspy.HighsModelStatus.kOptimal: 0,
        _highspy.HighsModelStatus.kInfeasible: 2,
        _highspy.HighsModelStatus.kUnboundedOrInfeasible: 2,
        _highspy.HighsModelStatus.kUnbounded: 3,
    }
    status = status_of.get(ms, 4)
    if status != 0:
        return LPOut(status, None, nit, message, np.zeros(k))
    sol = h.getSolution()
    x = np.asarray(sol.col_value, dtype=np.float64)
    duals = np.asarray(sol.row_dual, dtype=np.float64)[:k]
    return LPOut(0, x, nit, message, duals)


def cut_row(lin: Linear, k: int, x0: np.ndarray, coef: float) -> tuple[np.ndarray, float] | None:
    """Tangent (Kelley 1960) cut of mu_k(x) + coef * sd_k(x) <= rhs_k at x0, as a row on x.

    sd_k is a norm of the affine map x -> x - b, so sd_k(x) >= grad sd_k(x0) . (x - b) for all x:
    the cut (p G_k + coef * grad) . x <= rhs_k + (p G_k + coef * grad) . b is a valid outer
    approximation, tight at x0. None when sd_k(x0) = 0 (the cone has no tangent there)."""
    d = x0 - lin.b
    pv = (lin.p[:, None] ** 2) * lin.V[k]
    sd = float(np.sqrt((d * d * pv).sum()))
    if sd <= 0:
        return None
    row = (lin.p[:, None] * lin.G[k] + coef * pv * d / sd).ravel()
    return row, float(lin.rhs[k] + row @ lin.b.ravel())


def best_reachable(lin: Linear, problem: Any, k: int) -> tuple[float, np.ndarray]:
    """The best (least harmful) exact lift of guardrail k that ANY allocation reaches, with that
    allocation. A single linear (or linear-fractional) objective over a product of simplices is
    minimized at a vertex, one arm per cohort, so this is the LP minimizing that guardrail alone
    solved in closed form; ratio metrics iterate Dinkelbach (1967) to the exact minimum ratio."""
    mom = problem.moments
    spec = problem.metric(lin.keys[k])
    harm = lin.harm[k]
    mu = np.where(lin.avail[..., None], mom.mean, 0.0)
    pos = {n: i for i, n in enumerate(mom.components)}
    c, j = lin.b.shape
    base = lin.base_values[spec.key]

    def vertex(coef: np.ndarray) -> np.ndarray:
        coef = np.where(lin.avail, coef, np.inf)
        x = np.zeros((c, j))
        x[np.arange(c), np.argmin(coef, axis=1)] = 1.0
        return x

    if spec.kind == "ratio":
        a, d = pos[spec.ratio_columns[0]], pos[spec.ratio_columns[1]]
        r = base
        for _ in range(100):
            x = vertex(harm * (mu[..., a] - r * mu[..., d]))
            r_new = metric_values(x, lin.p, mu, (spec,), mom.components)[spec.key]
            if abs(r_new - r) <= 1e-14 * max(1.0, abs(r)):
                break
            r = r_new
    else:
        x = vertex(harm * mu[..., pos[spec.key]])
    val = metric_values(x, lin.p, mu, (spec,), mom.components)[spec.key] - base
    return val, x
