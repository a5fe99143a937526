"""The numbers of the guardrail watch: post-launch uploads merged per member (the later row wins),
their categorical levels re-coded to one list, and each metric's plan-minus-holdout difference
with an always-valid confidence sequence (stats/sequential.py) and the guardrail's status.

Every guardrail's interval uses alpha = (1 - confidence) / K over the K guardrails (Bonferroni),
so the statuses hold jointly under continuous monitoring.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from apportion.stats.estimates import cell_moments, metric_estimates
from apportion.stats.sequential import absolute_threshold, difference_interval, guardrail_status
from apportion.stats.table import UnitTable


def merge_uploads(tables: list[tuple[UnitTable, np.ndarray]]) -> tuple[UnitTable, np.ndarray, int]:
    """Concatenate uploads; keep the last row of each member. Returns (table, holdout, replaced)."""
    first = tables[0][0]
    ids = np.concatenate([t.unit_ids for t, _ in tables])
    order = np.arange(ids.shape[0])
    # the last occurrence of each id wins: unique on the reversed ids gives last positions
    _, last_rev = np.unique(ids[::-1], return_index=True)
    keep = np.sort(order.shape[0] - 1 - last_rev)
    replaced = int(ids.shape[0] - keep.shape[0])
    feature_values = {
        k: np.concatenate([t.feature_values[k] for t, _ in tables])[keep]
        for k in first.feature_values
    }
    columns = {k: np.concatenate([t.columns[k] for t, _ in tables])[keep] for k in first.columns}
    holdout = np.concatenate([h for _, h in tables])[keep]
    merged = UnitTable(
        unit_ids=ids[keep],
        arm=np.zeros(keep.shape[0], dtype=np.int64),
        arm_keys=first.arm_keys,
        design_shares=first.design_shares,
        features=first.features,
        feature_values=feature_values,
        metrics=first.metrics,
        columns=columns,
    )
    return merged, holdout, replaced


def harmonize_levels(tables: list[UnitTable]) -> list[UnitTable]:
    """Uploads discover categorical levels separately; re-code every upload to one level list."""
    if len(tables) == 1:
        return tables
    out = []
    union = {
        f.key: sorted({lv for t in tables for lv in t.feature(f.key).levels})
        for f in tables[0].features
        if f.kind == "categorical"
    }
    for t in tables:
        fv = dict(t.feature_values)
        feats = []
        for f in t.features:
            if f.kind == "categorical":
                levels = union[f.key]
                remap = np.array([levels.index(lv) for lv in f.levels] + [-1], dtype=np.int32)
                codes = fv[f.key]
                fv[f.key] = remap[np.where(codes < 0, len(f.levels), codes)]
                feats.append(type(f)(f.key, f.kind, tuple(levels)))
            else:
                feats.append(f)
        out.append(
            UnitTable(
                t.unit_ids,
                t.arm,
                t.arm_keys,
                t.design_shares,
                tuple(feats),
                fv,
                t.metrics,
                t.columns,
            )
        )
    return out


def compare_with_holdout(
    table: UnitTable, holdout: np.ndarray, spec: dict[str, Any], *, horizon: int
) -> list[dict[str, Any]]:
    """Per metric (success first, then guardrails): interval of plan - holdout, threshold and status."""
    group = np.where(holdout, 0, 1)
    moments = cell_moments(
        np.zeros(table.n, dtype=np.int64),
        1,
        group,
        2,
        table.component_matrix(),
        table.component_names(),
    )
    base = metric_estimates(moments, table.metrics)
    guardrails = spec["guardrails"]
    k = max(1, len(guardrails))
    out: list[dict[str, Any]] = []
    rows = [(spec["success_metric"], None)] + [(g["metric"], g) for g in guardrails]
    for key, g in rows:
        metric = table.metric(key)
        conf = float(g["confidence"]) if g else 0.95
        alpha = (1 - conf) / k if g else 1 - conf
        iv = difference_interval(moments, metric, alpha=alpha, horizon=horizon)
        m_index = [m.key for m in table.metrics].index(key)
        holdout_value = float(base.mean[0, 0, m_index])
        item: dict[str, Any] = {
            "metric": key,
            "role": "guardrail" if g else "success",
            "estimate": _finite(iv.estimate),
            "lower": _finite(iv.lower),
            "upper": _finite(iv.upper),
            "n_plan": iv.n_plan,
            "n_holdout": iv.n_holdout,
            "alpha": alpha,
            "holdout_value": _finite(holdout_value),
            "status": None,
            "threshold": None,
        }
        if g:
            t_abs = absolute_threshold(
                float(g["threshold"]), g.get("unit", "absolute"), holdout_value
            )
            item["threshold"] = t_abs
            item["status"] = (
                guardrail_status(iv, t_abs, metric.direction)
                if np.isfinite(iv.lower)
                else "inconclusive"
            )
        out.append(item)
    return out


def _finite(x: float) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None
