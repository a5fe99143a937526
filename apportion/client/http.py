"""`ApportionClient`: the v1 routes as methods, on httpx (sync).

Every method sends one request (`activate` without a revision and `audit(all_pages=True)` send
more, as their docstrings say) and returns the parsed answer; a refused request raises
`ProblemError` with the problem+json's status, title, detail and field errors, and a server that
cannot be reached raises `Unreachable`. Answers are the pydantic models of `apportion.schemas`
(the models the routes declare); tabular answers are `Rows` of them (`to_pandas()` in a
notebook).

    with ApportionClient("http://127.0.0.1:8000", key) as api:
        started = api.fit_model("lesson-length", readout_version=1, method="causal_tree")
        job = api.wait(started["job_id"], on_progress=lambda f, s: print(f"{f:.0%} {s}"))
"""

from __future__ import annotations

import os
from collections.abc import Callable
from contextlib import AbstractContextManager, nullcontext
from typing import Any, TypeVar

import httpx
from pydantic import BaseModel, ValidationError

from apportion.client.errors import ClientError, JobFailed, ProblemError, Unreachable
from apportion.client.tables import Rows
from apportion.client.waiter import Backoff, ProgressCallback, wait_for_job
from apportion.schemas.assignments import AssignOut, BatchOut
from apportion.schemas.audit import AuditPage, ChainCheck
from apportion.schemas.comparisons import ComparisonList, ComparisonQueued, ComparisonView
from apportion.schemas.experiments import ExperimentView, ReadoutView
from apportion.schemas.jobs import JobView
from apportion.schemas.keys import KeyCreated
from apportion.schemas.models import FitQueued, ModelView
from apportion.schemas.plans import PlanList, PlanVersionView, PlanView, Switched
from apportion.schemas.watch import AutoRollbackView, MonitorResult, WatchView

ENV_URL, ENV_KEY = "APPORTION_URL", "APPORTION_KEY"
DEFAULT_URL = "http://127.0.0.1:8000"
DEFAULT_TIMEOUT = 300.0

Json = dict[str, Any]
A = TypeVar("A", bound=BaseModel)


