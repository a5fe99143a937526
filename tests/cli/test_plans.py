"""Plan commands against a live server: draft, show, approve, reject, activate (reading the
revision first, or a stale one given), roll back, assign one member or a batch.

One server and one fitted model per module (the tests only read the model); each test drafts
versions of a plan of its own, named after the test, so none sees another's versions."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from apportion.client import ApportionClient
from apportion.demo import scenario as sc


@pytest.fixture
def cli(shared_cli):  # type: ignore[no-untyped-def]
    return shared_cli


@pytest.fixture
def live(shared_live):  # type: ignore[no-untyped-def]
    return shared_live


@pytest.fixture
def plan(request: pytest.FixtureRequest) -> str:
    """This test's plan: its name without 'test_', hyphenated."""
    return request.node.originalname.removeprefix("test_").replace("_", "-")[:60]


@pytest.fixture(scope="module")
def model(shared_live) -> int:  # type: ignore[no-untyped-def]
    """A fitted `segments` model (one cohort per level) on 6,000 simulated learners, fitted once
    per module through the client library (test_commands.py covers `model fit` itself)."""
    with ApportionClient(shared_live.url, shared_live.keys["analyst"]) as api:
        api.create_experiment(sc.experiment_declaration())
        api.upload_readout(sc.EXPERIMENT_KEY, sc.to_csv_bytes(sc.simulate(6000, seed=5)))
        started = api.fit_model(sc.EXPERIMENT_KEY, readout_version=1, method="segments",
                                params={"features": ["level"]})  # fmt: skip
        assert api.wait(started.job_id).status == "done"
        return started.model_id


