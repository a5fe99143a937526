"""Experiments and readouts through the HTTP API."""

from __future__ import annotations

import csv
import io

import numpy as np
import pytest
from fastapi.testclient import TestClient
from scipy import stats
from sqlalchemy import func, select
from support import EXPERIMENT, rows_csv

from apportion.store.tables import AuditEntry, Blob, Readout

CSV = {"content-type": "text/csv"}


def _declare(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert r.status_code == 201, r.text


def _counts(client: TestClient) -> tuple[int, int, int]:
    with client.app.state.services.db.read() as s:  # type: ignore[attr-defined]
        return (
            s.scalar(select(func.count()).select_from(Readout)),
            s.scalar(select(func.count()).select_from(AuditEntry)),
            s.scalar(select(func.count()).select_from(Blob)),
        )


def test_declare_and_get(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    got = client.get("/v1/experiments/checkout-copy", headers=keys.h(keys.reader)).json()
    assert got["control"] == "control" and got["readouts"] == [] and len(got["metrics"]) == 3


def test_duplicate_key_is_409(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    r = client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
    assert r.status_code == 409 and "already exists" in r.json()["detail"]


@pytest.mark.parametrize(
    "change, field",
    [
        ({"arms": [{"key": "control", "share": 0.5}, {"key": "bold", "share": 0.4}]}, "arms"),
        ({"control": "nope"}, "control"),
        ({"metrics": [{"key": "r", "kind": "ratio", "direction": "lower"}]}, "metrics.r"),
        (
            {
                "features": [
                    {"key": "plan", "kind": "categorical", "levels": ["free", "pro", "free"]}
                ]
            },
            "features.plan.levels",
        ),
        (
            {"features": [{"key": "plan", "kind": "categorical", "levels": ["free", ""]}]},
            "features.plan.levels",
        ),
        (
            {"features": [{"key": "started", "kind": "numeric"}]},  # abandon_rate's denominator
            "features.started",
        ),
    ],
    ids=[
        "shares-not-one",
        "unknown-control",
        "ratio-without-columns",
        "duplicate-level",
        "empty-level",
        "ratio-column-is-a-feature",
    ],
)
def test_bad_declaration_is_422_naming_field(client: TestClient, keys, change, field) -> None:  # type: ignore[no-untyped-def]
    r = client.post("/v1/experiments", json={**EXPERIMENT, **change}, headers=keys.h(keys.analyst))
    assert r.status_code == 422
    assert any(e["field"] == field for e in r.json()["errors"])
    assert (
        client.get("/v1/experiments/checkout-copy", headers=keys.h(keys.reader)).status_code == 404
    )


def test_upload_summary_matches_direct_computation(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    body = rows_csv(600)
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=body,
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.status_code == 201, r.text
    out = r.json()
    assert out["version"] == 1 and out["n_rows"] == 600
    rows = list(csv.DictReader(io.StringIO(body.decode())))
    for arm in ("control", "bold", "calm"):
        spend = np.array([float(x["spend"]) for x in rows if x["arm"] == arm])
        got = next(a for a in out["arms"] if a["arm"] == arm)["metrics"]["spend"]
        assert got["mean"] == pytest.approx(spend.mean(), rel=1e-12)
        assert got["se"] == pytest.approx(spend.std(ddof=1) / np.sqrt(len(spend)), rel=1e-12)
    # sample-ratio statistic equals scipy.stats.chisquare of the arm counts (Pearson, common practice)
    counts = [sum(1 for x in rows if x["arm"] == a) for a in ("control", "bold", "calm")]
    ref = stats.chisquare(counts, f_exp=np.array([0.5, 0.25, 0.25]) * 600)
    assert out["sample_ratio"]["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    assert out["sample_ratio"]["p_value"] == pytest.approx(ref.pvalue, rel=1e-12)
    again = client.get(
        "/v1/experiments/checkout-copy/readouts/1", headers=keys.h(keys.reader)
    ).json()
    assert again["content_hash"] == out["content_hash"]


def test_same_bytes_twice_returns_existing_version_with_200(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    body = rows_csv(100)
    first = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=body,
        headers={**keys.h(keys.analyst), **CSV},
    )
    second = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=body,
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert (first.status_code, second.status_code) == (201, 200)
    assert second.json()["version"] == first.json()["version"] == 1
    other = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(100, seed=2),
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert other.status_code == 201 and other.json()["version"] == 2


def _bad(body: bytes, line: int, old: str, new: str) -> bytes:
    lines = body.decode().split("\n")
    assert old in lines[line]
    lines[line] = lines[line].replace(old, new, 1)
    return "\n".join(lines).encode()


def test_bad_rows_are_422_and_nothing_is_stored(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    before = _counts(client)
    good = rows_csv(50)
    first_line = good.decode().split("\n")[1]
    bad_arm = good.replace(
        first_line.encode(), first_line.replace(first_line.split(",")[1], "zebra", 1).encode(), 1
    )
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=bad_arm,
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.status_code == 422
    err = r.json()["errors"][0]
    assert err["column"] == "arm" and err["rows"] == [1] and "zebra" in err["problem"]
    assert _counts(client) == before


def test_empty_and_oversize_uploads(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=b"",
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.status_code == 422
    client.app.state.services.settings.max_upload_bytes = 1000  # type: ignore[attr-defined]
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=rows_csv(200),
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.status_code == 413 and r.headers["content-type"].startswith("application/problem+json")


def test_unknown_experiment_is_404(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.post(
        "/v1/experiments/none/readouts",
        content=rows_csv(10),
        headers={**keys.h(keys.analyst), **CSV},
    )
    assert r.status_code == 404 and r.json()["detail"] == "no experiment with key 'none'"


def test_unknown_route_and_method_are_problems(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    r = client.get("/v1/nothing-here", headers=keys.h(keys.reader))
    assert r.status_code == 404 and r.headers["content-type"].startswith("application/problem+json")
    r = client.put("/v1/experiments", headers=keys.h(keys.reader))
    assert r.status_code == 405 and r.json()["status"] == 405


def test_unknown_upload_format_is_415(client: TestClient, keys) -> None:  # type: ignore[no-untyped-def]
    _declare(client, keys)
    r = client.post(
        "/v1/experiments/checkout-copy/readouts",
        content=b"<rows/>",
        headers={**keys.h(keys.analyst), "content-type": "application/xml"},
    )
    assert r.status_code == 415 and r.headers["content-type"].startswith("application/problem+json")
    assert "application/xml" in r.json()["detail"]
