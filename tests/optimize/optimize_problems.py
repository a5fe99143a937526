"""Random allocation problems for the optimizer tests (synthetic numbers, not the demo scenario)."""

from __future__ import annotations

import numpy as np

from apportion.optimize.problem import AllocationProblem, Guardrail, control_allocation
from apportion.stats.estimates import CellMoments
from apportion.stats.table import MetricSpec


def random_problem(
    seed: int,
    n_cohorts: int = 6,
    n_arms: int = 3,
    n_guardrails: int = 2,
    *,
    units: int = 4000,
    ratio: bool = True,
    tight: float = 0.3,
) -> AllocationProblem:
    """Success `s` (mean, higher) and up to 5 guardrails: g_mean (lower), g_prop (lower),
    g_ratio (ratio num/den, lower), g_up (higher-is-better mean), g_rel (relative, lower).
    Arm effects are drawn so that the unconstrained optimum breaks the guardrails; thresholds
    are `tight` times the harm of the success-greedy plan."""
    rng = np.random.default_rng(seed)
    c, j = n_cohorts, n_arms
    comps = ["s", "g_mean", "g_prop", "num", "den", "g_up", "g_rel"]
    q = len(comps)
    base = np.array([3.0, 1.0, 0.1, 0.6, 5.0, 2.0, 0.5])
    mean = np.broadcast_to(base, (c, j, q)).copy()
    mean[:, 1:, :] += rng.normal(0.0, 1.0, (c, j - 1, q)) * np.array(
        [0.2, 0.1, 0.02, 0.06, 0.3, 0.1, 0.05]
    )
    mean[..., 2] = np.clip(mean[..., 2], 0.01, 0.99)
    sd = np.array([1.5, 1.0, 0.3, 0.8, 2.0, 1.0, 0.7])
    corr = np.eye(q)
    corr[3, 4] = corr[4, 3] = 0.6
    corr[0, 5] = corr[5, 0] = 0.3
    cov = np.broadcast_to(corr * np.outer(sd, sd), (c, j, q, q)).copy()
    n = rng.integers(units // 2, units * 2, size=(c, j))
    moments = CellMoments(tuple(comps), n.astype(np.int64), mean, cov)
    metrics = (
        MetricSpec("s", "mean", "higher"),
        MetricSpec("g_mean", "mean", "lower"),
        MetricSpec("g_prop", "proportion", "lower"),
        MetricSpec("g_ratio", "ratio", "lower", "num", "den"),
        MetricSpec("g_up", "mean", "higher"),
        MetricSpec("g_rel", "mean", "lower"),
    )
    shares = rng.dirichlet(np.full(c, 3.0))
    keys = ["g_mean", "g_prop", "g_ratio", "g_up", "g_rel"]
    if not ratio:
        keys.remove("g_ratio")
    keys = keys[:n_guardrails]
    # greedy success plan: best arm per cohort; thresholds a fraction of its harm (or a floor)
    greedy = np.zeros((c, j))
    greedy[np.arange(c), mean[..., 0].argmax(axis=1)] = 1.0
    b = control_allocation(c, j)
    from apportion.optimize.values import metric_values

    vg = metric_values(greedy, shares, mean, metrics, tuple(comps))
    vb = metric_values(b, shares, mean, metrics, tuple(comps))
    guardrails = []
    for key in keys:
        lift = vg[key] - vb[key]
        if key == "g_up":
            guardrails.append(Guardrail(key, -abs(lift) * tight - 1e-4))
        elif key == "g_rel":
            guardrails.append(
                Guardrail(key, 100 * abs(lift) / vb[key] * tight + 0.01, "relative", 0.9)
            )
        else:
            guardrails.append(Guardrail(key, abs(lift) * tight + 1e-4))
    return AllocationProblem(shares, moments, metrics, "s", tuple(guardrails), b)
