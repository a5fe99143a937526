"""`make demo`: the whole job on the invented lesson-length scenario, through the real HTTP API.

It starts the app with uvicorn in a background thread on 127.0.0.1 (port 8000 when free, else a
free one) over a fresh SQLite file under ./var/ (a new file each run, so reruns are clean), then
drives every step with the HTTP client the `apportion` command line is built on
(`apportion.client.ApportionClient`): declare the experiment, upload a simulated readout, fit a `causal_tree`
model, compare a short list of decision methods on held-out folds of the readout, draft a plan with
the recommended one (and the scenario's three guardrails), approve it with a second key,
activate it, answer sample assignments, draft, approve and activate a second version and roll it
back, verify the audit chain, and print a report that compares the plan with the truth: the
scenario's effect functions evaluated on the plan's allocation per learner (`true_lifts`), the
oracle plan and the best single arm that meets the guardrails.

    python -m apportion.demo.run [--learners 200000] [--seed 1] [--serve] [--port 8000]

Longer than most modules (about 600 lines) on purpose: it is one script, read top to bottom as
the walkthrough of the whole job; its steps share the run's keys, client and truth.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import socket
import sys
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, TextIO

import numpy as np
from rich.console import Console, RenderableType

from apportion.client import ApportionClient, ProblemError, as_json, render
from apportion.client.render import fmt_num, report_metric_rows
from apportion.demo import scenario as sc

PLAN = sc.EXPERIMENT_KEY  # the plan is named like the experiment: lesson-length


# ---- the server in a thread --------------------------------------------------------------------


def bind_socket(host: str = "127.0.0.1", port: int = 8000) -> socket.socket:
    """A listening socket on `port` if it is free, else on a free port the system picks."""
    for p in (port, 0):
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            sock.bind((host, p))
        except OSError:
            sock.close()
            if p == 0:
                raise
            continue
        sock.listen(128)
        return sock
    raise OSError("no port")  # pragma: no cover (the loop returns or raises)


@dataclass
class RunningServer:
    url: str
    server: Any
    thread: threading.Thread

    def stop(self) -> None:
        self.server.should_exit = True
        self.thread.join(timeout=15)


def serve_in_thread(app: Any, *, host: str = "127.0.0.1", port: int = 8000) -> RunningServer:
    """Run `app` with uvicorn in a daemon thread; returns once it accepts connections (its
    lifespan, which applies migrations and starts the job worker, has run)."""
    import uvicorn

    sock = bind_socket(host, port)
    config = uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on")
    server = uvicorn.Server(config)
    thread = threading.Thread(
        target=server.run, kwargs={"sockets": [sock]}, name="apportion-uvicorn", daemon=True
    )
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise RuntimeError("the server did not start; see the log above")
        time.sleep(0.02)
    return RunningServer(f"http://{host}:{sock.getsockname()[1]}", server, thread)


# ---- the demo ----------------------------------------------------------------------------------


class _Steps:
    """Numbered step lines with their duration."""

    def __init__(self, out: TextIO, total: int) -> None:
        self.out, self.total, self.n = out, total, 0

    @contextlib.contextmanager
    def step(self, what: str) -> Iterator[None]:
        self.n += 1
        t0 = time.perf_counter()
        self.out.write(f"[{self.n:2d}/{self.total}] {what} ...\n")
        self.out.flush()
        yield
        self.out.write(f"        done in {time.perf_counter() - t0:.1f} s\n")
        self.out.flush()


def member_features(fv: dict[str, np.ndarray], i: int) -> dict[str, Any]:
    """Learner i's features as the lookup takes them: numbers, level strings, None when missing."""
    out: dict[str, Any] = {}
    for f in sc.FEATURES:
        v = fv[f.key][i]
        if f.kind == "categorical":
            out[f.key] = None if v < 0 else f.levels[int(v)]
        else:
            out[f.key] = None if not np.isfinite(v) else float(v)
    return out


