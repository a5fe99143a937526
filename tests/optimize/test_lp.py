"""Deterministic plans: the LP against scipy on independently built matrices, the MILP against
brute force, and the vertex counting bound."""

from __future__ import annotations

import itertools
import subprocess
import sys

import numpy as np
import pytest
from optimize.optimize_problems import random_problem
from scipy.optimize import linprog

from apportion.optimize.problem import AllocationProblem
from apportion.optimize.solve import solve


def independent_lp(problem: AllocationProblem):
    """The allocation LP written out directly from the moments (no apportion.optimize code):
    rows for mean metrics sum_c p_c sum_j x_cj m_cj; a ratio guardrail as
    N(x) - (R(b) + t) D(x) <= 0; higher-is-better rows flipped; relative
    thresholds t/100 * M(b)."""
    mom = problem.moments
    p, b = problem.shares, problem.baseline
    c, j, _ = mom.mean.shape
    pos = {n: i for i, n in enumerate(mom.components)}
    tot = lambda x, comp: float(np.sum(p[:, None] * x * mom.mean[..., pos[comp]]))  # noqa: E731
    coef = lambda comp: (p[:, None] * mom.mean[..., pos[comp]]).ravel()  # noqa: E731
    rows, rhs = [], []
    for g in problem.guardrails:
        m = problem.metric(g.metric)
        sign = 1.0 if m.direction == "lower" else -1.0
        if m.kind == "ratio":
            rb = tot(b, m.numerator) / tot(b, m.denominator)
            t = g.threshold / 100 * rb if g.unit == "relative" else g.threshold
            r = rb + t
            row = coef(m.numerator) - r * coef(m.denominator)
            rows.append(sign * row)
            rhs.append(0.0)
        else:
            mb = tot(b, m.key)
            t = g.threshold / 100 * mb if g.unit == "relative" else g.threshold
            rows.append(sign * coef(m.key))
            rhs.append(sign * (mb + t))
    a_eq = np.kron(np.eye(c), np.ones(j))
    res = linprog(
        -coef(problem.success),
        A_ub=np.array(rows),
        b_ub=np.array(rhs),
        A_eq=a_eq,
        b_eq=np.ones(c),
        bounds=(0, 1),
        method="highs",
    )
    assert res.status == 0
    return -res.fun - tot(b, problem.success)


@pytest.mark.parametrize("seed", range(6))
def test_deterministic_matches_scipy_linprog_on_independent_matrices(seed):
    # reference: scipy.optimize.linprog (HiGHS) on matrices built in this test from the moments
    problem = random_problem(seed, n_cohorts=7, n_arms=4, n_guardrails=5)
    sol = solve(problem, "deterministic")
    ref = independent_lp(problem)
    # tolerance: the tie-break term weighs 1e-6 of the largest cost coefficient per cohort
    assert sol.objective == pytest.approx(ref, rel=2e-5, abs=1e-9)
    for row in sol.guardrail_values:
        sign = -1.0 if row["guardrail"] == "g_up" else 1.0
        assert sign * row["lift"] <= sign * row["threshold"] + 1e-9


@pytest.mark.parametrize("seed", range(4))
def test_pure_equals_brute_force_enumeration(seed):
    # reference: enumeration of all J^C one-arm-per-cohort allocations (exhaustive search)
    problem = random_problem(100 + seed, n_cohorts=5, n_arms=3, n_guardrails=3)
    sol = solve(problem, "deterministic", "pure")
    c, j = problem.baseline.shape
    p, mom = problem.shares, problem.moments
    pos = {n: i for i, n in enumerate(mom.components)}
    base = {}
    best = -np.inf

    def value(x, key):
        m = problem.metric(key)
        if m.kind == "ratio":
            num = np.sum(p[:, None] * x * mom.mean[..., pos[m.numerator]])
            den = np.sum(p[:, None] * x * mom.mean[..., pos[m.denominator]])
            return num / den
        return np.sum(p[:, None] * x * mom.mean[..., pos[key]])

    for m in problem.metrics:
        base[m.key] = value(problem.baseline, m.key)
    for arms in itertools.product(range(j), repeat=c):
        x = np.zeros((c, j))
        x[np.arange(c), arms] = 1.0
        ok = True
        for g in problem.guardrails:
            m = problem.metric(g.metric)
            lift = value(x, g.metric) - base[g.metric]
            t = g.threshold / 100 * base[g.metric] if g.unit == "relative" else g.threshold
            if (lift > t + 1e-12) if m.direction == "lower" else (lift < t - 1e-12):
                ok = False
                break
        if ok:
            best = max(best, value(x, problem.success) - base[problem.success])
    assert sol.fractional_cohorts == 0
    assert set(np.unique(sol.allocation)) <= {0.0, 1.0}
    assert sol.objective == pytest.approx(best, rel=1e-6, abs=1e-12)


