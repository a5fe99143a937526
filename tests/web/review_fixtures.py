"""A hand-written review-page payload (the shape of apportion.usecases.review.review_page) for
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
    # the layout of apportion/optimize/report.py; every number in the guardrail's threshold unit
    "status": "complete",
    "metrics": [
        {
            "metric": "active_days",
            "role": "success",
            "lift": 0.214,
            "se": 0.031,
            "corrected_lift": 0.188,
            "interval": [0.127, 0.249],
        },
        {
            "metric": "abandon_rate",
            "role": "guardrail",
            "lift": 0.0042,
            "se": 0.0021,
            "corrected_lift": 0.0051,
            "interval": [0.0001, 0.0083],
            "threshold": 0.01,
            "unit": "absolute",
            "confidence": 0.95,
            "probability_holds": 0.997,
        },
        {
            "metric": "cancelled",
            "role": "guardrail",
            "lift": 0.0011,
            "se": 0.0019,
            "corrected_lift": 0.0014,
            "interval": [-0.0026, 0.0048],
            "threshold": 0.005,
            "unit": "absolute",
            "confidence": 0.95,
            "probability_holds": 0.962,
        },
        {
            "metric": "support_contacts",
            "role": "guardrail",
            "lift": 0.4,
            "se": 0.6,
            "corrected_lift": 0.6,
            "interval": [-0.8, 1.6],
            "threshold": 5.0,
            "unit": "relative",
            "confidence": 0.9,
            "probability_holds": 0.93,
        },
    ],
    "comparison": [
        {
            "plan": "arm 0 for everyone",
            "arm": 0,
            "available": True,
            "lifts": {
                "active_days": 0.0,
                "abandon_rate": 0.0,
                "cancelled": 0.0,
                "support_contacts": 0.0,
            },
            "holds": {"abandon_rate": True, "cancelled": True, "support_contacts": True},
        },
        {
            "plan": "arm 1 for everyone",
            "arm": 1,
            "available": True,
            "lifts": {
                "active_days": 0.061,
                "abandon_rate": 0.0031,
                "cancelled": -0.0004,
                "support_contacts": 0.2,
            },
            "holds": {"abandon_rate": True, "cancelled": True, "support_contacts": True},
        },
        {
            "plan": "arm 2 for everyone",
            "arm": 2,
            "available": True,
            "lifts": {
                "active_days": 0.092,
                "abandon_rate": 0.0182,
                "cancelled": 0.0021,
                "support_contacts": 1.1,
            },
            "holds": {"abandon_rate": False, "cancelled": True, "support_contacts": True},
        },
        {
            "plan": "arm 3 for everyone",
            "arm": 3,
            "available": True,
            "lifts": {
                "active_days": 0.118,
                "abandon_rate": 0.0044,
                "cancelled": 0.0009,
                "support_contacts": 0.7,
            },
            "holds": {"abandon_rate": True, "cancelled": True, "support_contacts": True},
        },
        {
            "plan": "best single arm meeting the guardrails",
            "arm": 3,
            "available": True,
            "lifts": {
                "active_days": 0.118,
                "abandon_rate": 0.0044,
                "cancelled": 0.0009,
                "support_contacts": 0.7,
            },
            "holds": {"abandon_rate": True, "cancelled": True, "support_contacts": True},
        },
        {
            "plan": "this plan",
            "available": True,
            "lifts": {
                "active_days": 0.214,
                "abandon_rate": 0.0042,
                "cancelled": 0.0011,
                "support_contacts": 0.4,
            },
            "holds": {"abandon_rate": True, "cancelled": True, "support_contacts": True},
        },
    ],
    "held_out": {
        "status": "complete",
        "folds": 5,
        "verdict": "verified",
        "metrics": {
            "active_days": {"lift": 0.2, "se": 0.04},
            "abandon_rate": {
                "lift": 0.004,
                "se": 0.0025,
                "threshold_absolute": 0.0125,
                "probability_holds": 0.9993,
            },
        },
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
            "guardrails": copy.deepcopy(GUARDRAILS),
            "method": "chance",
            "allocation": "mixed",
            "baseline": "control",
            "holdout": {"share": 0.05, "arm": "five_min"},
            "notes": "Second try with the ratio guardrail",
        },
        "allocation": {
            "arms": list(ARMS),
            "matrix": [[c["arms"][a] for a in ARMS] for c in COHORTS],
            "cohorts": copy.deepcopy(COHORTS),  # a test may change them
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
