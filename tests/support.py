"""Small builders shared by API tests: a compact experiment and its CSV rows."""

from __future__ import annotations

import os
import tempfile
from dataclasses import dataclass

import numpy as np

from apportion.config import Settings
from apportion.stats.table import FeatureSpec, MetricSpec, UnitTable

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


PG_URL = os.environ.get("APPORTION_TEST_DATABASE_URL")


def _psycopg(url: str) -> str:
    if url.startswith("postgresql://"):
        return "postgresql+psycopg://" + url[len("postgresql://") :]
    return url


def worker_tag() -> str:
    """`gw0`, `gw1`, ... under pytest-xdist, else `main`: each worker's databases carry it, so two
    workers never share a PostgreSQL database."""
    return os.environ.get("PYTEST_XDIST_WORKER", "main")


def postgres_url(name: str) -> str:
    """APPORTION_TEST_DATABASE_URL with its database name replaced by `name`."""
    from sqlalchemy.engine import make_url

    assert PG_URL
    return make_url(_psycopg(PG_URL)).set(database=name).render_as_string(hide_password=False)


def recreate_postgres(name: str, template: str | None = None) -> str:
    """Drop database `name` (closing its leftover connections) and create it again, empty or as
    a copy of database `template` (PostgreSQL's CREATE DATABASE ... TEMPLATE copies the files, far
    cheaper than replaying the migrations); returns its URL. The administrative connection goes
    to the throwaway database of APPORTION_TEST_DATABASE_URL, which is never dropped."""
    from sqlalchemy import create_engine, text

    assert PG_URL
    eng = create_engine(_psycopg(PG_URL), isolation_level="AUTOCOMMIT")
    try:
        with eng.connect() as c:
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
            tail = f' TEMPLATE "{template}"' if template else ""
            c.execute(text(f'CREATE DATABASE "{name}"{tail}'))
    finally:
        eng.dispose()
    return postgres_url(name)


def drop_postgres(name: str) -> None:
    from sqlalchemy import create_engine, text

    assert PG_URL
    eng = create_engine(_psycopg(PG_URL), isolation_level="AUTOCOMMIT")
    try:
        with eng.connect() as c:
            c.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    finally:
        eng.dispose()


def reset_postgres(label: str = "db") -> str:
    """An empty PostgreSQL database of this worker's own (`<test db>_<worker>_<label>`)."""
    from sqlalchemy.engine import make_url

    assert PG_URL
    base = make_url(_psycopg(PG_URL)).database
    return recreate_postgres(f"{base}_{worker_tag()}_{label}")


# blob store of a database URL whose blobs do not sit beside it (cloned PostgreSQL databases)
BLOB_DIRS: dict[str, str] = {}


def _blob_dir(db_url: str) -> str:
    """A blob store beside a SQLite test database, else a fresh temporary directory."""
    if db_url in BLOB_DIRS:
        return BLOB_DIRS[db_url]
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
    as the reader key; polls every 0.05 s at first, at most every 0.2 s. The job's JSON."""
    from apportion.client import ApportionClient, Backoff, JobTimeout, as_json

    api = ApportionClient(key=keys.reader, http=client)
    try:
        job = api.wait(job_url, timeout=timeout, backoff=Backoff(first=0.05, maximum=0.2))
        return as_json(job)  # type: ignore[no-any-return]
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


def approve(
    client, keys, version: int, *, plan: str = "lesson-length", approver: str | None = None
) -> dict:  # type: ignore[no-untyped-def]
    """Approve `version` of `plan` with the first approver's key (not the author of a draft made by
    the analyst key); asserts the 200 and returns the version."""
    r = client.post(
        f"/v1/plans/{plan}/versions/{version}/approve",
        json={"reason": "reviewed"},
        headers=keys.h(approver or keys.approver),
    )
    assert r.status_code == 200, r.text
    return r.json()


def activate(
    client, keys, version: int, *, plan: str = "lesson-length", expected_revision: int | None = None
) -> dict:  # type: ignore[no-untyped-def]
    """Make approved `version` live; the expected revision is the plan's current one unless
    given. Asserts the 200 and returns the answer."""
    h = keys.h(keys.approver)
    if expected_revision is None:
        r = client.get(f"/v1/plans/{plan}", headers=h)
        assert r.status_code == 200, r.text
        expected_revision = r.json()["revision"]
    body = {"version": version, "reason": "go", "expected_revision": expected_revision}
    r = client.post(f"/v1/plans/{plan}/activate", json=body, headers=h)
    assert r.status_code == 200, r.text
    return r.json()


def launch(client, keys, *versions: int, plan: str = "lesson-length") -> dict:  # type: ignore[no-untyped-def]
    """Approve each of `versions` (drafted by the analyst key), then activate them in order, so
    the last one is live and the earlier ones are there to roll back to; returns the last
    activation's answer. Works with a TestClient and an httpx.Client alike."""
    assert versions
    for v in versions:
        approve(client, keys, v, plan=plan)
    out: dict = {}
    for v in versions:
        out = activate(client, keys, v, plan=plan)
    return out


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


# ---- a readout whose effect varies only by a feature declared not for personalization ---------
# (tests/stats/test_not_personalized.py and tests/engines/test_not_personalized.py)

AGE_BANDS = ("18-29", "30-49", "50+")
REASON = "protected attribute; legal review pending"


def effect_by_band_only(n: int = 8000, seed: int = 5, *, flagged: bool) -> UnitTable:
    """Two arms; treatment adds 1 sd of `score` in the band 50+ and takes 0.5 sd in the others
    (the best arm differs by band); `x` and `device` are noise. With `flagged`, `age_band` is
    declared not for personalization."""
    rng = np.random.default_rng(seed)
    arm = rng.integers(0, 2, n)
    band = rng.integers(0, 3, n).astype(np.int32)
    x = rng.normal(size=n)
    device = rng.integers(0, 2, n).astype(np.int32)
    score = rng.normal(size=n) + arm * np.where(band == 2, 1.0, -0.5)
    cost = rng.normal(size=n)
    features = (
        FeatureSpec("age_band", "categorical", AGE_BANDS, personalize=not flagged),
        FeatureSpec("x", "numeric"),
        FeatureSpec("device", "categorical", ("web", "app")),
    )
    return UnitTable(
        unit_ids=np.array([f"u{i}" for i in range(n)], dtype=object),
        arm=arm.astype(np.int64),
        arm_keys=("control", "treat"),
        design_shares=np.array([0.5, 0.5]),
        features=features,
        feature_values={"age_band": band, "x": x, "device": device},
        metrics=(MetricSpec("score", "mean"), MetricSpec("cost", "mean", "lower")),
        columns={"score": score, "cost": cost},
    )
