"""Small builders shared by API tests: a compact experiment and its CSV rows."""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass

import numpy as np

from apportion.config import Settings

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


def reset_postgres(url: str) -> str:
    """Empty the `public` schema of a throwaway PostgreSQL database; returns the psycopg URL."""
    from sqlalchemy import create_engine, text

    if url.startswith("postgresql://"):
        url = "postgresql+psycopg://" + url[len("postgresql://") :]
    eng = create_engine(url, isolation_level="AUTOCOMMIT")
    with eng.connect() as c:
        c.execute(text("DROP SCHEMA IF EXISTS public CASCADE"))
        c.execute(text("CREATE SCHEMA public"))
    eng.dispose()
    return url


def _blob_dir(db_url: str) -> str:
    """A blob store beside a SQLite test database, else a fresh temporary directory."""
    if db_url.startswith("sqlite:///") and db_url != "sqlite:///:memory:":
        return os.path.join(os.path.dirname(db_url[len("sqlite:///") :]), "blobs")
    return tempfile.mkdtemp(prefix="apportion-blobs-")


def make_settings(db_url: str, **overrides: object) -> Settings:
    base: dict[str, object] = {
        "database_url": db_url,
        "blob_uri": _blob_dir(db_url),
        "poll_interval_seconds": 0.2,
        "log_level": "WARNING",
        "db_pool_size": 10,
        # each draft's cross-fitted held-out job refits its model per fold; the tests that read
        # held-out figures turn it on (tests/api/test_held_out.py)
        "held_out_folds": 0,
    }
    base.update(overrides)
    return Settings(**base)  # type: ignore[arg-type]


def wait_job(client, keys, job_url: str, timeout: float = 60.0) -> dict:  # type: ignore[no-untyped-def]
    """The client library's job waiter over `client` (a TestClient or an httpx.Client), reading
    as the reader key; polls every 0.05 s at first, at most every 0.2 s."""
    from apportion.client import ApportionClient, Backoff, JobTimeout

    api = ApportionClient(key=keys.reader, http=client)
    try:
        return api.wait(job_url, timeout=timeout, backoff=Backoff(first=0.05, maximum=0.2))
    except JobTimeout as exc:
        raise AssertionError(f"job {job_url} did not finish in {timeout} s") from exc


def scenario_model(
    client, keys, *, n: int = 20000, seed: int = 1, params: dict | None = None
) -> int:  # type: ignore[no-untyped-def]
    """Declare the invented scenario, upload `n` learners and fit a causal tree; returns the model id."""
    from apportion.demo.scenario import experiment_declaration, simulate, to_csv_bytes

    decl = experiment_declaration()
    r = client.post("/v1/experiments", json=decl, headers=keys.h(keys.analyst))
    assert r.status_code in (201, 409), r.text
    r = client.post(
        f"/v1/experiments/{decl['key']}/readouts",
        content=to_csv_bytes(simulate(n, seed=seed)),
        headers={**keys.h(keys.analyst), "content-type": "text/csv"},
    )
    assert r.status_code in (200, 201), r.text
    version = r.json()["version"]
    body = {
        "readout_version": version,
        "method": "causal_tree",
        "params": params or {"max_depth": 3, "min_units_per_arm": 100},
    }
    r = client.post(
        f"/v1/experiments/{decl['key']}/models", json=body, headers=keys.h(keys.analyst)
    )
    assert r.status_code == 202, r.text
    job = wait_job(client, keys, r.json()["job"])
    assert job["status"] == "done", job
    return int(r.json()["model_id"])


def draft_plan(client, keys, model_id: int, plan: str = "lesson-length", **overrides) -> dict:  # type: ignore[no-untyped-def]
    from apportion.demo.scenario import GUARDRAILS, SUCCESS

    body = {
        "model_id": model_id,
        "success_metric": SUCCESS,
        "guardrails": GUARDRAILS,
        "method": "chance",
        "draws": 20,
        "holdout": {"share": 0.1},
    }
    body.update(overrides)
    r = client.post(f"/v1/plans/{plan}/versions", json=body, headers=keys.h(keys.analyst))
    assert r.status_code == 201, r.text
    return r.json()


@dataclass
class Keys:
    """One secret per role (approver2 is a second approver, for the author-may-not-approve rule)."""

    admin: str
    approver: str
    approver2: str
    analyst: str
    reader: str

    @staticmethod
    def h(secret: str) -> dict[str, str]:
        return {"Authorization": f"Bearer {secret}"}


def make_keys(services, prefix: str = "t") -> Keys:  # type: ignore[no-untyped-def]
    """Keys of every role made directly in the app's database, named `{prefix}-{role}`."""
    from apportion.usecases.auth import SYSTEM, create_key

    made = {}
    for name in ("admin", "approver", "approver2", "analyst", "reader"):
        _, made[name] = create_key(
            services.db,
            name=f"{prefix}-{name}",
            owner=f"{prefix}-{name}@people",
            role=name.rstrip("2"),
            actor=SYSTEM,
        )
    services.keys.refresh()
    return Keys(**made)
