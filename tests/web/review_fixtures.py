"""A hand-written review-page payload (the shape of service.usecases.review.review_page) for
rendering tests that need no database. Numbers are invented for the page, not computed."""

from __future__ import annotations

import copy
from typing import Any

ARMS = ["five_min", "ten_min", "fifteen_min", "adaptive"]

COHORTS = [
    {
        "id": 0,
        "rule": "level = beginner and tenure_days < 30",
        "share": 0.18,
        "arms": {"five_min": 1.0, "ten_min": 0.0, "fifteen_min": 0.0, "adaptive": 0.0},
    },
    {
        "id": 1,
        "rule": "level = beginner and tenure_days >= 30",
        "share": 0.22,
        "arms": {"five_min": 0.0, "ten_min": 0.62, "fifteen_min": 0.0, "adaptive": 0.38},
    },
    {
        "id": 2,
        "rule": "level in {intermediate, advanced} and streak_days < 7",
        "share": 0.35,
        "arms": {"five_min": 0.0, "ten_min": 0.0, "fifteen_min": 0.0, "adaptive": 1.0},
    },
    {
        "id": 3,
        "rule": "level in {intermediate, advanced} and streak_days >= 7",
        "share": 0.25,
        "arms": {"five_min": 0.004, "ten_min": 0.0, "fifteen_min": 0.996, "adaptive": 0.0},
    },
]

GUARDRAILS = [
    {"metric": "abandon_rate", "threshold": 0.01, "unit": "absolute", "confidence": 0.95},
    {"metric": "cancelled", "threshold": 0.005, "unit": "absolute", "confidence": 0.95},
    {"metric": "support_contacts", "threshold": 5.0, "unit": "relative", "confidence": 0.9},
]

METRICS = {
    "active_days": {"key": "active_days", "kind": "mean", "direction": "higher"},
    "abandon_rate": {
        "key": "abandon_rate",
        "kind": "ratio",
        "direction": "lower",
        "numerator": "lessons_abandoned",
        "denominator": "lessons_started",
    },
    "cancelled": {"key": "cancelled", "kind": "proportion", "direction": "lower"},
    "support_contacts": {"key": "support_contacts", "kind": "mean", "direction": "lower"},
}

REPORT: dict[str, Any] = {
    "status": "complete",
    "metrics": {
        "active_days": {
            "role": "success",
            "projected": 0.214,
            "se": 0.031,
            "corrected": 0.188,
            "interval": [0.153, 0.275],
        },
        "abandon_rate": {
            "role": "guardrail",
            "projected": 0.0042,
            "se": 0.0021,
            "corrected": 0.0051,
            "interval": [0.0001, 0.0083],
            "threshold": 0.01,
            "p_holds": 0.997,
        },
        "cancelled": {
            "role": "guardrail",
            "projected": 0.0011,
            "se": 0.0019,
            "corrected": 0.0014,
            "interval": [-0.0026, 0.0048],
            "threshold": 0.005,
            "p_holds": 0.962,
        },
        "support_contacts": {
            "role": "guardrail",
            "projected": 0.004,
            "se": 0.006,
            "corrected": 0.006,
            "interval": [-0.008, 0.016],
            "threshold": 0.0172,
            "p_holds": 0.93,
        },
    },
    "comparison": [
        {
            "label": "five_min",
            "kind": "arm",
            "safe": True,
            "lifts": {
                "active_days": 0.0,
                "abandon_rate": 0.0,
                "cancelled": 0.0,
                "support_contacts": 0.0,
            },
        },
        {
            "label": "ten_min",
            "kind": "arm",
            "safe": True,
            "lifts": {
                "active_days": 0.061,
                "abandon_rate": 0.0031,
                "cancelled": -0.0004,
                "support_contacts": 0.002,
            },
        },
        {
            "label": "fifteen_min",
            "kind": "arm",
            "safe": False,
            "lifts": {
                "active_days": 0.092,
                "abandon_rate": 0.0182,
                "cancelled": 0.0021,
                "support_contacts": 0.011,
            },
        },
        {
            "label": "adaptive",
            "kind": "arm",
            "safe": True,
            "lifts": {
                "active_days": 0.118,
                "abandon_rate": 0.0044,
                "cancelled": 0.0009,
                "support_contacts": 0.007,
            },
        },
        {
            "label": "adaptive",
            "kind": "best_safe",
            "safe": True,
            "lifts": {
                "active_days": 0.118,
                "abandon_rate": 0.0044,
                "cancelled": 0.0009,
                "support_contacts": 0.007,
            },
        },
        {
            "label": "plan",
            "kind": "plan",
            "safe": True,
            "lifts": {
                "active_days": 0.214,
                "abandon_rate": 0.0042,
                "cancelled": 0.0011,
                "support_contacts": 0.004,
            },
        },
    ],
    "held_out": {
        "active_days": {"lift": {"ipw": 0.19, "ipw_se": 0.05, "dr": 0.2, "dr_se": 0.04}},
        "abandon_rate": {"lift": {"ipw": 0.005, "ipw_se": 0.003, "dr": 0.004, "dr_se": 0.0025}},
    },
    "solution": {
        "objective": 0.214,
        "guardrails": [],
        "fractional_cohorts": 1,
        "binding": ["abandon_rate"],
    },
}


def version(
    status: str = "draft", *, author: str = "t-analyst", live: int | None = 1
) -> dict[str, Any]:
    v = {
        "plan": "lesson-length",
        "version": 2,
        "status": status,
        "live": status == "active",
        "model_id": 4,
        "author": author,
        "created_at": "2026-03-02T09:14:05.123+00:00",
        "decided_by": None,
        "decided_at": None,
        "decision_reason": None,
        "content_hash": "ab" * 32,
        "spec": {
            "experiment": "lesson-length",
            "success_metric": "active_days",
            "guardrails": GUARDRAILS,
            "method": "chance",
            "allocation": "mixed",
            "baseline": "control",
            "holdout": {"share": 0.05, "arm": "five_min"},
            "notes": "Second try with the ratio guardrail",
        },
        "allocation": {
            "arms": ARMS,
            "matrix": [[c["arms"][a] for a in ARMS] for c in COHORTS],
            "cohorts": COHORTS,
        },
        "report": copy.deepcopy(REPORT),
        "diff": None
        if live is None
        else {
            "live_version": live,
            "members": 20000,
            "share_changed": 0.41,
            "cohorts": [
                {
                    "id": c["id"],
                    "rule": c["rule"],
                    "members": int(c["share"] * 20000),
                    "share_changed": s,
                }
                for c, s in zip(COHORTS, [0.0, 0.62, 0.55, 0.4], strict=True)
            ],
        },
    }
    return v


def page(status: str = "draft", **kw: Any) -> dict[str, Any]:
    return {
        "version": version(status, **kw),
        "plan": {
            "plan": "lesson-length",
            "live_version": 1,
            "revision": 3,
            "activations": [{"version": 1, "revision": 1, "kind": "activate"}],
        },
        "metrics": copy.deepcopy(METRICS),
        "history": [
            {
                "id": 12,
                "at": "2026-03-02T09:14:05+00:00",
                "actor_name": "t-analyst",
                "actor_role": "analyst",
                "action": "plan.draft",
                "reason": "Second try with the ratio guardrail",
                "payload": {},
            },
        ],
        "watch": None,
    }