class ApportionClient:
    """A client of one server acting as one key.

    `base_url` and `key` default to $APPORTION_URL (else http://127.0.0.1:8000) and
    $APPORTION_KEY. `http` may be any httpx.Client already pointed at the server (tests pass
    Starlette's TestClient); the client then leaves its closing to the caller."""

    def __init__(
        self,
        base_url: str | None = None,
        key: str | None = None,
        *,
        timeout: float = DEFAULT_TIMEOUT,
        http: httpx.Client | None = None,
    ) -> None:
        self.base_url = (base_url or os.environ.get(ENV_URL) or DEFAULT_URL).rstrip("/")
        self.key = key if key is not None else os.environ.get(ENV_KEY)
        self.timeout = timeout
        self._owns_http = http is None
        self._http = http or httpx.Client(base_url=self.base_url, timeout=timeout)
        self._headers = {"Authorization": f"Bearer {self.key}"} if self.key else {}

    def with_key(self, key: str) -> ApportionClient:
        """A client of the same server acting as another key (sharing this one's connections)."""
        other = ApportionClient(self.base_url, key, timeout=self.timeout, http=self._http)
        return other

    def close(self) -> None:
        if self._owns_http:
            self._http.close()

    def __enter__(self) -> ApportionClient:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ---- the wire ------------------------------------------------------------------------------

    def request(self, method: str, path: str, **kw: Any) -> tuple[int, Any]:
        """(status, parsed body) of a successful answer; raises ProblemError or Unreachable."""
        headers = {**self._headers, **(kw.pop("headers", None) or {})}
        try:
            r = self._http.request(method, path, headers=headers, **kw)
        except httpx.TransportError as exc:
            raise Unreachable(f"cannot reach {self.base_url}: {exc}") from exc
        body: Any
        try:
            body = r.json() if r.content else None
        except ValueError:
            body = r.text[:500]
        if r.status_code >= 400:
            raise ProblemError.from_body(r.status_code, r.reason_phrase, body)
        return r.status_code, body

    def _get(self, model: type[A], path: str, **params: Any) -> A:
        query = {k: v for k, v in params.items() if v is not None}
        return _parse(model, self.request("GET", path, params=query)[1], path)

    def _post(self, model: type[A], path: str, body: Json) -> A:
        return _parse(model, self.request("POST", path, json=body)[1], path)

    # ---- experiments and readouts --------------------------------------------------------------

    def create_experiment(self, declaration: Json) -> ExperimentView:
        return self._post(ExperimentView, "/v1/experiments", declaration)

    def experiment(self, key: str) -> ExperimentView:
        return self._get(ExperimentView, f"/v1/experiments/{key}")

    def upload_readout(
        self, key: str, data: bytes, content_type: str = "text/csv"
    ) -> tuple[ReadoutView, bool]:
        """(readout, created): created is False when the same bytes were uploaded before."""
        path = f"/v1/experiments/{key}/readouts"
        status, body = self.request(
            "POST", path, content=data, headers={"Content-Type": content_type}
        )
        return _parse(ReadoutView, body, path), status == 201

    def readout(self, key: str, version: int) -> ReadoutView:
        return self._get(ReadoutView, f"/v1/experiments/{key}/readouts/{version}")

    def readout_arms(self, key: str, version: int) -> Rows:
        """A readout's per-arm summary as rows: arm, n, and `<metric>_mean`/`<metric>_se`."""
        rows = Rows()
        for a in self.readout(key, version).arms:
            row: dict[str, Any] = {"arm": a.arm, "n": a.n}
            for metric, m in a.metrics.items():
                row[f"{metric}_mean"], row[f"{metric}_se"] = m.mean, m.se
            rows.append(row)
        return rows

    # ---- models and jobs -----------------------------------------------------------------------

    def fit_model(
        self,
        key: str,
        *,
        readout_version: int,
        method: str = "causal_tree",
        params: Json | None = None,
        success_metric: str | None = None,
        override_reason: str | None = None,
    ) -> FitQueued:
        """Starts a fit (202): model_id, job_id, job. Wait with `wait(job_id)`."""
        body: Json = {"readout_version": readout_version, "method": method, "params": params or {}}
        if success_metric:
            body["success_metric"] = success_metric
        if override_reason:
            body["override_sample_ratio"] = {"reason": override_reason}
        return self._post(FitQueued, f"/v1/experiments/{key}/models", body)

    def model(self, model_id: int) -> ModelView:
        return self._get(ModelView, f"/v1/models/{model_id}")

    def job(self, job_id: str) -> JobView:
        return self._get(JobView, f"/v1/jobs/{str(job_id).rsplit('/', 1)[-1]}")

    def wait(
        self,
        job_id: str,
        *,
        on_progress: ProgressCallback | None = None,
        backoff: Backoff = Backoff(),
        timeout: float | None = None,
    ) -> JobView:
        """Polls a job (its id or address) until done or failed; returns its last view."""
        return wait_for_job(
            self.job, job_id, on_progress=on_progress, backoff=backoff, timeout=timeout
        )

    # ---- method comparisons --------------------------------------------------------------------

    def start_comparison(self, key: str, body: Json) -> ComparisonQueued:
        return self._post(ComparisonQueued, f"/v1/experiments/{key}/comparisons", body)

    def comparison(self, key: str, number: int) -> ComparisonView:
        return self._get(ComparisonView, f"/v1/experiments/{key}/comparisons/{number}")

    def comparisons(self, key: str) -> Rows:
        """The experiment's comparisons (ComparisonListed rows), oldest first."""
        got = self._get(ComparisonList, f"/v1/experiments/{key}/comparisons")
        return Rows(got.comparisons)

    # ---- plans ---------------------------------------------------------------------------------

    def plans(self) -> Rows:
        """Every plan (PlanListed rows) with its live version."""
        return Rows(self._get(PlanList, "/v1/plans").plans)

    def draft_plan(self, plan: str, spec: Json) -> PlanVersionView:
        return self._post(PlanVersionView, f"/v1/plans/{plan}/versions", spec)

    def plan(self, plan: str) -> PlanView:
        return self._get(PlanView, f"/v1/plans/{plan}")

    def version(self, plan: str, version: int) -> PlanVersionView:
        return self._get(PlanVersionView, f"/v1/plans/{plan}/versions/{version}")

    def settle_draft(
        self,
        version: PlanVersionView,
        *,
        progress: Callable[[str], AbstractContextManager[ProgressCallback | None]] | None = None,
    ) -> PlanVersionView:
        """A fresh draft whose impact report (many bootstrap draws) or held-out evaluation runs
        as a job: waits for each such job, then reads the version again (approval waits for
        both). `progress(label)` opens a progress display per job. Raises JobFailed when the
        impact report's job failed (a failed held-out evaluation is reported in the version)."""
        report = version.report
        parts = [("impact report", report), ("held-out evaluation", report and report.held_out)]
        jobs = [(w, p.job) for w, p in parts if p is not None and p.status == "pending" and p.job]
        if not jobs:
            return version
        for what, address in jobs:
            label = f"{what} {version.plan}/{version.version}"
            with progress(label) if progress else nullcontext() as on_progress:
                finished = self.wait(address, on_progress=on_progress)
            if finished.status == "failed" and what == "impact report":
                raise JobFailed(f"the impact report job failed: {finished.error}", finished)
        return self.version(version.plan, version.version)

    def approve(self, plan: str, version: int, reason: str) -> PlanVersionView:
        path = f"/v1/plans/{plan}/versions/{version}/approve"
        return self._post(PlanVersionView, path, {"reason": reason})

    def reject(self, plan: str, version: int, reason: str) -> PlanVersionView:
        path = f"/v1/plans/{plan}/versions/{version}/reject"
        return self._post(PlanVersionView, path, {"reason": reason})

    def activate(
        self, plan: str, version: int, reason: str, expected_revision: int | None = None
    ) -> Switched:
        """Without expected_revision, reads the plan's current revision first (a change between
        that read and this call still answers 409)."""
        if expected_revision is None:
            expected_revision = self.plan(plan).revision
        return self._post(
            Switched,
            f"/v1/plans/{plan}/activate",
            {"version": version, "reason": reason, "expected_revision": expected_revision},
        )

    def rollback(self, plan: str, reason: str, to_version: int | None = None) -> Switched:
        body: Json = {"reason": reason}
        if to_version is not None:
            body["to_version"] = to_version
        return self._post(Switched, f"/v1/plans/{plan}/rollback", body)

    def assign(self, plan: str, member_id: str, features: Json) -> AssignOut:
        body = {"member_id": member_id, "features": features}
        return self._post(AssignOut, f"/v1/plans/{plan}/assign", body)

    def assign_batch(self, plan: str, members: list[Json]) -> Rows:
        """The members' assignments (AssignOut rows), in their order."""
        got = self._post(BatchOut, f"/v1/plans/{plan}/assign/batch", {"members": members})
        return Rows(got.assignments)

    # ---- the guardrail watch -------------------------------------------------------------------

    def monitor(
        self, plan: str, data: bytes, content_type: str = "text/csv", version: int | None = None
    ) -> MonitorResult:
        """Uploads post-launch rows (member_id, features, holdout, metric columns)."""
        params = {"version": version} if version is not None else None
        path = f"/v1/plans/{plan}/monitor"
        _, body = self.request(
            "POST", path, content=data, headers={"Content-Type": content_type}, params=params
        )
        return _parse(MonitorResult, body, path)

    def watch(self, plan: str) -> WatchView:
        return self._get(WatchView, f"/v1/plans/{plan}/watch")

    def set_auto_rollback(
        self, plan: str, *, enabled: bool, min_units_per_group: int, reason: str
    ) -> AutoRollbackView:
        return self._post(
            AutoRollbackView,
            f"/v1/plans/{plan}/auto-rollback",
            {"enabled": enabled, "min_units_per_group": min_units_per_group, "reason": reason},
        )

    # ---- audit and keys ------------------------------------------------------------------------

    def audit(
        self,
        *,
        entity: str | None = None,
        entity_id: str | None = None,
        actor: str | None = None,
        since: str | None = None,
        limit: int = 100,
        all_pages: bool = False,
    ) -> Rows:
        """Audit entries (AuditEntry rows), oldest first: one page, or (all_pages) every page
        to the end."""
        out = Rows()
        after = 0
        while True:
            page = self._get(AuditPage, "/v1/audit", entity=entity, entity_id=entity_id,
                             actor=actor, since=since, after=after, limit=limit)  # fmt: skip
            out.extend(page.entries)
            if not all_pages or page.next_after is None:
                return out
            after = page.next_after

    def audit_verify(self) -> ChainCheck:
        return self._get(ChainCheck, "/v1/audit/verify")

    def create_key(self, name: str, role: str, *, owner: str) -> KeyCreated:
        body = {"name": name, "owner": owner, "role": role}
        return self._post(KeyCreated, "/v1/keys", body)


def _parse(model: type[A], body: Any, path: str) -> A:
    """The answer as its schema model; an answer that does not fit it is the client's error to
    report (a server and client of different versions), not a crash."""
    try:
        return model.model_validate(body)
    except ValidationError as exc:
        raise ClientError(
            f"the answer from {path} is not a {model.__name__}: {exc.error_count()} "
            f"problem(s), first: {exc.errors()[0]['loc']} {exc.errors()[0]['msg']}"
        ) from exc