def watch_with_harm(
    api: ApportionClient, *, learners: int, seed: int, out: TextIO, batches: int = 4
) -> dict[str, Any]:
    """Post-launch batches of learners, assigned through the HTTP lookup and simulated with an
    invented harm (+5 points of abandonment for beginners on every non-control arm), uploaded to
    the watch until it rolls the plan back by itself (or the batches run out)."""
    from apportion.demo.postlaunch import harm_to_beginners, rows_csv

    harm = harm_to_beginners(0.05)
    last: dict[str, Any] = {}
    for b in range(batches):
        bseed = seed + b
        _, fv = sc.simulate_features(learners, bseed)
        ids = np.array([f"p{b}-{i}" for i in range(learners)], dtype=object)
        answers: list[dict[str, Any]] = []
        for lo in range(0, learners, 10_000):
            members = [
                {"member_id": ids[i], "features": member_features(fv, i)}
                for i in range(lo, min(lo + 10_000, learners))
            ]
            answers += as_json(api.assign_batch(PLAN, members))
        codes = np.array([sc.ARMS.index(a["arm"]) for a in answers])
        holdout = np.array([a["holdout"] for a in answers])
        last = as_json(api.monitor(PLAN, rows_csv(ids, learners, bseed, codes, holdout, harm=harm)))
        abandon = next(m for m in last["metrics"] if m["metric"] == "abandon_rate")
        out.write(
            f"        upload {last['upload']}: {last['members']:,} members; abandon_rate plan - holdout "
            f"{fmt_num(abandon['estimate'])} in [{fmt_num(abandon['lower'])}, {fmt_num(abandon['upper'])}]"
            f" against +{abandon['threshold']:.4f}: {abandon['status']}\n"
        )
        if last.get("rolled_back"):
            rb = last["rolled_back"]
            out.write(
                f"        the watch rolled the plan back to version {rb.get('to_version')} by itself\n"
            )
            break
    trail = as_json(api.audit(entity="plan", entity_id=PLAN, actor="guardrail-watch"))
    return {"last_upload": last, "rollback_entries": trail}


def plan_probabilities(
    version: dict[str, Any], model: dict[str, Any], fv: dict[str, np.ndarray]
) -> np.ndarray:
    """(n, J) probability that learner i gets arm j under the version's allocation (the plan's
    decision; the holdout, which sits on the control arm, is left out to compare like with like
    with the projected lifts, the oracle and the single arms)."""
    from apportion.stats.partition import Partition

    arms = list(version["allocation"]["arms"])
    if arms != list(sc.ARMS):
        raise RuntimeError(f"plan arms {arms} are not the scenario's {list(sc.ARMS)}")
    partition = Partition.from_dict(model["partition"])
    cohort, _ = partition.route(fv, sc.FEATURES)
    matrix = np.asarray(version["allocation"]["matrix"], dtype=np.float64)
    return matrix[cohort]


def truth_table(
    version: dict[str, Any], model: dict[str, Any], n: int, seed: int
) -> dict[str, Any]:
    """Projected (the version's report) against true lifts, on a fresh population of n learners.
    Every lift is in its guardrail's threshold unit, as the report gives it: absolute, or per cent
    of the baseline's true value for a relative guardrail (support_contacts)."""
    _, fv = sc.simulate_features(n, seed + 1)
    plan_true = sc.true_lifts(fv, plan_probabilities(version, model, fv))
    oracle = sc.oracle_plan(fv)
    projected = {r["metric"]: r for r in report_metric_rows(version)}
    units = {sc.SUCCESS: "absolute"} | {g["metric"]: g["unit"] for g in sc.GUARDRAILS}
    allowed = {g["metric"]: float(g["threshold"]) for g in sc.GUARDRAILS}

    def scaled(metric: str, lift: float) -> float:
        rel = units[metric] == "relative"
        return 100.0 * lift / oracle["baseline"][metric] if rel else lift

    rows = []
    for metric in [sc.SUCCESS] + [g["metric"] for g in sc.GUARDRAILS]:
        p = projected.get(metric, {})
        limit = oracle["limits"].get(metric)  # absolute
        rows.append(
            {
                "metric": metric,
                "role": "success" if metric == sc.SUCCESS else "guardrail",
                "unit": units[metric],
                "allowed": allowed.get(metric),
                "projected": p.get("projected"),
                "low": p.get("low"),
                "high": p.get("high"),
                "plan_true": scaled(metric, plan_true[metric]),
                "oracle_true": scaled(metric, oracle["lifts"][metric]),
                "best_single_true": scaled(metric, oracle["best_single_lifts"][metric]),
                "plan_holds": None if limit is None else plan_true[metric] <= limit + 1e-12,
            }
        )
    return {
        "rows": rows,
        "best_single_arm": oracle["best_single_arm"],
        "single_arm_success": {a: v[sc.SUCCESS] for a, v in oracle["single_arm_lifts"].items()},
        "plan_success_true": plan_true[sc.SUCCESS],
        "best_single_success_true": oracle["best_single_lifts"][sc.SUCCESS],
        "oracle_success_true": oracle["lifts"][sc.SUCCESS],
        "plan_meets_true_guardrails": all(
            r["plan_holds"] for r in rows if r["role"] == "guardrail"
        ),
    }