@pytest.fixture(scope="module")
def spec(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("plans") / "spec.json"
    path.write_text(
        json.dumps(
            {
                "success_metric": sc.SUCCESS,
                "guardrails": sc.GUARDRAILS,
                "method": "deterministic",
                "draws": 20,
                "holdout": {"share": 0.05},
            }
        )
    )
    return path


def _draft(cli, plan: str, model: int, spec: Path, *extra: str, role: str = "analyst") -> dict:  # type: ignore[no-untyped-def]
    r = cli(
        role, "plan", "draft", plan, "--model", str(model), "--spec", str(spec), "--json", *extra
    )
    assert r.code == 0, r.err
    return r.json()


def test_draft_and_show(cli, plan, model, spec) -> None:  # type: ignore[no-untyped-def]
    v = _draft(cli, plan, model, spec, "--holdout-share", "0.1", "--notes", "first")
    assert v["version"] == 1 and v["status"] == "draft"
    assert v["spec"]["holdout"]["share"] == 0.1 and v["spec"]["notes"] == "first"
    assert v["spec"]["method"] == "deterministic"  # from the file, not overridden
    cohorts = v["allocation"]["cohorts"]
    assert len(cohorts) == 3
    shown = cli("reader", "plan", "show", plan, "--version", "1")
    assert shown.code == 0
    assert f"plan version    {plan}/1" in shown.out
    for c in cohorts:  # every cohort's rule is printed on its own row, after its id and share
        row = next(line for line in shown.out.splitlines() if line.rstrip().endswith(c["rule"]))
        assert row.split()[:2] == [str(c["id"]), f"{c['share']:.1%}"]
    report = {m["metric"]: m for m in v["report"]["metrics"]}
    for metric, m in report.items():  # the impact table: lift, corrected lift, interval, limit
        t = next(line for line in shown.out.splitlines() if line.startswith(metric + " ")).split()
        assert t[1] == m["role"] and t[3] == f"{m['lift']:+.4f}"
        assert t[4] == f"{m['corrected_lift']:+.4f}"
        assert t[5:7] == [f"[{m['interval'][0]:+.4f},", f"{m['interval'][1]:+.4f}]"]
    t = next(x for x in shown.out.splitlines() if x.startswith("support_contacts ")).split()
    assert t[2] == "rel%"  # a relative guardrail: its lifts are per cent of the baseline
    overview = cli("reader", "plan", "show", plan, "--json").json()
    assert overview["live_version"] is None and overview["revision"] == 0
    assert [x["version"] for x in overview["versions"]] == [1]


def test_draft_options_override_the_spec_file() -> None:
    from apportion.cli.plans import Allocation, DecisionMethod, draft_spec

    base = {"model_id": 1, "method": "deterministic", "holdout": {"share": 0.05, "arm": "a"}}
    got = draft_spec(base, model_id=None, success_metric=None, method=DecisionMethod.chance,
                     allocation=Allocation.pure, baseline=None, draws=None, seed=None, notes="n",
                     comparison=None, holdout_share=0.2, holdout_arm=None)  # fmt: skip
    assert got == {"model_id": 1, "method": "chance", "allocation": "pure", "notes": "n",
                   "holdout": {"share": 0.2, "arm": "a"}}  # fmt: skip
    assert base["method"] == "deterministic" and base["holdout"]["share"] == 0.05  # not edited


def test_draft_needs_a_model(cli, plan, spec) -> None:  # type: ignore[no-untyped-def]
    r = cli("analyst", "plan", "draft", plan, "--spec", str(spec))
    assert r.code == 2 and "--model" in r.err


def test_draft_of_unknown_model_prints_problem(cli, plan, spec) -> None:  # type: ignore[no-untyped-def]
    r = cli("analyst", "plan", "draft", plan, "--model", "999", "--spec", str(spec))
    assert r.code == 1 and "(HTTP 404)" in r.err and "999" in r.err


def test_author_may_not_approve_own_draft(cli, plan, model, spec) -> None:  # type: ignore[no-untyped-def]
    _draft(cli, plan, model, spec, role="approver")
    r = cli("approver", "plan", "approve", plan, "1", "--reason", "looks fine")
    assert r.code == 1 and "(HTTP 403)" in r.err and "another approver" in r.err
    ok = cli("approver2", "plan", "approve", plan, "1", "--reason", "looks fine")
    assert ok.code == 0 and "is approved (by cli-approver2)" in ok.out


def test_reject_then_approve_is_refused(cli, plan, model, spec) -> None:  # type: ignore[no-untyped-def]
    _draft(cli, plan, model, spec)
    r = cli("approver", "plan", "reject", plan, "1", "--reason", "holdout too small", "--json")
    assert r.code == 0 and r.json()["status"] == "rejected"
    again = cli("approver", "plan", "approve", plan, "1", "--reason", "changed my mind")
    assert again.code == 1 and "is rejected" in again.err


def test_activate_reads_revision_and_stale_revision_is_409(cli, plan, model, spec) -> None:  # type: ignore[no-untyped-def]
    _draft(cli, plan, model, spec)
    # a second version with another holdout (a chance-constrained draft costs ten times as much
    # and adds nothing here; test_draft_options_override_the_spec_file covers --method)
    _draft(cli, plan, model, spec, "--holdout-share", "0.1")
    for v in ("1", "2"):
        assert cli("approver", "plan", "approve", plan, v, "--reason", "reviewed").code == 0
    r = cli("approver", "plan", "activate", plan, "1", "--reason", "launch")
    assert r.code == 0, r.err
    assert r.out.strip() == f"activated {plan}: no live version -> version 1 (revision 1)"
    stale = cli("approver", "plan", "activate", plan, "2", "--reason", "x" * 5,
                "--expected-revision", "0")  # fmt: skip
    assert stale.code == 1 and "(HTTP 409)" in stale.err
    fresh = cli("approver", "plan", "activate", plan, "2", "--reason", "next",
                "--expected-revision", "1", "--json")  # fmt: skip
    assert fresh.code == 0 and fresh.json() == {"from_version": 1, "to_version": 2, "revision": 2}
    listed = [p for p in cli("reader", "plan", "list", "--json").json() if p["plan"] == plan]
    assert listed == [
        {"plan": plan, "live_version": 2, "revision": 2, "versions": 2, "latest": 2,
         "latest_status": "active"}
    ]  # fmt: skip


def test_rollback_to_previous_and_named(cli, plan, model, spec) -> None:  # type: ignore[no-untyped-def]
    for share in ("0.05", "0.1", "0.15"):  # three versions (deterministic: cheap to solve)
        _draft(cli, plan, model, spec, "--holdout-share", share)
    for v in ("1", "2", "3"):
        assert cli("approver", "plan", "approve", plan, v, "--reason", "reviewed").code == 0
        assert cli("approver", "plan", "activate", plan, v, "--reason", "go").code == 0
    back = cli("approver", "plan", "rollback", plan, "--reason", "guardrail alarm", "--json")
    assert back.code == 0 and back.json() == {"from_version": 3, "to_version": 2, "revision": 4}
    named = cli("approver", "plan", "rollback", plan, "--reason", "further back", "--to", "1")
    assert named.code == 0 and named.out.strip() == (
        f"rolled back {plan}: version 2 -> version 1 (revision 5)"
    )
    shown = cli("reader", "plan", "show", plan)
    rows = [line.split() for line in shown.out.splitlines()]
    activations = [t[:3] for t in rows if len(t) > 2 and t[1] in ("activate", "rollback")]
    assert activations == [["1", "activate", "1"], ["2", "activate", "2"], ["3", "activate", "3"],
                           ["4", "rollback", "2"], ["5", "rollback", "1"]]  # fmt: skip
    denied = cli("analyst", "plan", "rollback", plan, "--reason", "not mine")
    assert denied.code == 1 and "(HTTP 403)" in denied.err


def test_assign_one_and_batch(cli, plan, model, spec, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    missing = cli("reader", "assign", plan, "m1", "--feature", "level=beginner")
    assert missing.code == 1 and "(HTTP 404)" in missing.err and "no live version" in missing.err
    v = _draft(cli, plan, model, spec, "--holdout-share", "0")
    assert cli("approver", "plan", "approve", plan, "1", "--reason", "ok!").code == 0
    assert cli("approver", "plan", "activate", plan, "1", "--reason", "go").code == 0
    r = cli("reader", "assign", plan, "m1", "--feature", "level=advanced",
            "--feature", "tenure_days=40", "--json")  # fmt: skip
    assert r.code == 0, r.err
    a = r.json()
    advanced = next(c for c in v["allocation"]["cohorts"] if "advanced" in c["rule"])
    assert a["cohort"] == advanced["id"] and a["plan_version"] == 1 and a["holdout"] is False
    assert advanced["arms"][a["arm"]] > 0  # an arm the cohort's allocation gives
    assert (
        cli(
            "reader",
            "assign",
            plan,
            "m1",
            "--feature",
            "level=advanced",
            "--feature",
            "tenure_days=40",
            "--json",
        ).json()
        == a
    )  # fmt: skip  (same member, same arm)
    bad = cli("reader", "assign", plan, "m1", "--feature", "level=5")  # a number, not a level
    assert bad.code == 1 and "(HTTP 422)" in bad.err and "level" in bad.err
    batch = tmp_path / "members.json"
    batch.write_text(json.dumps([{"member_id": f"m{i}", "features": {"level": "beginner"}}
                                 for i in range(4)]))  # fmt: skip
    many = cli("reader", "assign", plan, "--batch", str(batch), "--json")
    got = many.json()["assignments"]
    assert (
        many.code == 0
        and len(got) == 4
        and got[1]
        == cli("reader", "assign", plan, "m1", "--feature", "level=beginner", "--json").json()
    )
    table = cli("reader", "assign", plan, "--batch", str(batch))
    assert [line.split()[0] for line in table.out.splitlines()[2:]] == ["m0", "m1", "m2", "m3"]


def test_large_report_runs_as_a_job_and_draft_waits(cli, plan, model, spec) -> None:  # type: ignore[no-untyped-def]
    # above 1,000 bootstrap draws the server attaches the impact report from a job
    queued = _draft(cli, plan, model, spec, "--draws", "1001", "--no-wait")
    assert queued["report"]["status"] == "pending" and queued["report"]["job"].startswith(
        "/v1/jobs/"
    )
    r = cli("analyst", "plan", "draft", plan, "--model", str(model), "--spec", str(spec),
            "--draws", "1001")  # fmt: skip
    assert r.code == 0, r.err
    assert f"impact report {plan}/2" in r.err and "100% done" in r.err  # the bar
    assert "report          complete" in r.out


def test_watch_upload_show_and_auto_rollback(cli, plan, model, spec, live, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    from apportion.demo.postlaunch import harm_to_beginners, post_launch_csv

    for _ in range(2):
        _draft(cli, plan, model, spec)
    for v in (1, 2):
        assert cli("approver", "plan", "approve", plan, str(v), "--reason", "ok").code == 0
    for v in (1, 2):
        assert cli("approver", "plan", "activate", plan, str(v), "--reason", "go").code == 0
    r = cli("analyst", "watch", "auto-rollback", plan, "on", "--min-units", "200", "--reason", "x")
    assert r.code == 1 and "approver" in r.err  # an analyst may not set it
    r = cli(
        "approver",
        "watch",
        "auto-rollback",
        plan,
        "on",
        "--min-units",
        "200",
        "--reason",
        "protect",
    )
    assert r.code == 0, r.err
    rows = tmp_path / "post.csv"
    compiled = live.services.plans.get(plan)
    # the plan's salt is new each run, so who lands in the 5 % holdout varies: 20,000 rows (about
    # 1,000 held out) make the harm's detection near certain whatever the salt (6,000 rows missed it
    # now and then)
    rows.write_bytes(post_launch_csv(compiled, 20000, seed=11, harm=harm_to_beginners(0.2)))
    r = cli("analyst", "watch", "upload", plan, str(rows), "--json")
    assert r.code == 0, r.err
    got = r.json()
    assert got["version"] == 2 and got["rows"] == 20000, got
    assert got["rolled_back"]["to_version"] == 1, got
    table = cli("reader", "watch", "show", plan)
    assert table.code == 0 and "abandon_rate" in table.out and "breached" in table.out
