"""Small builders shared by API tests: a compact experiment and its CSV rows."""

from __future__ import annotations

import numpy as np

from service.config import Settings

EXPERIMENT = {
    "key": "checkout-copy",
    "name": "Checkout copy",
    "arms": [
        {"key": "control", "share": 0.5},
        {"key": "bold", "share": 0.25},
        {"key": "calm", "share": 0.25},
    ],
    "control": "control",
    "metrics": [
        {"key": "spend", "kind": "mean", "direction": "higher"},
        {"key": "refund", "kind": "proportion", "direction": "lower"},
        {
            "key": "abandon_rate",
            "kind": "ratio",
            "direction": "lower",
            "numerator": "abandoned",
            "denominator": "started",
        },
    ],
    "features": [{"key": "age_days", "kind": "numeric"}, {"key": "plan", "kind": "categorical"}],
}


def rows_csv(n: int = 400, seed: int = 1, arms=None) -> bytes:  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(seed)
    arm = (
        arms
        if arms is not None
        else rng.choice(["control", "bold", "calm"], size=n, p=[0.5, 0.25, 0.25])
    )
    lines = ["unit_id,arm,age_days,plan,spend,refund,abandoned,started"]
    for i in range(n):
        started = int(rng.integers(1, 6))
        lines.append(
            f"u{i},{arm[i]},{rng.integers(1, 400)},{rng.choice(['free', 'pro'])},{rng.gamma(2, 10):.3f},"
            f"{int(rng.random() < 0.1)},{int(rng.integers(0, started + 1))},{started}"
        )
    return ("\n".join(lines) + "\n").encode()


def make_settings(db_url: str, **overrides: object) -> Settings:
    base: dict[str, object] = {
        "database_url": db_url,
        "poll_interval_seconds": 0.2,
        "log_level": "WARNING",
        "db_pool_size": 10,
    }
    base.update(overrides)
    return Settings(**base)  # type: ignore[arg-type]