# the demo's short list (the full registry is the API's default; bench/compare.py times it)
COMPARED = ("global/chance", "causal_tree/chance", "causal_tree/stochastic", "policy_tree/chance")


def _show(out: TextIO, renderable: RenderableType, spaces: int = 0) -> None:
    """A rendered answer into the report (plain text, indented like the step lines)."""
    text = render.to_text(render.indent(renderable, spaces) if spaces else renderable)
    out.write(text + "\n")


def _wait(api: ApportionClient, job_id: str, label: str) -> dict[str, Any]:
    """Wait for a job with a progress bar on stderr."""
    with render.job_progress(f"        {label}", Console(stderr=True)) as bar:
        return as_json(api.wait(job_id, on_progress=bar))


def run_demo(
    *,
    learners: int = 200_000,
    seed: int = 1,
    port: int = 8000,
    draws: int = 200,
    held_out_folds: int = 5,
    serve: bool = False,
    var_dir: str | Path = "var",
    out: TextIO | None = None,
) -> dict[str, Any]:
    """Run every step; returns the report as a dict (also printed to `out`)."""
    from apportion.app import create_app
    from apportion.config import Settings
    from apportion.usecases.auth import SYSTEM, create_key

    out = out or sys.stdout
    t_start = time.perf_counter()
    var = Path(var_dir)
    var.mkdir(parents=True, exist_ok=True)
    stamp = datetime.now(UTC).strftime("%Y%m%d-%H%M%S")
    db_path = (var / f"demo-{stamp}-{os.getpid()}.db").resolve()
    out.write(
        f"Apportion demo on the invented lesson-length scenario ({learners:,} learners).\n"
        f"Store: a fresh SQLite file {db_path} (each run makes a new one; delete {var}/ to clean "
        "up).\n\n"
    )
    settings = Settings(
        database_url=f"sqlite:///{db_path}", log_level="WARNING", held_out_folds=held_out_folds
    )
    app = create_app(settings)
    running = serve_in_thread(app, port=port)
    url = running.url
    steps = _Steps(out, 15)
    post_launch = max(2_000, learners // 10)
    report: dict[str, Any] = {"url": url, "database": str(db_path), "learners": learners}
    try:
        out.write(f"Server: {url} (uvicorn in a background thread)\n\n")
        with steps.step(
            "create the keys (admin bootstrapped in the database, the rest via the API)"
        ):
            services = app.state.services
            _, admin_secret = create_key(
                services.db, name="demo-admin", owner="ops@demo", role="admin", actor=SYSTEM
            )
            services.keys.refresh()
            admin = ApportionClient(url, admin_secret)
            made = {"demo-admin": {"role": "admin", "secret": admin_secret}}
            people = [
                ("demo-analyst", "analyst", "analyst@demo"),
                ("demo-approver", "approver", "approver@demo"),
            ]
            for name, role, owner in people:
                made[name] = {
                    "role": role,
                    "secret": admin.create_key(name, role, owner=owner).secret,
                }
            analyst = admin.with_key(made["demo-analyst"]["secret"])
            approver = admin.with_key(made["demo-approver"]["secret"])
            report["keys"] = made

        with steps.step("declare the experiment (POST /v1/experiments)"):
            analyst.create_experiment(sc.experiment_declaration())

        with steps.step(f"simulate {learners:,} learners and upload the readout as CSV"):
            table = sc.simulate(learners, seed)
            data = sc.to_csv_bytes(table)
            readout = as_json(analyst.upload_readout(sc.EXPERIMENT_KEY, data, "text/csv")[0])
            srm = readout["sample_ratio"]
            out.write(
                f"        readout {readout['version']}: {readout['n_rows']:,} rows, "
                f"{len(data) / 1e6:.1f} MB; sample-ratio p = {srm['p_value']:.3f}"
                f" ({'flagged' if srm['flagged'] else 'ok'})\n"
            )

        with steps.step("fit a causal_tree cohort model (a job; progress from GET /v1/jobs)"):
            started = analyst.fit_model(
                sc.EXPERIMENT_KEY,
                readout_version=readout["version"],
                method="causal_tree",
                params={"seed": seed},
                success_metric=sc.SUCCESS,
            )
            job = _wait(analyst, started.job_id, "fit")
            if job["status"] != "done":
                raise RuntimeError(f"the fit failed: {job['error']}")
            model = as_json(analyst.model(started.model_id))
            out.write(f"        model {model['id']}: {len(model['cohorts'])} cohorts\n")

        with steps.step("compare decision methods on held-out folds (POST .../comparisons, a job)"):
            compared = analyst.start_comparison(sc.EXPERIMENT_KEY, {
                "model_id": model["id"], "success_metric": sc.SUCCESS,
                "guardrails": sc.GUARDRAILS, "candidates": list(COMPARED), "folds": 3,
                "seed": seed,
                "notes": "demo: which method to draft the plan with"})  # fmt: skip
            _wait(analyst, compared.job_id, "comparison")
            comparison = as_json(analyst.comparison(sc.EXPERIMENT_KEY, compared.number))
            if comparison["status"] != "done":
                raise RuntimeError(f"the comparison failed: {comparison.get('error')}")
            _show(out, render.comparison_view(comparison), 8)
            report["comparison"] = {
                k: comparison.get(k) for k in ("number", "recommended", "reason")
            }
            chosen = comparison["recommended"] or "causal_tree/chance"
            chosen_model, _, optimizer = chosen.partition("/")
            if chosen_model != model["method"]:  # the recommendation needs its own cohort model
                again = analyst.fit_model(sc.EXPERIMENT_KEY, readout_version=readout["version"],
                                          method=chosen_model, params={"seed": seed},
                                          success_metric=sc.SUCCESS)  # fmt: skip
                job = _wait(analyst, again.job_id, "fit")
                if job["status"] != "done":
                    raise RuntimeError(f"the fit failed: {job['error']}")
                model = as_json(analyst.model(again.model_id))
                out.write(f"        model {model['id']} ({chosen_model}): "
                          f"{len(model['cohorts'])} cohorts\n")  # fmt: skip

        spec = {
            "model_id": model["id"],
            "success_metric": sc.SUCCESS,
            "guardrails": sc.GUARDRAILS,
            "method": optimizer,
            "allocation": "mixed",
            "holdout": {"share": 0.05, "arm": sc.ARMS[0]},
            "baseline": "control",
            "draws": draws,
            "seed": seed,
            "notes": f"demo: {chosen}, the method comparison {comparison['number']} recommended "
            "(or the default when it recommended none)",
        }
        if comparison["recommended"]:
            spec["comparison"] = comparison["number"]
        with steps.step(
            "draft version 1 with the recommended method (POST /v1/plans/.../versions)"
        ):
            v1 = as_json(analyst.settle_draft(analyst.draft_plan(PLAN, spec)))
            out.write(_held_out_line(v1["report"].get("held_out") or {}))

        with steps.step("approve version 1 with the approver's key"):
            approver.approve(PLAN, v1["version"], "demo: report reviewed, guardrails hold")

        with steps.step("activate version 1 (reads the plan's revision first)"):
            act1 = as_json(approver.activate(PLAN, v1["version"], "demo: first launch"))

        with steps.step("answer sample assignments (POST /v1/plans/.../assign)"):
            ids, fv = sc.simulate_features(5, seed + 2)
            answers = []
            for i, m in enumerate(ids):
                a = as_json(analyst.assign(PLAN, str(m), member_features(fv, i)))
                answers.append({"member_id": str(m), **member_features(fv, i), **a})
            _show(out, render.table(
                [[a["member_id"], a["level"], a["device"], a["streak_days"], a["tenure_days"],
                  a["arm"], a["cohort"], a["holdout"]] for a in answers],
                ["member", "level", "device", "streak", "tenure", "arm", "cohort", "holdout"],
            ))  # fmt: skip
            report["assignments"] = answers

        spec2 = {  # a point-estimate plan the comparison did not rank: it names no comparison
            **{k: v for k, v in spec.items() if k != "comparison"},
            "method": "deterministic",
            "holdout": {"share": 0.10, "arm": sc.ARMS[0]},
            "notes": "demo: the point-estimate plan with a 10 % holdout",
        }
        with steps.step("draft, approve and activate version 2 (deterministic, 10 % holdout)"):
            v2 = as_json(analyst.settle_draft(analyst.draft_plan(PLAN, spec2)))
            approver.approve(PLAN, v2["version"], "demo: a second version to roll back")
            act2 = as_json(
                approver.activate(PLAN, v2["version"], "demo: try the point-estimate plan")
            )

        with steps.step("roll back to version 1 (POST /v1/plans/.../rollback)"):
            back = as_json(approver.rollback(PLAN, "demo: back to the recommended plan"))
            plan_state = as_json(analyst.plan(PLAN))
            report["activations"] = [act1, act2, back]
            report["live_version"] = plan_state["live_version"]

        with steps.step("turn on automatic rollback (approver), launch rows with an injected harm"):
            approver.set_auto_rollback(
                PLAN, enabled=True, min_units_per_group=500, reason="demo: protect the launch"
            )
            watch = watch_with_harm(analyst, learners=post_launch, seed=seed + 5, out=out)
            report["watch"] = watch
            report["live_version"] = analyst.plan(PLAN).live_version

        with steps.step("verify the audit chain (GET /v1/audit/verify, admin key)"):
            chain = as_json(admin.audit_verify())
            report["audit"] = chain
            out.write(
                f"        {'intact' if chain['intact'] else 'BROKEN'}: {chain['entries']} entries\n"
            )

        with steps.step("compare the plan with the truth (the scenario's effect functions)"):
            truth = truth_table(v1, model, learners, seed)
            report.update(truth)
            report["cohorts"] = v1["allocation"]["cohorts"]
            report["method_v1"] = chosen

        with steps.step("read the audit trail of the plan (GET /v1/audit)"):
            trail = as_json(analyst.audit(entity="plan", entity_id=PLAN))
            report["plan_audit_actions"] = [e["action"] for e in trail]

        report["seconds"] = round(time.perf_counter() - t_start, 1)
        report["review_page"] = f"{url}/ui/plans/{PLAN}/versions/1"
        _print_report(report, out)
        if serve:
            out.write(f"\nServing {url} until Ctrl-C.\n")
            out.flush()
            with contextlib.suppress(KeyboardInterrupt):
                while running.thread.is_alive():
                    time.sleep(0.5)
        else:
            out.write(
                "\nThe server stops now. To keep it running for the review page, run "
                "`.venv/bin/python -m apportion.demo.run --serve`.\n"
            )
        for api in (admin, analyst, approver):
            api.close()
    finally:
        running.stop()
    return report


def _print_report(r: dict[str, Any], out: TextIO) -> None:
    w = out.write
    w(f"\n=== Report: plan lesson-length, version 1 ({r.get('method_v1')}, mixed) ===\n\n")
    w("Cohorts and their arms:\n")
    _show(out, render.cohorts_table(r["cohorts"]))
    w("\n")
    w(
        "Lifts against everyone on five_min, in each guardrail's unit (abs, or rel% = per cent of"
        " the baseline's value; 'allowed' is its limit;"
        " projected = the impact report, corrected for the optimizer's curse, with its 95 %"
        " interval; true = the scenario's effect functions on a fresh population):\n"
    )
    best = r["best_single_arm"]
    _show(
        out,
        render.table(
            [
                [
                    x["metric"],
                    x["role"],
                    "rel%" if x["unit"] == "relative" else "abs",
                    fmt_num(x["allowed"]),
                    fmt_num(x["projected"]),
                    f"[{fmt_num(x['low'])}, {fmt_num(x['high'])}]",
                    fmt_num(x["plan_true"]),
                    "" if x["plan_holds"] is None else ("holds" if x["plan_holds"] else "BROKEN"),
                    fmt_num(x["oracle_true"]),
                    fmt_num(x["best_single_true"]),
                ]
                for x in r["rows"]
            ],
            [
                "metric",
                "role",
                "unit",
                "allowed",
                "projected",
                "interval",
                "plan true",
                "guardrail",
                "oracle true",
                f"{best} (best safe arm) true",
            ],
        ),
    )
    w("\n")
    plan, single, oracle = (
        r["plan_success_true"],
        r["best_single_success_true"],
        r["oracle_success_true"],
    )
    beats = plan > single and r["plan_meets_true_guardrails"]
    w(
        f"{sc.SUCCESS}: the personalized plan lifts {plan:+.3f} (true), the best single arm that "
        f"meets the guardrails ({best}) {single:+.3f}, the oracle plan {oracle:+.3f}.\n"
        f"The plan {'BEATS' if beats else 'does NOT beat'} the best safe single arm"
        + (f" ({plan / single:.1f}x its lift" if single > 0 else " (")
        + f"; {plan / oracle:.0%} of the oracle's).\n"
    )
    w(
        "Single arms for everyone, true "
        f"{sc.SUCCESS} lift: "
        + ", ".join(f"{a} {v:+.3f}" for a, v in r["single_arm_success"].items())
        + "\n"
    )
    acts = r["activations"]
    w(
        f"Activations: v{acts[0]['to_version']} (rev {acts[0]['revision']}), "
        f"v{acts[1]['to_version']} (rev {acts[1]['revision']}), rolled back to "
        f"v{acts[2]['to_version']} (rev {acts[2]['revision']}).\n"
    )
    entries = r.get("watch", {}).get("rollback_entries") or []
    if entries:
        e = entries[-1]
        ev = e["payload"].get("evidence", {})
        w(
            f"Guardrail watch: after launch, an injected harm to beginners broke {ev.get('guardrail')}; "
            f"its always-valid interval [{fmt_num(ev.get('interval', [None])[0])}, "
            f"{fmt_num(ev.get('interval', [None, None])[1])}] lay wholly past the limit "
            f"+{ev.get('threshold', 0):.4f} ({ev.get('units', {}).get('plan')} plan-exposed, "
            f"{ev.get('units', {}).get('holdout')} holdout members), so the watch rolled back from "
            f"v{e['payload']['from_version']} to v{e['payload']['to_version']} by itself "
            f"(audit entry {e['id']}, actor {e['actor_name']}).\n"
        )
    else:
        w("Guardrail watch: no automatic rollback happened (the harm was not confirmed in time).\n")
    w(f"Live now: v{r['live_version']}.\n")
    a = r["audit"]
    w(f"Audit chain: {'intact' if a['intact'] else 'BROKEN'}, {a['entries']} entries.\n")
    w(f"Finished in {r['seconds']} s.\n\nKeys made (secrets are shown once):\n")
    _show(
        out,
        render.table([[n, k["role"], k["secret"]] for n, k in r["keys"].items()],
                     ["name", "role", "secret"]),
    )  # fmt: skip
    w(
        f"\nReview page: {r['review_page']}\n"
        f"Try the command line: APPORTION_URL={r['url']} APPORTION_KEY=<a secret above> "
        f".venv/bin/apportion plan show {PLAN} --version 1\n"
    )


def _held_out_line(held: dict[str, Any]) -> str:
    """The draft's cross-fitted held-out success lift, for the step's output."""
    if held.get("status") != "complete":
        return f"        held-out evaluation: {held.get('error') or held.get('status')}\n"
    m = held["metrics"][sc.SUCCESS]
    return (
        f"        held-out {sc.SUCCESS} lift {m['lift']:+.4f} (se {m['se']:.4f}) on {held['folds']} "
        f"folds the model and optimizer never saw; guardrails: {held['verdict']}\n"
    )


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(
        prog="python -m apportion.demo.run", description=__doc__.split("\n")[0]
    )
    p.add_argument("--learners", type=int, default=200_000, help="simulated learners")
    p.add_argument("--seed", type=int, default=1)
    p.add_argument("--port", type=int, default=8000, help="default 8000, or a free one if taken")
    p.add_argument("--draws", type=int, default=200, help="bootstrap draws of the impact report")
    p.add_argument(
        "--held-out-folds", type=int, default=5, help="folds of each draft's held-out evaluation"
    )
    p.add_argument(
        "--serve", action="store_true", help="keep serving after the report until Ctrl-C"
    )
    p.add_argument("--json-out", default=None, help="also write the report as JSON to this file")
    args = p.parse_args(argv)
    try:
        report = run_demo(
            learners=args.learners,
            seed=args.seed,
            port=args.port,
            draws=args.draws,
            held_out_folds=args.held_out_folds,
            serve=args.serve,
        )
    except ProblemError as exc:  # the server refused a step: say which and why, like the CLI
        print(f"demo failed: {exc.one_line()}", file=sys.stderr)
        return 1
    if args.json_out:
        Path(args.json_out).write_text(json.dumps(report, indent=2, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
