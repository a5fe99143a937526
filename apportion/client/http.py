"""`ApportionClient`: the v1 routes as methods, on httpx (sync).

Every method sends one request (`activate` without a revision and `audit(all_pages=True)` send
more, as their docstrings say) and returns the parsed answer; a refused request raises
`ProblemError` with the problem+json's status, title, detail and field errors, and a server that
cannot be reached raises `Unreachable`. Tabular answers are `Rows` (`to_pandas()` in a notebook).

    with ApportionClient("http://127.0.0.1:8000", key) as api:
        started = api.fit_model("lesson-length", readout_version=1, method="causal_tree")
        job = api.wait(started["job_id"], on_progress=lambda f, s: print(f"{f:.0%} {s}"))
"""

from __future__ import annotations

import os
from collections.abc import Callable
from contextlib import AbstractContextManager, nullcontext
from typing import Any

import httpx

from apportion.client.errors import JobFailed, ProblemError, Unreachable
from apportion.client.tables import Rows
from apportion.client.waiter import Backoff, ProgressCallback, wait_for_job

ENV_URL, ENV_KEY = "APPORTION_URL", "APPORTION_KEY"
DEFAULT_URL = "http://127.0.0.1:8000"
DEFAULT_TIMEOUT = 300.0

Json = dict[str, Any]


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

    def _get(self, path: str, **params: Any) -> Any:
        query = {k: v for k, v in params.items() if v is not None}
        return self.request("GET", path, params=query)[1]

    def _post(self, path: str, body: Json) -> Any:
        return self.request("POST", path, json=body)[1]

    # ---- experiments and readouts --------------------------------------------------------------

    def create_experiment(self, declaration: Json) -> Json:
        return self._post("/v1/experiments", declaration)

    def experiment(self, key: str) -> Json:
        return self._get(f"/v1/experiments/{key}")

    def upload_readout(
        self, key: str, data: bytes, content_type: str = "text/csv"
    ) -> tuple[Json, bool]:
        """(readout, created): created is False when the same bytes were uploaded before."""
        status, body = self.request(
            "POST",
            f"/v1/experiments/{key}/readouts",
            content=data,
            headers={"Content-Type": content_type},
        )
        return body, status == 201

    def readout(self, key: str, version: int) -> Json:
        return self._get(f"/v1/experiments/{key}/readouts/{version}")

    def readout_arms(self, key: str, version: int) -> Rows:
        """A readout's per-arm summary as rows: arm, n, and `<metric>_mean`/`<metric>_se`."""
        got = self.readout(key, version)
        rows = Rows()
        for a in got.get("arms") or []:
            row: dict[str, Any] = {"arm": a["arm"], "n": a["n"]}
            for metric, m in (a.get("metrics") or {}).items():
                row[f"{metric}_mean"], row[f"{metric}_se"] = m.get("mean"), m.get("se")
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
    ) -> Json:
        """Starts a fit (202): {model_id, job_id, job}. Wait with `wait(job_id)`."""
        body: Json = {"readout_version": readout_version, "method": method, "params": params or {}}
        if success_metric:
            body["success_metric"] = success_metric
        if override_reason:
            body["override_sample_ratio"] = {"reason": override_reason}
        return self._post(f"/v1/experiments/{key}/models", body)

    def model(self, model_id: int) -> Json:
        return self._get(f"/v1/models/{model_id}")

    def job(self, job_id: str) -> Json:
        return self._get(f"/v1/jobs/{str(job_id).rsplit('/', 1)[-1]}")

    def wait(
        self,
        job_id: str,
        *,
        on_progress: ProgressCallback | None = None,
        backoff: Backoff = Backoff(),
        timeout: float | None = None,
    ) -> Json:
        """Polls a job (its id or address) until done or failed; returns its last view."""
        return wait_for_job(
            self.job, job_id, on_progress=on_progress, backoff=backoff, timeout=timeout
        )

    # ---- method comparisons --------------------------------------------------------------------

    def start_comparison(self, key: str, body: Json) -> Json:
        return self._post(f"/v1/experiments/{key}/comparisons", body)

    def comparison(self, key: str, number: int) -> Json:
        return self._get(f"/v1/experiments/{key}/comparisons/{number}")

    def comparisons(self, key: str) -> Rows:
        return Rows(self._get(f"/v1/experiments/{key}/comparisons")["comparisons"])

    # ---- plans ---------------------------------------------------------------------------------

    def plans(self) -> Rows:
        return Rows(self._get("/v1/plans")["plans"])

    def draft_plan(self, plan: str, spec: Json) -> Json:
        return self._post(f"/v1/plans/{plan}/versions", spec)

    def plan(self, plan: str) -> Json:
        return self._get(f"/v1/plans/{plan}")

    def version(self, plan: str, version: int) -> Json:
        return self._get(f"/v1/plans/{plan}/versions/{version}")

    def settle_draft(
        self,
        version: Json,
        *,
        progress: Callable[[str], AbstractContextManager[ProgressCallback | None]] | None = None,
    ) -> Json:
        """A fresh draft whose impact report (many bootstrap draws) or held-out evaluation runs
        as a job: waits for each such job, then reads the version again (approval waits for
        both). `progress(label)` opens a progress display per job. Raises JobFailed when the
        impact report's job failed (a failed held-out evaluation is reported in the version)."""
        report = version.get("report") or {}
        parts = (("impact report", report), ("held-out evaluation", report.get("held_out") or {}))
        jobs = [(w, p["job"]) for w, p in parts if p.get("status") == "pending" and p.get("job")]
        if not jobs:
            return version
        for what, address in jobs:
            label = f"{what} {version['plan']}/{version['version']}"
            with progress(label) if progress else nullcontext() as on_progress:
                finished = self.wait(address, on_progress=on_progress)
            if finished["status"] == "failed" and what == "impact report":
                raise JobFailed(f"the impact report job failed: {finished.get('error')}", finished)
        return self.version(version["plan"], version["version"])

    def approve(self, plan: str, version: int, reason: str) -> Json:
        return self._post(f"/v1/plans/{plan}/versions/{version}/approve", {"reason": reason})

    def reject(self, plan: str, version: int, reason: str) -> Json:
        return self._post(f"/v1/plans/{plan}/versions/{version}/reject", {"reason": reason})

    def activate(
        self, plan: str, version: int, reason: str, expected_revision: int | None = None
    ) -> Json:
        """Without expected_revision, reads the plan's current revision first (a change between
        that read and this call still answers 409)."""
        if expected_revision is None:
            expected_revision = int(self.plan(plan)["revision"])
        return self._post(
            f"/v1/plans/{plan}/activate",
            {"version": version, "reason": reason, "expected_revision": expected_revision},
        )

    def rollback(self, plan: str, reason: str, to_version: int | None = None) -> Json:
        body: Json = {"reason": reason}
        if to_version is not None:
            body["to_version"] = to_version
        return self._post(f"/v1/plans/{plan}/rollback", body)

    def assign(self, plan: str, member_id: str, features: Json) -> Json:
        return self._post(
            f"/v1/plans/{plan}/assign", {"member_id": member_id, "features": features}
        )

    def assign_batch(self, plan: str, members: list[Json]) -> Rows:
        got = self._post(f"/v1/plans/{plan}/assign/batch", {"members": members})
        return Rows(got["assignments"])

    # ---- the guardrail watch -------------------------------------------------------------------

    def monitor(
        self, plan: str, data: bytes, content_type: str = "text/csv", version: int | None = None
    ) -> Json:
        """Uploads post-launch rows (member_id, features, holdout, metric columns)."""
        params = {"version": version} if version is not None else None
        return self.request(
            "POST",
            f"/v1/plans/{plan}/monitor",
            content=data,
            headers={"Content-Type": content_type},
            params=params,
        )[1]

    def watch(self, plan: str) -> Json:
        return self._get(f"/v1/plans/{plan}/watch")

    def set_auto_rollback(
        self, plan: str, *, enabled: bool, min_units_per_group: int, reason: str
    ) -> Json:
        return self._post(
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
        """Audit entries, oldest first: one page, or (all_pages) every page to the end."""
        out = Rows()
        after = 0
        while True:
            page = self._get("/v1/audit", entity=entity, entity_id=entity_id, actor=actor,
                             since=since, after=after, limit=limit)  # fmt: skip
            out.extend(page["entries"])
            if not all_pages or page.get("next_after") is None:
                return out
            after = int(page["next_after"])

    def audit_verify(self) -> Json:
        return self._get("/v1/audit/verify")

    def create_key(self, name: str, role: str, *, owner: str) -> Json:
        return self._post("/v1/keys", {"name": name, "owner": owner, "role": role})
