"""The analyst command line against a live server: experiments, readouts, models, jobs, audit,
keys; `--json` output parses, refusals print the problem's title and detail and exit non-zero."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from support import EXPERIMENT, rows_csv

from apportion.cli import main
from apportion.cli.common import parse_pairs
from apportion.client import render


@pytest.fixture
def files(tmp_path: Path) -> dict[str, Path]:
    decl = tmp_path / "experiment.json"
    decl.write_text(json.dumps(EXPERIMENT))
    csv = tmp_path / "rows.csv"
    csv.write_bytes(rows_csv(600, seed=3))
    return {"decl": decl, "csv": csv, "dir": tmp_path}


def _with_readout(cli, files) -> None:  # type: ignore[no-untyped-def]
    assert cli("analyst", "experiment", "create", str(files["decl"])).code == 0
    assert cli("analyst", "readout", "upload", "checkout-copy", str(files["csv"])).code == 0


def test_experiment_create_and_show(cli, files) -> None:  # type: ignore[no-untyped-def]
    r = cli("analyst", "experiment", "create", str(files["decl"]))
    assert r.code == 0, r.err
    assert "declared experiment 'checkout-copy': 3 arms (control control), 3 metrics" in r.out
    shown = cli("reader", "experiment", "show", "checkout-copy", "--json")
    assert shown.code == 0
    body = shown.json()
    assert body["key"] == "checkout-copy" and body["readouts"] == []
    assert [a["key"] for a in body["arms"]] == ["control", "bold", "calm"]


def test_experiment_show_names_the_features_not_used_for_personalization(cli, tmp_path) -> None:  # type: ignore[no-untyped-def]
    decl = {**EXPERIMENT, "features": [
        {"key": "age_days", "kind": "numeric"},
        {"key": "plan", "kind": "categorical", "personalize": False, "reason": "pricing tier"},
    ]}  # fmt: skip
    (tmp_path / "flagged.json").write_text(json.dumps(decl))
    made = cli("analyst", "experiment", "create", str(tmp_path / "flagged.json"))
    assert made.code == 0 and "2 features (1 not used for personalization)" in made.out
    shown = cli("reader", "experiment", "show", "checkout-copy")
    assert shown.code == 0, shown.err
    assert "not used for personalization: plan (pricing tier)" in shown.out
    assert "age_days" in shown.out and "age_days (" not in shown.out


def test_duplicate_experiment_prints_problem_and_fails(cli, files) -> None:  # type: ignore[no-untyped-def]
    assert cli("analyst", "experiment", "create", str(files["decl"])).code == 0
    r = cli("analyst", "experiment", "create", str(files["decl"]))
    assert r.code == 1 and r.out == ""
    assert "(HTTP 409)" in r.err.splitlines()[0]
    assert "already exists" in r.err


def test_invalid_declaration_lists_field_errors(cli, files) -> None:  # type: ignore[no-untyped-def]
    bad = files["dir"] / "bad.json"
    bad.write_text(json.dumps({**EXPERIMENT, "control": "nope"}))
    r = cli("analyst", "experiment", "create", str(bad))
    assert r.code == 1
    assert "(HTTP 422)" in r.err and "  - control" in r.err


def test_reader_may_not_declare(cli, files) -> None:  # type: ignore[no-untyped-def]
    r = cli("reader", "experiment", "create", str(files["decl"]))
    assert r.code == 1 and "(HTTP 403)" in r.err


def test_unreadable_local_file_exits_2(cli, files) -> None:  # type: ignore[no-untyped-def]
    r = cli("analyst", "experiment", "create", str(files["dir"] / "missing.json"))
    assert r.code == 2 and "cannot read" in r.err
    notjson = files["dir"] / "x.json"
    notjson.write_text("{nope")
    r = cli("analyst", "experiment", "create", str(notjson))
    assert r.code == 2 and "is not valid JSON" in r.err


def test_readout_upload_twice_and_show(cli, files) -> None:  # type: ignore[no-untyped-def]
    assert cli("analyst", "experiment", "create", str(files["decl"])).code == 0
    first = cli("analyst", "readout", "upload", "checkout-copy", str(files["csv"]), "--json")
    assert first.code == 0
    body = first.json()
    assert body["created"] is True and body["version"] == 1 and body["n_rows"] == 600
    again = cli("analyst", "readout", "upload", "checkout-copy", str(files["csv"]))
    assert again.code == 0 and "uploaded before" in again.out
    shown = cli("reader", "readout", "show", "checkout-copy", "1")
    lines = shown.out.splitlines()
    header = next(line for line in lines if line.startswith("arm "))
    assert header.split() == ["arm", "n", "spend", "refund", "abandon_rate"]
    counts = {a["arm"]: a["n"] for a in body["arms"]}
    control_row = next(line for line in lines if line.startswith("control "))
    assert control_row.split()[1] == str(counts["control"])


def test_readout_unknown_extension_needs_content_type(cli, files) -> None:  # type: ignore[no-untyped-def]
    assert cli("analyst", "experiment", "create", str(files["decl"])).code == 0
    odd = files["dir"] / "rows.txt"
    odd.write_bytes(files["csv"].read_bytes())
    r = cli("analyst", "readout", "upload", "checkout-copy", str(odd))
    assert r.code == 2 and "--content-type" in r.err
    ok = cli(
        "analyst", "readout", "upload", "checkout-copy", str(odd), "--content-type", "text/csv"
    )
    assert ok.code == 0, ok.err


def test_readout_bad_rows_show_problem(cli, files) -> None:  # type: ignore[no-untyped-def]
    assert cli("analyst", "experiment", "create", str(files["decl"])).code == 0
    bad = files["dir"] / "bad.csv"
    bad.write_text(
        "unit_id,arm,age_days,plan,spend,refund,abandoned,started\nu1,zzz,1,free,1,0,0,1\n"
    )
    r = cli("analyst", "readout", "upload", "checkout-copy", str(bad))
    assert r.code == 1 and "(HTTP 422)" in r.err and "zzz" in r.err


def test_model_fit_waits_with_progress_and_shows(cli, files) -> None:  # type: ignore[no-untyped-def]
    _with_readout(cli, files)
    r = cli(
        "analyst",
        "model",
        "fit",
        "checkout-copy",
        "--readout",
        "1",
        "--method",
        "segments",
        "--param",
        'features=["plan"]',
    )
    assert r.code == 0, r.err
    assert "fitting model 1" in r.err and "100% done" in r.err  # the bar on stderr
    assert "status      done" in r.out and "plan in {free}" in r.out
    body = cli("reader", "model", "show", "1", "--json").json()
    assert body["status"] == "done" and body["method"] == "segments"
    assert len(body["cohorts"]) == 2  # one cohort per level of 'plan' (free, pro)
    e = body["cohorts"][0]["estimates"]["spend"]["bold"]
    row = next(line for line in r.out.splitlines() if line.split()[:2] == ["0", "bold"])
    assert f"{e['effect']:+.4f} ± {e['effect_se'] * 1.96:.4f}" in row


def test_model_fit_no_wait_then_job_show(cli, files, live) -> None:  # type: ignore[no-untyped-def]
    _with_readout(cli, files)
    r = cli("analyst", "model", "fit", "checkout-copy", "--readout", "1", "--method", "global",
            "--no-wait", "--json")  # fmt: skip
    assert r.code == 0
    started = r.json()
    assert started["model_id"] == 1 and started["job"] == f"/v1/jobs/{started['job_id']}"
    from apportion.client import ApportionClient

    with ApportionClient(live.url, live.keys["reader"]) as api:
        assert api.wait(started["job_id"]).status == "done"
    job = cli("reader", "job", "show", started["job_id"], "--json").json()
    assert job["status"] == "done" and job["progress"] == 1.0


def test_model_fit_bad_parameter_is_refused(cli, files) -> None:  # type: ignore[no-untyped-def]
    _with_readout(cli, files)
    r = cli("analyst", "model", "fit", "checkout-copy", "--readout", "1", "--param", "max_depth=99")
    assert r.code == 1 and "(HTTP 422)" in r.err and "max_depth" in r.err
    r = cli("analyst", "model", "fit", "checkout-copy", "--readout", "1", "--param", "novalue")
    assert r.code == 2 and "name=value" in r.err


def test_audit_show_and_check(cli, files) -> None:  # type: ignore[no-untyped-def]
    _with_readout(cli, files)
    entries = cli("reader", "audit", "show", "--json").json()
    actions = [e["action"] for e in entries]
    assert "experiment.declare" in actions and "readout.upload" in actions
    only = cli("reader", "audit", "show", "--entity", "readout", "--json").json()
    assert only and {e["entity"] for e in only} == {"readout"}
    table = cli("reader", "audit", "show", "--entity", "readout")
    assert "readout:checkout-copy/1" in table.out and "cli-analyst (analyst)" in table.out
    ok = cli("admin", "audit", "check", "--json")
    assert ok.code == 0 and ok.json()["intact"] is True
    assert ok.json()["entries"] == len(entries)
    denied = cli("analyst", "audit", "check")
    assert denied.code == 1 and "(HTTP 403)" in denied.err


def test_audit_check_reports_a_broken_chain(cli, files, live) -> None:  # type: ignore[no-untyped-def]
    from sqlalchemy import update

    from apportion.store.tables import AuditEntry

    _with_readout(cli, files)
    with live.services.db.write() as s:  # type: ignore[attr-defined]
        s.execute(update(AuditEntry).where(AuditEntry.id == 2).values(reason="tampered"))
    r = cli("admin", "audit", "check")
    assert r.code == 1 and "BROKEN at entry 2" in r.out


def test_audit_show_follows_pages(cli, files) -> None:  # type: ignore[no-untyped-def]
    _with_readout(cli, files)
    one_page = cli("reader", "audit", "show", "--limit", "1", "--json").json()
    every = cli("reader", "audit", "show", "--limit", "1", "--all", "--json").json()
    assert len(one_page) == 1 and len(every) >= 2
    assert [e["id"] for e in every] == sorted(e["id"] for e in every)


def test_keys_issue_through_the_api(cli) -> None:  # type: ignore[no-untyped-def]
    r = cli(
        "admin", "keys", "issue", "--name", "new-reader", "--owner", "nr@people", "--role", "reader"
    )
    assert r.code == 0 and "the secret is shown once" in r.err
    secret = r.out.strip().splitlines()[-1]
    assert cli(None, "audit", "show", "--key", secret, "--json").code == 0
    denied = cli(
        "analyst", "keys", "issue", "--name", "x", "--owner", "x@people", "--role", "admin"
    )
    assert denied.code == 1 and "(HTTP 403)" in denied.err


def test_environment_gives_url_and_key(live, files, monkeypatch, capsys) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.setenv("APPORTION_URL", live.url)
    monkeypatch.setenv("APPORTION_KEY", live.keys["analyst"])
    assert main(["experiment", "create", str(files["decl"]), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["key"] == "checkout-copy"
    monkeypatch.setenv("APPORTION_KEY", "wrong")
    assert main(["experiment", "show", "checkout-copy"]) == 1
    assert "(HTTP 401)" in capsys.readouterr().err


def test_unreachable_server_exits_2(capsys) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.run import bind_socket

    sock = bind_socket(port=0)  # a port nobody listens on once closed
    port = sock.getsockname()[1]
    sock.close()
    code = main(
        ["plan", "list", "--url", f"http://127.0.0.1:{port}", "--key", "k", "--timeout", "2"]
    )
    assert code == 2 and "cannot reach" in capsys.readouterr().err


def test_tables_right_align_number_columns_and_left_align_text() -> None:
    rows = [["a", 1.5, None], ["longer", 12, "x"]]
    header, rule, first, second = render.to_text(render.table(rows, ["name", "n", "note"])).split(
        "\n"
    )
    assert set(rule) == {"─"}  # a rule under the headers
    right = header.index(" n ") + 2  # the right edge of the number column
    assert first.index("1.5") + 3 == right and second.index("12") + 2 == right
    assert first.startswith("a ") and second.startswith("longer ")
    assert second.index("x") == header.index("note")  # text columns start with their header
    assert first.rstrip().endswith("1.5")  # None is an empty cell


def test_parse_pairs_types() -> None:
    got = parse_pairs(["level=beginner", "tenure_days=40", "x=null", 'code="10"', "a=b=c"], "--f")
    assert got == {"level": "beginner", "tenure_days": 40, "x": None, "code": "10", "a": "b=c"}


def test_cli_offers_the_roles_the_server_knows() -> None:
    from apportion.cli.audit import Role
    from apportion.domain import ROLES

    assert tuple(Role) == ROLES


def test_cli_api_and_fitter_offer_the_same_model_methods():
    from apportion.cli.models import MODEL_METHODS
    from apportion.schemas.models import FitIn
    from apportion.stats.models import METHODS

    assert MODEL_METHODS == METHODS
    assert tuple(FitIn.model_fields["method"].annotation.__args__) == METHODS


def test_plan_rendering_lists_guardrail_prices_and_the_five_thresholds():
    rows = [
        {
            "metric": "cancelled", "unit": "absolute", "threshold": 0.003, "step": 0.00075,
            "price": 12.5, "price_basis": "central difference over one step each way",
            "points": [
                {"offset": -2, "threshold": 0.0015, "status": "infeasible"},
                {"offset": -1, "threshold": 0.00225, "status": "solved", "lift": 0.10},
                {"offset": 0, "threshold": 0.003, "status": "chosen", "lift": 0.11},
                {"offset": 1, "threshold": 0.00375, "status": "solved", "lift": 0.12},
                {"offset": 2, "threshold": 0.0045, "status": "solved", "lift": 0.125},
            ],
        }
    ]  # fmt: skip
    text = render.to_text(render.lines(*render.prices_view(rows)))
    assert "cancelled" in text and "+12.5000" in text
    assert "infeasible +0.1000 +0.1100 +0.1200 +0.1250" in text
    assert render.prices_view([]) == []


@pytest.mark.parametrize("lift,se,warns", [(0.015, 0.012, True), (0.2, 0.04, False)])
def test_plan_report_says_what_held_out_measures_and_warns_only_when_short(
    lift: float, se: float, warns: bool
) -> None:
    # the review fixture projects active_days at [0.127, 0.249] against all-control
    from web.review_fixtures import version

    from apportion.usecases.plans.views import held_out_reading

    v = version()
    v["report"]["held_out"]["metrics"]["active_days"] = {"lift": lift, "se": se}
    v["report"]["held_out"]["reading"] = held_out_reading(v["report"], "active_days")
    text = render.to_text(render.version_view(v))
    assert "scores the procedure, not this version" in text
    assert ("WARNING: The held-out active_days lift" in text) is warns


def test_database_commands_close_their_connections(
    db_url: str, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    # `keys create`, `audit verify` and `db` open the store themselves; run in-process (a test,
    # a script) they must leave no connection open (on PostgreSQL an open one outlives them)
    from apportion.config import get_settings
    from apportion.store.db import Database

    disposed: list[Database] = []
    real = Database.dispose

    def spy(self: Database) -> None:
        disposed.append(self)
        real(self)

    monkeypatch.setattr(Database, "dispose", spy)
    monkeypatch.setenv("APPORTION_DATABASE_URL", db_url)
    get_settings.cache_clear()
    try:
        assert main(["keys", "create", "--name", "k", "--role", "reader"]) == 0
        assert main(["audit", "verify"]) == 0
        assert main(["db", "status"]) == 0
    finally:
        get_settings.cache_clear()
    assert len(disposed) == 3, capsys.readouterr()
