"""The client library on a fake transport (httpx.MockTransport): refusals become one exception
type with the problem's members, answers become the schema models, the job waiter backs off and
reports progress, tabular answers turn into pandas DataFrames."""

from __future__ import annotations

import io
import json
from typing import Any

import httpx
import pytest

from apportion.client import (
    ApportionClient,
    Backoff,
    ClientError,
    JobFailed,
    JobTimeout,
    ProblemError,
    Unreachable,
    as_json,
    wait_for_job,
)
from apportion.schemas.jobs import JobView
from apportion.schemas.plans import ImpactReport, PlanVersionView

AT = "2026-12-03T17:00:00Z"


def _job(status: str, progress: float, error: str | None = None) -> dict[str, Any]:
    """A job's JSON as GET /v1/jobs/{id} sends it."""
    return {"id": "j7", "kind": "fit", "status": status, "progress": progress, "error": error,
            "attempts": 1, "created_at": AT, "started_at": AT, "finished_at": None,
            "result": None}  # fmt: skip


def _client(handler: Any, key: str | None = "s3cret") -> ApportionClient:
    http = httpx.Client(base_url="http://fake", transport=httpx.MockTransport(handler))
    return ApportionClient("http://fake", key, http=http)


def test_problem_json_becomes_one_exception_with_its_members() -> None:
    # RFC 9457 section 3.1: a problem's members are type, title, status, detail and instance;
    # the service adds `errors` (one per offending field) as an extension member (section 3.2)
    problem = {
        "type": "https://example.org/problems/invalid", "title": "Invalid request",
        "status": 422, "detail": "2 fields are invalid", "instance": "/v1/experiments",
        "errors": [{"field": "control", "problem": "not an arm"},
                   {"column": "arm", "problem": "unknown level 'zzz'"}],
    }  # fmt: skip

    def handler(request: httpx.Request) -> httpx.Response:
        return httpx.Response(
            422, json=problem, headers={"content-type": "application/problem+json"}
        )

    with _client(handler) as api, pytest.raises(ProblemError) as caught:
        api.create_experiment({"key": "x"})
    exc = caught.value
    assert (exc.status, exc.title, exc.detail) == (422, "Invalid request", "2 fields are invalid")
    assert exc.type == problem["type"] and exc.instance == "/v1/experiments"
    assert exc.errors == problem["errors"] and exc.body == problem
    assert exc.one_line() == "Invalid request (HTTP 422): 2 fields are invalid"
    assert exc.field_lines() == ["control: not an arm", "arm: unknown level 'zzz'"]


def test_a_refusal_without_a_problem_body_takes_the_reason_phrase() -> None:
    # RFC 9110 section 15.6.3: 502's reason phrase is "Bad Gateway" (httpx's table)
    with _client(lambda r: httpx.Response(502, text="<html>proxy</html>")) as api:
        with pytest.raises(ProblemError) as caught:
            api.plans()
    assert caught.value.status == 502 and caught.value.title == "Bad Gateway"
    assert caught.value.errors == [] and caught.value.body == {"detail": "<html>proxy</html>"}


def test_unreachable_server_is_its_own_error() -> None:
    def handler(request: httpx.Request) -> httpx.Response:
        raise httpx.ConnectError("connection refused", request=request)

    with _client(handler) as api, pytest.raises(Unreachable, match="cannot reach http://fake"):
        api.job("j1")


