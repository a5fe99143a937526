"""Allocation plans from per-cohort estimates: numpy/scipy only.

problem.py   Guardrail, AllocationProblem, validate_problem, baseline_allocation, build_problem
solve.py     solve(problem, method, allocation) -> Solution; Infeasible with best reachable values
report.py    impact_report(problem, solution) -> dict (optimizer's-curse correction, comparisons)
linear.py    the linear form (ratio guardrails exact, ratio success linearized), lift variances
lp.py        LP/MILP (HiGHS), restricted re-solves with warm multipliers, tangent cuts
chance.py    cone (chance / normal-CVaR) constraints by Kelley cuts
stochastic.py CVaR guardrails by cooperative stochastic approximation (Lan and Zhou 2020)
simplex.py   projection onto a product of simplices (Duchi et al. 2008)
"""