def test_vertex_has_at_most_as_many_fractional_cohorts_as_binding_guardrails():
    # Bertsimas and Tsitsiklis (1997) ch. 2, basic feasible solutions: with slacks
    # the LP has C + K equality rows, so a vertex has at most C + K positive variables; each
    # non-binding guardrail uses one (its slack) and each cohort at least one x, which leaves at
    # most K_binding cohorts with more than one positive arm.
    mixed_seen = 0
    for seed in range(60):
        problem = random_problem(
            1000 + seed,
            n_cohorts=12,
            n_arms=4,
            n_guardrails=1 + seed % 5,
            tight=0.1 + 0.1 * (seed % 4),
        )
        sol = solve(problem, "deterministic")
        assert sol.fractional_cohorts <= len(sol.binding), seed
        mixed_seen += sol.fractional_cohorts
    assert mixed_seen > 0  # the bound was exercised, not only met by pure vertices


def test_tie_break_prefers_control():
    # common practice: with arms identical to control, the plan stays on control
    problem = random_problem(7, n_cohorts=4, n_arms=3, n_guardrails=2)
    mom = problem.moments
    mean = mom.mean.copy()
    mean[:, 1:, :] = mean[:, :1, :]
    same = type(mom)(mom.components, mom.n, mean, mom.cov)
    tied = AllocationProblem(
        problem.shares, same, problem.metrics, "s", problem.guardrails, problem.baseline
    )
    sol = solve(tied, "deterministic")
    np.testing.assert_array_equal(sol.allocation[:, 0], np.ones(4))


@pytest.mark.parametrize("seed", range(16))
def test_solve_lp_agrees_with_a_plain_scipy_linprog_call(seed):
    # Reference: scipy.optimize.linprog(method="highs-ds") called directly on dense matrices
    # built here (scipy). The solver path the plans use (highspy's model handed to HiGHS, or
    # linprog where highspy is missing) must give the same optimum and the same duals of the
    # guardrail rows; tolerances are HiGHS's default primal and dual feasibility tolerances
    # (1e-7) scaled by the problem's size. Random problems: 3 to 40 cohorts, 2 to 5 arms, 1 to 6
    # coupling rows, some cells unavailable; with these seeds 3 of the 16 are infeasible and the
    # other 13 all have a binding row (a nonzero dual).
    from apportion.optimize.lp import HAVE_HIGHSPY, simplex_rows, solve_lp

    rng = np.random.default_rng(seed)
    c, j, k = int(rng.integers(3, 41)), int(rng.integers(2, 6)), int(rng.integers(1, 7))
    n = c * j
    cost = rng.standard_normal(n)
    a_ub = rng.standard_normal((k, n))
    b_ub = rng.normal(-1.0, 1.0, k) * np.sqrt(c)
    upper = (rng.random(n) > 0.15).astype(np.float64)
    upper.reshape(c, j)[:, 0] = 1.0  # every cohort keeps control
    a_eq = np.kron(np.eye(c), np.ones((1, j)))
    want = linprog(cost, A_ub=a_ub, b_ub=b_ub, A_eq=a_eq,
                   b_eq=np.ones(c), bounds=list(zip(np.zeros(n), upper, strict=True)),
                   method="highs-ds")  # fmt: skip
    for force in (False, True) if HAVE_HIGHSPY else (True,):
        got = solve_lp(cost, a_ub, b_ub, simplex_rows(c, j), upper, force_linprog=force)
        assert (got.status == 0) == (want.status == 0), (got.message, want.message)
        if want.status != 0:
            assert got.x is None
            continue
        assert got.x is not None
        tol = 1e-7 * n
        assert abs(cost @ got.x - want.fun) <= tol * max(1.0, abs(want.fun))
        np.testing.assert_allclose(a_eq @ got.x, 1.0, atol=tol)
        assert (got.x >= -tol).all() and (got.x <= upper + tol).all()
        assert (a_ub @ got.x <= b_ub + tol).all()
        np.testing.assert_allclose(got.ineq_marginals, want.ineqlin.marginals, atol=1e-6)


def test_solving_prints_nothing_on_standard_output():
    # HiGHS prints a banner on descriptor 1 when a process makes its first solver; a server's
    # stdout is a JSON-lines log and a bench's is one JSON line, so a solve must print nothing
    # (a fresh process, since this one has made its solver already).
    code = (
        "import numpy as np, scipy.sparse as sp\n"
        "from apportion.optimize.lp import solve_lp\n"
        "out = solve_lp(np.array([-1.0, -2.0]), np.array([[0.0, 1.0]]), np.array([0.5]),\n"
        "               sp.csr_matrix(np.ones((1, 2))), np.ones(2))\n"
        "assert out.status == 0, out\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr
    assert done.stdout == "", done.stdout
