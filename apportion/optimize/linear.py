"""The problem in linear form: every metric becomes a linear functional of the
component means, so objective and guardrails are linear in the allocation x.

For a metric with component weights w (Q,), the cell coefficient is l[c, j] = w . mean[c, j] and
the variance of its estimate is v[c, j] = w' cov[c, j] w / n[c, j]. The lift of a plan is
sum_c p_c sum_j (x - b)[c, j] l[c, j] and, with independent cells, its variance is
sum_c p_c^2 sum_j (x - b)[c, j]^2 v[c, j]: the baseline's own noise is included and the shared
control cancels where x and b agree.

A ratio guardrail R(x) - R(b) <= t is exactly N(x) - r D(x) <= N(b) - r D(b) + t D(b) with
r = R(b) + t; dividing by D(b) puts it in the threshold's units, w = (e_num - r e_den) / D(b)
(r treated as fixed for the variance). A ratio success metric is linearized around the baseline,
w = (e_num - R(b) e_den) / D(b), the first-order (delta-method) lift.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import norm

from apportion.optimize.problem import AllocationProblem, available_cells
from apportion.optimize.values import metric_values
from apportion.stats.table import MetricSpec


@dataclass(frozen=True)
class Linear:
    """The linear form. Guardrail rows are oriented so that larger is harmful.

    p: (C,); b: (C, J) baseline; avail: (C, J) bool;
    obj: (C, J) success coefficients oriented so that larger is better; obj_var: (C, J);
    G: (K, C, J) harm-oriented guardrail coefficients; V: (K, C, J) their cell-mean variances;
    cellcov: (C, J, K, K) covariance of the K guardrail coefficients' estimates within a cell;
    rhs: (K,) allowed harm (>= 0, in the threshold's units, relative already converted);
    z: (K,) normal quantiles of the confidences; conf: (K,); keys: guardrail metric keys;
    W: (K, Q) component weights; w_obj: (Q,); base_values: metric values under b.
    """

    p: np.ndarray
    b: np.ndarray
    avail: np.ndarray
    obj: np.ndarray
    obj_var: np.ndarray
    obj_sign: float
    G: np.ndarray
    V: np.ndarray
    cellcov: np.ndarray
    rhs: np.ndarray
    z: np.ndarray
    conf: np.ndarray
    keys: tuple[str, ...]
    harm: np.ndarray
    unit_scale: np.ndarray  # (K,) converts an absolute lift into the threshold's unit
    W: np.ndarray
    w_obj: np.ndarray
    base_values: dict[str, float]

    @property
    def shape(self) -> tuple[int, int, int]:
        k, c, j = self.G.shape
        return c, j, k

    def harm_lift(self, x: np.ndarray) -> np.ndarray:
        """(K,) linearized harm-oriented guardrail lifts of plan x (threshold units)."""
        out: np.ndarray = np.einsum("c,kcj->k", self.p, (x - self.b)[None] * self.G)
        return out

    def harm_sd(self, x: np.ndarray) -> np.ndarray:
        """(K,) sd of the linearized guardrail lift estimates of plan x."""
        d = (self.p[:, None] * (x - self.b)) ** 2
        out: np.ndarray = np.sqrt(np.einsum("cj,kcj->k", d, self.V))
        return out

    def success_lift(self, x: np.ndarray) -> float:
        """Linearized success lift, oriented so that larger is better."""
        return float(np.einsum("c,cj->", self.p, (x - self.b) * self.obj))


def linearize(
    problem: AllocationProblem, mean: np.ndarray | None = None, *, with_cellcov: bool = True
) -> Linear:
    """Build the linear form; `mean` (C, J, Q) overrides the component means (bootstrap draws).
    `with_cellcov=False` skips the (C, J, K, K) within-cell covariances (only CSA's cell sampler
    needs them) and fills `cellcov` with an empty array."""
    mom = problem.moments
    avail = available_cells(mom)
    mean = mom.mean if mean is None else mean
    mu = np.where(avail[..., None], mean, 0.0)
    cov = np.where(avail[..., None, None], np.nan_to_num(mom.cov), 0.0)
    inv_n = np.where(avail, 1.0 / np.maximum(mom.n, 1), 0.0)
    p = np.asarray(problem.shares, dtype=np.float64)
    b = np.asarray(problem.baseline, dtype=np.float64)
    comps = mom.components
    pos = {name: i for i, name in enumerate(comps)}
    q = len(comps)
    base = metric_values(b, p, mu, problem.metrics, comps)
    tot_b = np.einsum("cj,cjq->q", p[:, None] * b, mu)

    def weights(m: MetricSpec, t_abs: float) -> np.ndarray:
        w = np.zeros(q)
        if m.kind == "ratio":
            a, d = pos[m.ratio_columns[0]], pos[m.ratio_columns[1]]
            r = base[m.key] + t_abs
            w[a], w[d] = 1.0 / tot_b[d], -r / tot_b[d]
        else:
            w[pos[m.key]] = 1.0
        return w

    s_spec = problem.metric(problem.success)
    w_obj = weights(s_spec, 0.0)
    obj_sign = 1.0 if s_spec.direction == "higher" else -1.0
    obj = obj_sign * (mu @ w_obj)
    obj_var = np.einsum("q,cjqr,r->cj", w_obj, cov, w_obj) * inv_n

    k = len(problem.guardrails)
    W = np.zeros((k, q))
    harm = np.zeros(k)
    rhs = np.zeros(k)
    unit_scale = np.ones(k)
    for i, g in enumerate(problem.guardrails):
        m = problem.metric(g.metric)
        t_abs = float(g.threshold)
        if g.unit == "relative":
            ref = abs(base[m.key])
            t_abs = g.threshold / 100.0 * ref
            unit_scale[i] = 100.0 / ref if ref > 0 else np.inf
        harm[i] = 1.0 if m.direction == "lower" else -1.0
        W[i] = harm[i] * weights(m, t_abs)
        rhs[i] = harm[i] * t_abs
    c, j = avail.shape
    G = (mu.reshape(c * j, q) @ W.T).T.reshape(k, c, j)
    wc = np.matmul(cov.reshape(c * j, q, q), W.T)  # (CJ, Q, K): cov W'
    V = (np.einsum("nqk,kq->kn", wc, W) * inv_n.reshape(-1)).reshape(k, c, j)
    cellcov = (
        (np.matmul(W[None], wc) * inv_n.reshape(-1, 1, 1)).reshape(c, j, k, k)
        if with_cellcov
        else np.empty((0,))
    )
    conf = np.array([g.confidence for g in problem.guardrails], dtype=np.float64)
    return Linear(
        p=p,
        b=b,
        avail=avail,
        obj=obj,
        obj_var=obj_var,
        obj_sign=obj_sign,
        G=G,
        V=V,
        cellcov=cellcov,
        rhs=np.maximum(rhs, 0.0),
        z=norm.ppf(conf) if k else np.zeros(0),
        conf=conf,
        keys=tuple(g.metric for g in problem.guardrails),
        harm=harm,
        unit_scale=unit_scale,
        W=W,
        w_obj=w_obj,
        base_values=base,
    )


def cvar_multiplier(conf: np.ndarray, tail: float | None = None) -> np.ndarray:
    """CVaR of N(mu, s^2) at level beta is mu + s * pdf(z_beta) / (1 - beta) (Rockafellar and
    Uryasev 2000, normal case). `tail` overrides 1 - beta; tail 1 gives the mean (multiplier 0)."""
    tails = (1.0 - conf) if tail is None else np.full_like(conf, tail)
    out = np.zeros_like(conf)
    inner = tails < 1.0
    out[inner] = norm.pdf(norm.ppf(1.0 - tails[inner])) / tails[inner]
    return out