def test_every_request_carries_the_key_and_answers_become_models() -> None:
    seen: list[httpx.Request] = []

    def handler(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        body = json.loads(request.content)
        return httpx.Response(200, json={"from_version": None, "to_version": body["version"],
                                         "revision": body["expected_revision"] + 1})  # fmt: skip

    with _client(handler) as api:
        got = api.activate("p", 3, "launch", expected_revision=0)
        api.with_key("other").activate("p", 4, "next", expected_revision=1)
    assert (got.from_version, got.to_version, got.revision) == (None, 3, 1)
    assert as_json(got) == {"from_version": None, "to_version": 3, "revision": 1}
    assert [r.headers["authorization"] for r in seen] == ["Bearer s3cret", "Bearer other"]
    assert [json.loads(r.content)["reason"] for r in seen] == ["launch", "next"]
    assert {r.url.path for r in seen} == {"/v1/plans/p/activate"}


def test_an_answer_that_does_not_fit_its_model_is_a_client_error() -> None:
    with _client(lambda r: httpx.Response(200, json={"from_version": 1})) as api:
        with pytest.raises(ClientError, match="not a Switched") as caught:
            api.rollback("p", "back")
    assert not isinstance(caught.value, ProblemError)


def _job_server(statuses: list[tuple[str, float]]) -> tuple[Any, list[str]]:
    """A handler answering GET /v1/jobs/{id} with the given (status, progress) in turn."""
    paths: list[str] = []

    def handler(request: httpx.Request) -> httpx.Response:
        paths.append(request.url.path)
        status, progress = statuses[min(len(paths) - 1, len(statuses) - 1)]
        return httpx.Response(200, json=_job(status, progress))

    return handler, paths


def test_waiter_backs_off_geometrically_up_to_the_cap_and_reports_progress() -> None:
    answers = [("queued", 0.0)] + [("running", i / 10) for i in range(1, 8)] + [("done", 1.0)]
    handler, paths = _job_server(answers)
    slept: list[float] = []
    progress: list[tuple[float, str]] = []
    backoff = Backoff(first=0.1, factor=2.0, maximum=1.0)
    with _client(handler) as api:
        job = wait_for_job(api.job, "/v1/jobs/j7", on_progress=lambda f, s: progress.append((f, s)),
                           backoff=backoff, sleep=slept.append)  # fmt: skip
    assert isinstance(job, JobView) and job.status == "done"
    assert paths == ["/v1/jobs/j7"] * len(answers)  # the address's id, one poll per answer
    # common practice for polling: exponential backoff with a cap; intervals first * factor^i
    expected = [min(0.1 * 2.0**i, 1.0) for i in range(len(answers) - 1)]
    assert slept == pytest.approx(expected)
    assert slept[-1] == 1.0 and slept[:4] == pytest.approx([0.1, 0.2, 0.4, 0.8])
    assert progress == [(p if s != "done" else 1.0, s) for s, p in answers]


def test_waiter_returns_a_failed_job_for_the_caller_to_judge() -> None:
    handler, _ = _job_server([("running", 0.5), ("failed", 0.5)])
    with _client(handler) as api:
        job = api.wait("j7", backoff=Backoff(first=0.001, maximum=0.001))
    assert job.status == "failed"


def test_waiter_gives_up_after_its_timeout_with_the_last_view() -> None:
    handler, paths = _job_server([("running", 0.25)])
    now = [0.0]

    def sleep(seconds: float) -> None:
        now[0] += seconds

    with _client(handler) as api, pytest.raises(JobTimeout) as caught:
        wait_for_job(api.job, "j7", backoff=Backoff(first=1.0, factor=1.0, maximum=1.0),
                     timeout=5.0, sleep=sleep, clock=lambda: now[0])  # fmt: skip
    assert caught.value.job.progress == 0.25 and "apportion job show j7" in str(caught.value)
    assert len(paths) == 6  # looks at t = 0, 1, 2, 3, 4 and 5 s; gives up at 5 s


def test_backoff_rejects_intervals_that_cannot_work() -> None:
    for bad in ({"first": 0.0}, {"factor": 0.5}, {"first": 2.0, "maximum": 1.0}):
        with pytest.raises(ValueError, match="backoff needs"):
            Backoff(**bad)


def test_settle_draft_waits_for_the_report_job_and_reads_the_version_again() -> None:
    calls: list[str] = []

    def handler(request: httpx.Request) -> httpx.Response:
        calls.append(request.url.path)
        return httpx.Response(200, json=_job("failed", 1.0, "solver gave up"))

    def draft(**report: Any) -> PlanVersionView:  # the parts settle_draft reads
        return PlanVersionView.model_construct(
            plan="p", version=2, report=ImpactReport.model_construct(held_out=None, **report)
        )

    with _client(handler) as api, pytest.raises(JobFailed, match="solver gave up"):
        api.settle_draft(draft(status="pending", job="/v1/jobs/r1"))
    assert calls == ["/v1/jobs/r1"]
    done = draft(status="complete", job=None)
    with _client(handler) as api:
        assert api.settle_draft(done) is done  # nothing pending: no request at all
    assert calls == ["/v1/jobs/r1"]


def test_audit_follows_pages_to_the_end() -> None:
    entries = [{"id": i, "at": AT, "actor_name": "ana", "actor_role": "analyst",
                "action": f"a{i}", "entity": "plan", "entity_id": "p", "reason": None,
                "payload": {}, "prev_hash": "0" * 64, "hash": f"{i:064x}"}
               for i in range(1, 6)]  # fmt: skip

    def handler(request: httpx.Request) -> httpx.Response:
        after, limit = int(request.url.params["after"]), int(request.url.params["limit"])
        page = [e for e in entries if e["id"] > after][:limit]
        more = page and page[-1]["id"] < entries[-1]["id"]
        return httpx.Response(200, json={"entries": page,
                                         "next_after": page[-1]["id"] if more else None})  # fmt: skip

    with _client(handler) as api:
        assert [e.id for e in api.audit(limit=2)] == [1, 2]
        assert [e.id for e in api.audit(limit=2, all_pages=True)] == [1, 2, 3, 4, 5]


def test_tabular_answers_become_dataframes() -> None:
    pd = pytest.importorskip("pandas")
    plans = [
        {"plan": "a", "live_version": 2, "revision": 3, "versions": 2, "latest": 2,
         "latest_status": "active"},
        {"plan": "b", "live_version": None, "revision": 0, "versions": 1, "latest": 1,
         "latest_status": "draft"},
    ]  # fmt: skip

    def arm(name: str, n: int, mean: float, se: float) -> dict[str, Any]:
        est = {"mean": mean, "se": se, "effect": None, "effect_se": None}
        return {"arm": name, "n": n, "metrics": {"spend": est}}

    readout = {
        "experiment": "x", "version": 1, "content_hash": "ab", "content_type": "text/csv",
        "created_at": AT, "created_by": "ana", "n_rows": 22, "control": "control",
        "arm_counts": {"control": 10, "bold": 12},
        "sample_ratio": {"statistic": 0.18, "df": 1, "p_value": 0.67, "flagged": False,
                         "threshold": 0.001, "observed": [10, 12], "expected": [11, 11]},
        "arms": [arm("control", 10, 1.5, 0.1), arm("bold", 12, 2.0, 0.2)],
    }  # fmt: skip

    def handler(request: httpx.Request) -> httpx.Response:
        return httpx.Response(
            200, json=readout if "readouts" in request.url.path else {"plans": plans}
        )

    with _client(handler) as api:
        frame = api.plans().to_pandas()
        arms = api.readout_arms("x", 1).to_pandas()
    # the reference: pandas' own reading of the same JSON records (pandas.read_json)
    expected = pd.read_json(io.StringIO(json.dumps(plans)), orient="records")
    assert list(frame.columns) == list(plans[0])
    assert frame["plan"].tolist() == expected["plan"].tolist() == ["a", "b"]
    assert frame["revision"].tolist() == expected["revision"].tolist()
    assert frame["live_version"].isna().tolist() == [False, True]
    assert list(arms.columns) == ["arm", "n", "spend_mean", "spend_se"]
    assert arms.set_index("arm").loc["bold", "spend_mean"] == 2.0
    assert arms["n"].sum() == 22
