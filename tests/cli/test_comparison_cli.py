"""`apportion comparison start|show|list` against a live server: the table printed in the
server's order with every guardrail's held-out lift, the recommendation and its reason; bad input
prints the problem and exits non-zero."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from support import EXPERIMENT, rows_csv

from apportion.cli.common import LocalError
from apportion.cli.comparisons import guardrail_arg


@pytest.fixture
def files(tmp_path: Path) -> dict[str, Path]:
    decl = tmp_path / "experiment.json"
    decl.write_text(json.dumps(EXPERIMENT))
    csv = tmp_path / "rows.csv"
    csv.write_bytes(rows_csv(800, seed=3))
    return {"decl": decl, "csv": csv}


def test_comparison_start_prints_the_ordered_table(cli, files) -> None:  # type: ignore[no-untyped-def]
    assert cli("analyst", "experiment", "create", str(files["decl"])).code == 0
    assert cli("analyst", "readout", "upload", "checkout-copy", str(files["csv"])).code == 0
    r = cli("analyst", "comparison", "start", "checkout-copy", "--readout", "1",
            "--success-metric", "spend", "--guardrail", "refund=0.02@0.9",
            "--candidate", "global/chance", "--candidate", "global/deterministic",
            "--folds", "2")  # fmt: skip
    assert r.code == 0, r.err
    assert "comparison 1" in r.err and "100% done" in r.err  # the progress bar on stderr
    body = cli("reader", "comparison", "show", "checkout-copy", "1", "--json").json()
    lines = r.out.splitlines()
    header = next(i for i, line in enumerate(lines) if line.startswith("rank"))
    assert "spend lift" in lines[header] and "refund lift" in lines[header]
    printed = [line.split()[1] for line in lines[header + 2 : header + 4]]
    assert printed == [row["candidate"] for row in body["table"]]  # the server's order
    top = body["table"][0]["metrics"]
    assert f"{top['spend']['lift']:+.4f} ± {top['spend']['se']:.4f}" in lines[header + 2]
    assert f"recommended: {body['recommended'] or 'none'}" in r.out and "why: " in r.out
    assert "allowed lifts: refund <= +0.0200" in r.out
    assert body["spec"]["guardrails"][0]["confidence"] == 0.9
    listed = cli("reader", "comparison", "list", "checkout-copy")
    row = next(line for line in listed.out.splitlines() if line.split()[:2] == ["1", "done"])
    assert listed.code == 0 and (body["recommended"] or "") in row
    bad = cli("analyst", "comparison", "start", "checkout-copy", "--readout", "1",
              "--success-metric", "spend", "--candidate", "nope/chance")  # fmt: skip
    assert bad.code == 1 and "nope/chance" in bad.err and "candidates[0]" in bad.err


def test_guardrail_argument_parses_unit_and_confidence() -> None:
    assert guardrail_arg("refund=0.01") == {"metric": "refund", "threshold": 0.01}
    assert guardrail_arg("churn=2:relative@0.9") == {
        "metric": "churn", "threshold": 2.0, "unit": "relative", "confidence": 0.9,
    }  # fmt: skip
    with pytest.raises(LocalError, match="metric=threshold"):
        guardrail_arg("refund")
    with pytest.raises(LocalError, match="must be numbers"):
        guardrail_arg("refund=lots")
