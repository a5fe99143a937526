"""HTTP client commands for analysts: they talk to a running server, never to the database.

Two layers. `Api` is a thin, typed wrapper of the v1 routes (design §4) that returns the parsed JSON
and raises `ApiError` carrying the problem+json title, detail and field errors; `wait_for_job` polls
`GET /v1/jobs/{id}` with an optional `ProgressBar`. The `cmd_*` functions are the `apportion`
commands built on them: tables for people by default, the server's JSON with `--json`. The demo
(`apportion/demo/run.py`) drives the same `Api` methods and `wait_for_job`, so every step of the demo is
a step this command line can do against a running server.

Connection: `--url` / `APPORTION_URL` (default http://127.0.0.1:8000) and `--key` / `APPORTION_KEY`.
Exit codes: 0 done, 1 the server refused (problem+json printed) or a job failed, 2 a local problem
(unreadable file, bad option value, server unreachable).
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any, TextIO

import httpx

# the model methods the server offers (apportion.stats.models.METHODS; a test keeps them equal)
MODEL_METHODS = (
    "global", "segments", "causal_tree", "intersect", "two_model", "forest", "policy_tree",
)  # fmt: skip

ENV_URL, ENV_KEY = "APPORTION_URL", "APPORTION_KEY"
DEFAULT_URL = "http://127.0.0.1:8000"
CONTENT_TYPES = {
    ".csv": "text/csv",
    ".parquet": "application/vnd.apache.parquet",
    ".pq": "application/vnd.apache.parquet",
    ".ndjson": "application/x-ndjson",
    ".jsonl": "application/x-ndjson",
}


# ---- the HTTP layer ----------------------------------------------------------------------------


class ApiError(Exception):
    """A refused request: the problem+json body's title, detail and field errors."""

    def __init__(
        self,
        status: int,
        title: str,
        detail: str,
        errors: list[dict[str, Any]] | None = None,
        body: dict[str, Any] | None = None,
    ) -> None:
        super().__init__(f"{title}: {detail}")
        self.status, self.title, self.detail = status, title, detail
        self.errors = errors or []
        self.body = body or {}


class LocalError(Exception):
    """A problem on this side of the wire (a file, an option value, an unreachable server)."""


class JobFailed(Exception):
    """A job the command waited for ended as failed (its error is the message)."""


class Api:
    """The v1 routes as methods. `client` may be any httpx.Client (tests pass their own)."""

    def __init__(
        self,
        url: str | None = None,
        key: str | None = None,
        *,
        timeout: float = 300.0,
        client: httpx.Client | None = None,
    ) -> None:
        self.url = (url or os.environ.get(ENV_URL) or DEFAULT_URL).rstrip("/")
        self.key = key if key is not None else os.environ.get(ENV_KEY)
        headers = {"Authorization": f"Bearer {self.key}"} if self.key else {}
        self._http = client or httpx.Client(base_url=self.url, timeout=timeout, headers=headers)
        if client is not None and self.key:
            self._http.headers["Authorization"] = f"Bearer {self.key}"

    def with_key(self, key: str) -> Api:
        """Another client for the same server acting as another key."""
        return Api(self.url, key, timeout=self._http.timeout.read or 300.0)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Api:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def request(self, method: str, path: str, **kw: Any) -> tuple[int, Any]:
        """(status, parsed body); raises ApiError for 4xx/5xx and LocalError when unreachable."""
        try:
            r = self._http.request(method, path, **kw)
        except httpx.TransportError as exc:
            raise LocalError(f"cannot reach {self.url}: {exc}") from exc
        body: Any
        try:
            body = r.json() if r.content else None
        except ValueError:
            body = {"detail": r.text[:500]}
        if r.status_code >= 400:
            b = body if isinstance(body, dict) else {}
            raise ApiError(
                r.status_code,
                str(b.get("title") or r.reason_phrase or "Error"),
                str(b.get("detail") or ""),
                b.get("errors") if isinstance(b.get("errors"), list) else None,
                b,
            )
        return r.status_code, body

    def _get(self, path: str, **params: Any) -> Any:
        return self.request("GET", path, params={k: v for k, v in params.items() if v is not None})[
            1
        ]

    def _post(self, path: str, body: dict[str, Any]) -> Any:
        return self.request("POST", path, json=body)[1]

    # experiments and readouts
    def create_experiment(self, declaration: dict[str, Any]) -> dict[str, Any]:
        return self._post("/v1/experiments", declaration)

    def get_experiment(self, key: str) -> dict[str, Any]:
        return self._get(f"/v1/experiments/{key}")

    def upload_readout(
        self, key: str, data: bytes, content_type: str = "text/csv"
    ) -> tuple[dict[str, Any], bool]:
        """(readout view, created): created is False when the same bytes were uploaded before."""
        status, body = self.request(
            "POST",
            f"/v1/experiments/{key}/readouts",
            content=data,
            headers={"Content-Type": content_type},
        )
        return body, status == 201

    def get_readout(self, key: str, version: int) -> dict[str, Any]:
        return self._get(f"/v1/experiments/{key}/readouts/{version}")

    # models and jobs
    def fit_model(
        self,
        key: str,
        *,
        readout_version: int,
        method: str = "causal_tree",
        params: dict[str, Any] | None = None,
        success_metric: str | None = None,
        override_reason: str | None = None,
    ) -> dict[str, Any]:
        body: dict[str, Any] = {
            "readout_version": readout_version,
            "method": method,
            "params": params or {},
        }
        if success_metric:
            body["success_metric"] = success_metric
        if override_reason:
            body["override_sample_ratio"] = {"reason": override_reason}
        return self._post(f"/v1/experiments/{key}/models", body)

    def get_model(self, model_id: int) -> dict[str, Any]:
        return self._get(f"/v1/models/{model_id}")

    def get_job(self, job_id: str) -> dict[str, Any]:
        return self._get(f"/v1/jobs/{job_id}")

    # method comparisons
    def start_comparison(self, key: str, body: dict[str, Any]) -> dict[str, Any]:
        return self._post(f"/v1/experiments/{key}/comparisons", body)

    def get_comparison(self, key: str, number: int) -> dict[str, Any]:
        return self._get(f"/v1/experiments/{key}/comparisons/{number}")

    def list_comparisons(self, key: str) -> dict[str, Any]:
        return self._get(f"/v1/experiments/{key}/comparisons")

    # plans
    def list_plans(self) -> list[dict[str, Any]]:
        return self._get("/v1/plans")["plans"]

    def draft_plan(self, plan: str, spec: dict[str, Any]) -> dict[str, Any]:
        return self._post(f"/v1/plans/{plan}/versions", spec)

    def get_plan(self, plan: str) -> dict[str, Any]:
        return self._get(f"/v1/plans/{plan}")

    def get_version(self, plan: str, version: int) -> dict[str, Any]:
        return self._get(f"/v1/plans/{plan}/versions/{version}")

    def approve(self, plan: str, version: int, reason: str) -> dict[str, Any]:
        return self._post(f"/v1/plans/{plan}/versions/{version}/approve", {"reason": reason})

    def reject(self, plan: str, version: int, reason: str) -> dict[str, Any]:
        return self._post(f"/v1/plans/{plan}/versions/{version}/reject", {"reason": reason})

    def activate(
        self, plan: str, version: int, reason: str, expected_revision: int | None = None
    ) -> dict[str, Any]:
        """Without expected_revision, reads the plan's current revision first (so a concurrent
        change between that read and this call still answers 409)."""
        if expected_revision is None:
            expected_revision = int(self.get_plan(plan)["revision"])
        return self._post(
            f"/v1/plans/{plan}/activate",
            {"version": version, "reason": reason, "expected_revision": expected_revision},
        )

    def rollback(self, plan: str, reason: str, to_version: int | None = None) -> dict[str, Any]:
        body: dict[str, Any] = {"reason": reason}
        if to_version is not None:
            body["to_version"] = to_version
        return self._post(f"/v1/plans/{plan}/rollback", body)

    def assign(self, plan: str, member_id: str, features: dict[str, Any]) -> dict[str, Any]:
        return self._post(
            f"/v1/plans/{plan}/assign", {"member_id": member_id, "features": features}
        )

    def assign_batch(self, plan: str, members: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return self._post(f"/v1/plans/{plan}/assign/batch", {"members": members})["assignments"]

    # the guardrail watch
    def monitor(
        self, plan: str, data: bytes, content_type: str = "text/csv", version: int | None = None
    ) -> dict[str, Any]:
        """Upload post-launch rows (member_id, features, holdout, metric columns)."""
        params = {"version": version} if version is not None else None
        _, body = self.request(
            "POST",
            f"/v1/plans/{plan}/monitor",
            content=data,
            headers={"Content-Type": content_type},
            params=params,
        )
        return body

    def watch(self, plan: str) -> dict[str, Any]:
        return self._get(f"/v1/plans/{plan}/watch")

    def set_auto_rollback(
        self, plan: str, *, enabled: bool, min_units_per_group: int, reason: str
    ) -> dict[str, Any]:
        return self._post(
            f"/v1/plans/{plan}/auto-rollback",
            {"enabled": enabled, "min_units_per_group": min_units_per_group, "reason": reason},
        )

    # audit and keys
    def audit(
        self,
        *,
        entity: str | None = None,
        entity_id: str | None = None,
        actor: str | None = None,
        since: str | None = None,
        limit: int = 100,
        all_pages: bool = False,
    ) -> list[dict[str, Any]]:
        out: list[dict[str, Any]] = []
        after = 0
        while True:
            page = self._get(
                "/v1/audit",
                entity=entity,
                entity_id=entity_id,
                actor=actor,
                since=since,
                after=after,
                limit=limit,
            )
            out.extend(page["entries"])
            if not all_pages or page.get("next_after") is None:
                return out
            after = int(page["next_after"])

    def audit_verify(self) -> dict[str, Any]:
        return self._get("/v1/audit/verify")

    def create_key(self, name: str, role: str, *, owner: str) -> dict[str, Any]:
        return self._post("/v1/keys", {"name": name, "owner": owner, "role": role})


class ProgressBar:
    """A text bar on a stream (stderr): redrawn in place on a terminal, one line per tenth
    otherwise (so logs stay short)."""

    def __init__(self, label: str, stream: TextIO | None = None, width: int = 30) -> None:
        self.label, self.stream, self.width = label, stream or sys.stderr, width
        self._tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self._last: tuple[int, str] | None = None

    def update(self, fraction: float, status: str) -> None:
        f = min(max(float(fraction), 0.0), 1.0)
        if self._tty:
            filled = round(f * self.width)
            bar = "#" * filled + "." * (self.width - filled)
            self.stream.write(f"\r{self.label} [{bar}] {f:4.0%} {status:<8}")
            self.stream.flush()
            return
        mark = (math.floor(f * 10), status)
        if mark != self._last:
            self._last = mark
            self.stream.write(f"{self.label}: {f:.0%} {status}\n")
            self.stream.flush()

    def close(self) -> None:
        if self._tty:
            self.stream.write("\n")
            self.stream.flush()


def wait_for_job(
    api: Api,
    job_id: str,
    *,
    bar: ProgressBar | None = None,
    poll_seconds: float = 0.2,
    timeout_seconds: float | None = None,
) -> dict[str, Any]:
    """Poll a job until it is done or failed; returns the last job view (check its status)."""
    start = time.monotonic()
    try:
        while True:
            job = api.get_job(job_id)
            if bar is not None:
                bar.update(1.0 if job["status"] == "done" else job["progress"], job["status"])
            if job["status"] in ("done", "failed"):
                return job
            if timeout_seconds is not None and time.monotonic() - start > timeout_seconds:
                raise LocalError(
                    f"job {job_id} still {job['status']} after {timeout_seconds:.0f} s; "
                    f"follow it with 'apportion job show {job_id}'"
                )
            time.sleep(poll_seconds)
    finally:
        if bar is not None:
            bar.close()


# ---- formatting --------------------------------------------------------------------------------


def format_table(rows: Sequence[Sequence[Any]], headers: Sequence[str]) -> str:
    """Plain aligned columns: numbers right-aligned, everything else left-aligned."""
    cells = [[_cell(v) for v in row] for row in rows]
    widths = [len(h) for h in headers]
    for row in cells:
        for i, c in enumerate(row):
            widths[i] = max(widths[i], len(c))
    numeric = [
        all(_is_number(row[i]) for row in rows if row[i] not in (None, "")) and bool(rows)
        for i in range(len(headers))
    ]

    def line(values: Sequence[str]) -> str:
        parts = [
            v.rjust(widths[i]) if numeric[i] else v.ljust(widths[i]) for i, v in enumerate(values)
        ]
        return "  ".join(parts).rstrip()

    out = [line(list(headers)), line(["-" * w for w in widths])]
    out.extend(line(row) for row in cells)
    return "\n".join(out)


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool)


def _cell(v: Any) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.4g}" if abs(v) >= 1e-4 or v == 0 else f"{v:.2e}"
    return str(v)


def fmt_num(x: float | None, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:+.{digits}f}"


def fmt_arms(arms: dict[str, float]) -> str:
    """{'ten_min': 0.6, 'adaptive': 0.4, 'five_min': 0} -> 'ten_min 60%, adaptive 40%'."""
    parts = [(a, s) for a, s in arms.items() if s >= 0.005]  # below half a per cent: noise
    parts.sort(key=lambda p: -p[1])
    return ", ".join(a if s > 0.9995 else f"{a} {s:.0%}" for a, s in parts)


def _kv(pairs: Iterable[tuple[str, Any]]) -> str:
    items = [(k, _cell(v)) for k, v in pairs]
    w = max((len(k) for k, _ in items), default=0)
    return "\n".join(f"{k.ljust(w)}  {v}" for k, v in items)


def report_metric_rows(version: dict[str, Any]) -> list[dict[str, Any]]:
    """The impact report (apportion/optimize/report.py) as one row per metric, the success metric
    first: metric, role, lift (point estimate), projected (corrected for the optimizer's curse),
    low/high (its interval), threshold and unit (guardrails; lifts are in the threshold's unit, so
    a relative guardrail's lifts are per cent of the baseline), holds (probability)."""
    entries = (version.get("report") or {}).get("metrics") or []
    rows = [
        {
            "metric": e.get("metric"),
            "role": e.get("role"),
            "lift": e.get("lift"),
            "projected": e.get("corrected_lift"),
            "low": (e.get("interval") or [None, None])[0],
            "high": (e.get("interval") or [None, None])[1],
            "threshold": e.get("threshold"),
            "unit": e.get("unit") or "absolute",
            "holds": e.get("probability_holds"),
        }
        for e in entries
        if isinstance(e, dict)
    ]
    rows.sort(key=lambda r: r["role"] != "success")
    return rows


def _unit_label(unit: str) -> str:
    return "rel%" if unit == "relative" else "abs"


def render_version(v: dict[str, Any]) -> str:
    spec = v.get("spec") or {}
    holdout = spec.get("holdout") or {}
    head = _kv(
        [
            ("plan version", f"{v['plan']}/{v['version']}"),
            ("status", v["status"] + (" (live)" if v.get("live") else "")),
            ("model", v.get("model_id")),
            ("author", v.get("author")),
            ("decided by", v.get("decided_by")),
            ("method", f"{spec.get('method')} / {spec.get('allocation')}"),
            ("success metric", spec.get("success_metric")),
            ("baseline", spec.get("baseline")),
            ("holdout", f"{holdout.get('share', 0):.1%} on {holdout.get('arm')}"),
            ("report", (v.get("report") or {}).get("status")),
        ]
    )
    cohorts = (v.get("allocation") or {}).get("cohorts") or []
    ctab = format_table(
        [[c["id"], f"{c['share']:.1%}", fmt_arms(c["arms"]), c["rule"]] for c in cohorts],
        ["cohort", "share", "arms", "rule"],
    )
    parts = [head, "", ctab]
    rows = report_metric_rows(v)
    if rows:
        parts += [
            "",
            "impact against the baseline (projected = corrected for the optimizer's curse; unit"
            " abs = the metric's own units, rel% = per cent of the baseline's value):",
            format_table(
                [
                    [
                        r["metric"],
                        r["role"],
                        _unit_label(r["unit"]),
                        fmt_num(r["lift"]),
                        fmt_num(r["projected"]),
                        f"[{fmt_num(r['low'])}, {fmt_num(r['high'])}]",
                        fmt_num(r["threshold"]),
                        "" if r["holds"] is None else f"{r['holds']:.3f}",
                    ]
                    for r in rows
                ],
                ["metric", "role", "unit", "lift", "projected", "interval", "allowed", "P(holds)"],
            ),
        ]
    parts += render_prices((v.get("report") or {}).get("guardrail_prices") or [])
    parts += render_held_out((v.get("report") or {}).get("held_out"))
    diff = v.get("diff")
    if diff:
        parts += [
            "",
            f"against live version {diff['live_version']}: {diff['share_changed']:.1%} of "
            f"{diff['members']} readout members would change arm"
            + (
                f" (a uniform sample of the readout's {diff['readout_rows']})"
                if diff.get("sampled")
                else ""
            ),
        ]
    return "\n".join(parts)


def render_held_out(held: Any) -> list[str]:
    """The draft's cross-fitted held-out evaluation: its figures, or why there are none yet."""
    if not isinstance(held, dict):
        return []
    if held.get("status") != "complete":
        why = held.get("error") or {"pending": "running (see its job)"}.get(
            str(held.get("status")), str(held.get("status"))
        )
        return ["", f"held-out evaluation: {why}"]
    table = [
        [k, fmt_num(m["lift"]), fmt_num(m["se"]).lstrip("+"), fmt_num(m.get("threshold_absolute")),
         "" if m.get("probability_holds") is None else f"{m['probability_holds']:.3f}"]
        for k, m in (held.get("metrics") or {}).items()
    ]  # fmt: skip
    return [
        "",
        f"held-out evaluation ({held.get('folds')} folds the model and optimizer never saw; "
        f"against all-control): {held.get('verdict')}",
        format_table(table, ["metric", "lift", "se", "allowed", "P(holds)"]),
    ]


def render_prices(rows: list[dict[str, Any]]) -> list[str]:
    """The report's guardrail prices and the success lift at five thresholds around each one."""
    if not rows:
        return []
    table = []
    for r in rows:
        lifts = [fmt_num(p["lift"]) if "lift" in p else p.get("status", "-").split(" ")[0]
                 for p in r["points"]]  # fmt: skip
        table.append([r["metric"], _unit_label(r["unit"]), fmt_num(r["price"]),
                      " ".join(fmt_num(p["threshold"]) for p in r["points"]), " ".join(lifts)])  # fmt: skip
    return [
        "",
        "guardrail prices (success lift bought by one more unit of allowed harm) and the success"
        " lift at five thresholds around the chosen one (the middle):",
        format_table(table, ["guardrail", "unit", "price", "thresholds", "success lift"]),
    ]


def render_model(m: dict[str, Any]) -> str:
    head = _kv(
        [
            ("model", m["id"]),
            ("experiment", f"{m['experiment']} (readout {m.get('version')})"),
            ("method", m["method"]),
            ("status", m["status"]),
            ("progress", f"{float(m.get('progress') or 0):.0%}"),
        ]
    )
    if m["status"] == "failed":
        return head + f"\nerror: {m.get('error')}"
    if m["status"] != "done":
        return head
    arms = m["arms"]
    cohorts = m["cohorts"]
    parts = [
        head,
        "",
        format_table(
            [[c["id"], f"{(c['share'] or 0):.1%}", c["rule"]] for c in cohorts],
            ["cohort", "share", "rule"],
        ),
    ]
    metrics = list(cohorts[0]["estimates"]) if cohorts else []
    rows = []
    for c in cohorts:
        for a in arms[1:]:
            row: list[Any] = [c["id"], a]
            for k in metrics:
                e = c["estimates"][k][a]
                row.append(
                    "-"
                    if e["effect"] is None
                    else f"{e['effect']:+.4f} ± {(e['effect_se'] or 0) * 1.96:.4f}"
                )
            rows.append(row)
    parts += [
        "",
        f"effects against {arms[0]} (estimate ± 1.96 standard errors):",
        format_table(rows, ["cohort", "arm", *metrics]),
    ]
    prices = (m.get("diagnostics") or {}).get("guardrail_prices")
    if prices:
        parts += ["", "guardrail prices that shaped the partition (structure half): " + ", ".join(
            f"{k} {fmt_num(v)}" for k, v in prices.items())]  # fmt: skip
    return "\n".join(parts)


def _emit(args: argparse.Namespace, data: Any, human: Callable[[], str]) -> None:
    if getattr(args, "json", False):
        print(json.dumps(data, indent=2, default=str))
    else:
        print(human())


# ---- argument helpers --------------------------------------------------------------------------


def parse_value(text: str) -> Any:
    """`--param`/`--feature` values: JSON when it parses (5, 0.5, true, null, "10", [1,2]),
    otherwise the text itself (beginner). Quote a number to send it as a string: level='"10"'."""
    try:
        return json.loads(text)
    except ValueError:
        return text


def parse_pairs(items: Sequence[str] | None, what: str) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for item in items or []:
        k, sep, v = item.partition("=")
        if not sep or not k:
            raise LocalError(f"{what} must look like name=value, got '{item}'")
        out[k.strip()] = parse_value(v)
    return out


def read_json_file(path: str) -> Any:
    try:
        text = sys.stdin.read() if path == "-" else Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise LocalError(f"cannot read {path}: {exc.strerror or exc}") from exc
    try:
        return json.loads(text)
    except ValueError as exc:
        raise LocalError(f"{path} is not valid JSON: {exc}") from exc


def _api(args: argparse.Namespace) -> Api:
    return Api(args.url, args.api_key, timeout=args.timeout)


def _command(fn: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    """Maps ApiError and LocalError to a message on stderr and a non-zero exit code."""

    def run(args: argparse.Namespace) -> int:
        try:
            return fn(args)
        except ApiError as exc:
            print(f"error: {exc.title} (HTTP {exc.status})", file=sys.stderr)
            if exc.detail:
                print(exc.detail, file=sys.stderr)
            for e in exc.errors[:20]:
                where = e.get("field") or e.get("column") or e.get("parameter") or ""
                what = e.get("problem") or e.get("message") or ""
                print(f"  - {where}: {what}".rstrip(": "), file=sys.stderr)
            return 1
        except JobFailed as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 1
        except LocalError as exc:
            print(f"error: {exc}", file=sys.stderr)
            return 2

    run.__doc__ = fn.__doc__
    return run


# ---- commands ----------------------------------------------------------------------------------


@_command
def cmd_experiment_create(args: argparse.Namespace) -> int:
    decl = read_json_file(args.file)
    with _api(args) as api:
        got = api.create_experiment(decl)
    _emit(
        args,
        got,
        lambda: (
            f"declared experiment '{got['key']}': {len(got['arms'])} arms (control "
            f"{got['control']}), {len(got['metrics'])} metrics, {len(got.get('features', []))} features"
        ),
    )
    return 0


@_command
def cmd_experiment_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.get_experiment(args.key)

    def human() -> str:
        arms = format_table([[a["key"], a["share"]] for a in got["arms"]], ["arm", "design share"])
        metrics = format_table(
            [[m["key"], m["kind"], m.get("direction")] for m in got["metrics"]],
            ["metric", "kind", "direction"],
        )
        readouts = format_table(
            [
                [
                    r["version"],
                    r["n_rows"],
                    "flagged" if (r.get("sample_ratio") or {}).get("flagged") else "ok",
                    r["content_hash"][:12],
                    r["created_at"],
                ]
                for r in got["readouts"]
            ],
            ["readout", "rows", "sample ratio", "hash", "created"],
        )
        return f"experiment {got['key']} ({got.get('name') or ''})\n\n{arms}\n\n{metrics}\n\n{readouts}"

    _emit(args, got, human)
    return 0


def _readout_human(got: dict[str, Any], created: bool | None = None) -> str:
    srm = got.get("sample_ratio") or {}
    lines = []
    if created is not None:
        lines.append(
            f"readout {got['experiment']}/{got['version']}: "
            + ("stored" if created else "these bytes were uploaded before; the existing version")
        )
    lines.append(
        f"{got['n_rows']} rows, hash {got['content_hash'][:12]}; sample-ratio check "
        f"{'FLAGGED' if srm.get('flagged') else 'ok'} (p = {srm.get('p_value', float('nan')):.3g})"
    )
    arms = got.get("arms") or []
    metrics = list(arms[0]["metrics"]) if arms else []
    rows = [
        [a["arm"], a["n"]]
        + [
            f"{a['metrics'][k]['mean']:.4g} ± {a['metrics'][k]['se']:.2g}"
            if a["metrics"][k]["mean"] is not None
            else "-"
            for k in metrics
        ]
        for a in arms
    ]
    lines += ["", format_table(rows, ["arm", "n", *metrics])]
    for w in got.get("warnings") or []:
        lines.append(f"warning: {w}")
    return "\n".join(lines)


def read_upload(file: str, content_type: str | None) -> tuple[bytes, str]:
    """(bytes, content type) of an upload file; the type from the extension unless given."""
    path = Path(file)
    ctype = content_type or CONTENT_TYPES.get(path.suffix.lower())
    if ctype is None:
        raise LocalError(
            f"cannot tell the format of '{path.name}' from its extension; give --content-type "
            f"({', '.join(sorted(set(CONTENT_TYPES.values())))})"
        )
    try:
        return path.read_bytes(), ctype
    except OSError as exc:
        raise LocalError(f"cannot read {path}: {exc.strerror or exc}") from exc


@_command
def cmd_readout_upload(args: argparse.Namespace) -> int:
    data, ctype = read_upload(args.file, args.content_type)
    with _api(args) as api:
        got, created = api.upload_readout(args.key, data, ctype)
    _emit(args, {**got, "created": created}, lambda: _readout_human(got, created))
    return 0


@_command
def cmd_readout_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.get_readout(args.key, args.version)
    _emit(args, got, lambda: _readout_human(got))
    return 0


@_command
def cmd_model_fit(args: argparse.Namespace) -> int:
    params = parse_pairs(args.param, "--param")
    with _api(args) as api:
        started = api.fit_model(
            args.key,
            readout_version=args.readout,
            method=args.method,
            params=params,
            success_metric=args.success_metric,
            override_reason=args.override_sample_ratio,
        )
        if args.no_wait:
            _emit(
                args,
                started,
                lambda: (
                    f"model {started['model_id']} queued as job {started['job_id']}; "
                    f"follow it with 'apportion job show {started['job_id']}'"
                ),
            )
            return 0
        bar = None if args.json else ProgressBar(f"fitting model {started['model_id']}")
        job = wait_for_job(api, started["job_id"], bar=bar)
        model = api.get_model(started["model_id"])
    _emit(args, model, lambda: render_model(model))
    if job["status"] == "failed":
        print(f"error: the fit failed: {job.get('error')}", file=sys.stderr)
        return 1
    return 0


@_command
def cmd_model_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.get_model(args.id)
    _emit(args, got, lambda: render_model(got))
    return 0


@_command
def cmd_job_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.get_job(args.id)
    _emit(
        args,
        got,
        lambda: _kv(
            [
                ("job", got["id"]),
                ("kind", got["kind"]),
                ("status", got["status"]),
                ("progress", f"{got['progress']:.0%}"),
                ("error", got.get("error")),
            ]
        ),
    )
    return 0 if got["status"] != "failed" else 1


def render_comparison(c: dict[str, Any]) -> str:
    """A comparison: what was compared, then (when done) one row per candidate in the server's
    order (guardrails holding on held-out folds first, by held-out success lift), every
    guardrail's held-out lift beside it, and the recommendation with its reason."""
    spec = c.get("spec") or {}
    head = _kv(
        [
            ("comparison", f"{c['experiment']} #{c['number']}"),
            ("readout", c.get("readout_version")),
            ("success metric", spec.get("success_metric")),
            ("folds", spec.get("folds")),
            ("status", c["status"]),
        ]
    )
    if c["status"] == "failed":
        return f"{head}\n\nthe comparison failed: {c.get('error')}"
    if c["status"] != "done":
        return f"{head}\nprogress  {c.get('progress', 0):.0%}"
    success = spec.get("success_metric")
    guards = [g["metric"] for g in spec.get("guardrails") or []]
    rows = []
    failed = [r for r in c.get("table") or [] if r["status"] == "failed"]
    for r in c.get("table") or []:
        m = r["metrics"]
        if r["status"] == "failed":  # left the comparison; its reason is printed below
            rows.append(
                ["-", r["candidate"], "failed", *["-"] * (len(guards) + 1), "-", r["seconds"]]
            )
            continue
        cells = [r["rank"], r["candidate"], r["status"],
                 f"{fmt_num(m[success]['lift'])} ± {m[success]['se']:.4f}"]  # fmt: skip
        cells += [f"{fmt_num(m[g]['lift'])} ± {m[g]['se']:.4f}" for g in guards]
        cells += [r.get("folds_without_plan"), r.get("seconds")]
        rows.append(cells)
    headers = ["rank", "candidate", "guardrails", f"{success} lift"]
    headers += [f"{g} lift" for g in guards] + ["folds w/o plan", "seconds"]
    rec = c.get("recommended")
    allowed = []
    for g in guards:  # the same allowance for every candidate (relative ones in metric units)
        t = next((r["metrics"][g].get("threshold_absolute") for r in c.get("table") or []
                  if r["metrics"]), None)  # fmt: skip
        if t is not None:
            allowed.append(f"{g} {'>=' if t < 0 else '<='} {fmt_num(t)}")
    tail = [
        "",
        "Held-out lifts against all-control, ± standard error; each candidate's plans were made",
        "without the fold they are scored on. guardrails: verified (holds with the stated",
        "confidence), unverified (estimate within the threshold, not yet with that confidence),",
        "refused (estimate beyond the threshold).",
        *([f"allowed lifts: {', '.join(allowed)}"] if allowed else []),
        *[f"{r['candidate']} failed: {r['error']}" for r in failed],
        "",
        f"recommended: {rec or 'none'}",
        f"why: {c.get('reason')}",
    ]
    return "\n".join([head, "", format_table(rows, headers), *tail])


@_command
def cmd_comparison_start(args: argparse.Namespace) -> int:
    body: dict[str, Any] = dict(read_json_file(args.spec)) if args.spec else {}
    for opt in ("success_metric", "folds", "seed", "confidence", "notes"):
        v = getattr(args, opt, None)
        if v is not None:
            body[opt] = v
    if args.readout is not None:
        body["readout_version"] = args.readout
    if args.model is not None:
        body["model_id"] = args.model
    if args.candidate:
        body["candidates"] = list(args.candidate)
    if args.guardrail:
        body["guardrails"] = [_guardrail_arg(g) for g in args.guardrail]
    if "success_metric" not in body:
        raise LocalError("give the success metric with --success-metric (or in the spec file)")
    with _api(args) as api:
        started = api.start_comparison(args.key, body)
        if args.no_wait:
            _emit(args, started, lambda: (
                f"comparison {started['number']} queued as job {started['job_id']}; read it with "
                f"'apportion comparison show {args.key} {started['number']}'"))  # fmt: skip
            return 0
        bar = None if args.json else ProgressBar(f"comparison {started['number']}")
        job = wait_for_job(api, started["job_id"], bar=bar)
        got = api.get_comparison(args.key, started["number"])
    _emit(args, got, lambda: render_comparison(got))
    return 0 if job["status"] == "done" else 1


def _guardrail_arg(text: str) -> dict[str, Any]:
    """METRIC=THRESHOLD[:relative][@CONFIDENCE], e.g. refund=0.01 or churn=2:relative@0.9."""
    metric, sep, rest = text.partition("=")
    if not sep or not metric or not rest:
        raise LocalError(
            f"--guardrail must look like metric=threshold[:relative][@confidence], got '{text}'"
        )
    rest, _, conf = rest.partition("@")
    value, _, unit = rest.partition(":")
    try:
        g: dict[str, Any] = {"metric": metric.strip(), "threshold": float(value)}
        if conf:
            g["confidence"] = float(conf)
    except ValueError as exc:
        raise LocalError(f"--guardrail '{text}': threshold and confidence must be numbers") from exc
    if unit:
        g["unit"] = unit
    return g


@_command
def cmd_comparison_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.get_comparison(args.key, args.number)
    _emit(args, got, lambda: render_comparison(got))
    return 0 if got["status"] != "failed" else 1


@_command
def cmd_comparison_list(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.list_comparisons(args.key)
    rows = [[c["number"], c["status"], c["success_metric"], c["candidates"], c["recommended"],
             c["created_by"], c["created_at"]] for c in got["comparisons"]]  # fmt: skip
    _emit(args, got, lambda: format_table(
        rows, ["number", "status", "success", "candidates", "recommended", "by", "at"]))  # fmt: skip
    return 0


def draft_spec(base: dict[str, Any], args: argparse.Namespace) -> dict[str, Any]:
    """The draft body: the spec file, then the options given on the command line."""
    spec = dict(base)
    if args.model is not None:
        spec["model_id"] = args.model
    for opt in ("success_metric", "method", "allocation", "baseline", "draws", "seed", "notes",
                "comparison"):  # fmt: skip
        v = getattr(args, opt, None)
        if v is not None:
            spec[opt] = v
    holdout = dict(spec.get("holdout") or {})
    if args.holdout_share is not None:
        holdout["share"] = args.holdout_share
    if args.holdout_arm is not None:
        holdout["arm"] = args.holdout_arm
    if holdout:
        spec["holdout"] = holdout
    if "model_id" not in spec:
        raise LocalError("give the cohort model with --model ID (or model_id in the spec file)")
    return spec


def finish_report(
    api: Api, version: dict[str, Any], *, bar: Callable[[str], ProgressBar | None] | None = None
) -> dict[str, Any]:
    """A draft's jobs: the impact report when it has many bootstrap draws, and the cross-fitted
    held-out evaluation (approval waits for both). Wait for each, then read the version again.
    `bar(label)` makes a progress bar per job (None: no bars)."""
    report = version.get("report") or {}
    jobs = [
        (what, part.get("job"))
        for what, part in (("impact report", report), ("held-out evaluation", report.get("held_out") or {}))
        if part.get("status") == "pending" and part.get("job")
    ]  # fmt: skip
    if not jobs:
        return version
    for what, job in jobs:
        label = f"{what} {version['plan']}/{version['version']}"
        job_view = wait_for_job(api, str(job).rsplit("/", 1)[-1], bar=bar(label) if bar else None)
        if job_view["status"] == "failed" and what == "impact report":
            raise JobFailed(f"the impact report job failed: {job_view.get('error')}")
    return api.get_version(version["plan"], version["version"])


@_command
def cmd_plan_draft(args: argparse.Namespace) -> int:
    spec = draft_spec(read_json_file(args.spec) if args.spec else {}, args)
    with _api(args) as api:
        got = api.draft_plan(args.plan, spec)
        if not args.no_wait:
            got = finish_report(api, got, bar=None if args.json else ProgressBar)
    _emit(args, got, lambda: render_version(got))
    return 0


@_command
def cmd_plan_list(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.list_plans()
    _emit(
        args,
        got,
        lambda: format_table(
            [
                [p["plan"], p["live_version"], p["revision"], p["versions"], p["latest_status"]]
                for p in got
            ],
            ["plan", "live", "revision", "versions", "latest status"],
        ),
    )
    return 0


@_command
def cmd_plan_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        if args.version is not None:
            got = api.get_version(args.plan, args.version)
            _emit(args, got, lambda: render_version(got))
            return 0
        plan = api.get_plan(args.plan)

    def human() -> str:
        head = (
            f"plan {plan['plan']}: live version {plan['live_version'] or 'none'}, "
            f"revision {plan['revision']}"
        )
        vt = format_table(
            [
                [v["version"], v["status"], v.get("method"), v.get("model_id"), v["author"]]
                for v in plan["versions"]
            ],
            ["version", "status", "method", "model", "author"],
        )
        at = format_table(
            [
                [a["revision"], a["kind"], a["version"], a["actor"], a["at"], a.get("reason")]
                for a in plan["activations"]
            ],
            ["revision", "kind", "version", "by", "at", "reason"],
        )
        return f"{head}\n\n{vt}\n\n{at}"

    _emit(args, plan, human)
    return 0


@_command
def cmd_plan_decide(args: argparse.Namespace) -> int:
    with _api(args) as api:
        fn = api.approve if args.decision == "approve" else api.reject
        got = fn(args.plan, args.version, args.reason)
    _emit(
        args,
        got,
        lambda: (
            f"plan version {got['plan']}/{got['version']} is {got['status']} "
            f"(by {got.get('decided_by')})"
        ),
    )
    return 0


def _switch_human(got: dict[str, Any], plan: str, verb: str) -> str:
    return (
        f"{verb} {plan}: version {got['from_version'] or 'none'} -> {got['to_version']} "
        f"(revision {got['revision']})"
    )


@_command
def cmd_plan_activate(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.activate(args.plan, args.version, args.reason, args.expected_revision)
    _emit(args, got, lambda: _switch_human(got, args.plan, "activated"))
    return 0


@_command
def cmd_plan_rollback(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.rollback(args.plan, args.reason, args.to)
    _emit(args, got, lambda: _switch_human(got, args.plan, "rolled back"))
    return 0


def _assign_rows(items: list[dict[str, Any]], members: list[str]) -> str:
    return format_table(
        [
            [
                m,
                a["arm"],
                a["cohort"],
                a["plan_version"],
                a["holdout"],
                ", ".join(a["defaults_used"]),
            ]
            for m, a in zip(members, items, strict=True)
        ],
        ["member", "arm", "cohort", "version", "holdout", "defaults used"],
    )


@_command
def cmd_assign(args: argparse.Namespace) -> int:
    with _api(args) as api:
        if args.batch:
            body = read_json_file(args.batch)
            members = body.get("members") if isinstance(body, dict) else body
            if not isinstance(members, list):
                raise LocalError(
                    f"{args.batch} must hold a list of members or {{'members': [...]}}"
                )
            got = api.assign_batch(args.plan, members)
            ids = [str(m.get("member_id")) if isinstance(m, dict) else "?" for m in members]
            _emit(args, {"assignments": got}, lambda: _assign_rows(got, ids))
            return 0
        if not args.member:
            raise LocalError("give a MEMBER id (or --batch FILE)")
        one = api.assign(args.plan, args.member, parse_pairs(args.feature, "--feature"))
    _emit(args, one, lambda: _assign_rows([one], [args.member]))
    return 0


def watch_rows(w: dict[str, Any]) -> str:
    """The watch as a table: one row per metric with its latest interval and status."""
    rows = []
    for m in w.get("metrics", []):
        last = m["history"][-1] if m.get("history") else {}
        rows.append(
            [
                m["metric"],
                m["role"],
                m.get("status") or "-",
                fmt_num(last.get("estimate")),
                f"[{fmt_num(last.get('lower'))}, {fmt_num(last.get('upper'))}]",
                fmt_num(m.get("threshold")),
                last.get("n_plan"),
                last.get("n_holdout"),
            ]
        )
    return format_table(
        rows,
        [
            "metric",
            "role",
            "status",
            "plan - holdout",
            "always-valid interval",
            "limit",
            "plan n",
            "holdout n",
        ],
    )


@_command
def cmd_watch_upload(args: argparse.Namespace) -> int:
    data, ctype = read_upload(args.file, args.content_type)
    with _api(args) as api:
        got = api.monitor(args.plan, data, ctype, args.version)

    def human() -> str:
        head = (
            f"upload {got['upload']} to {got['plan']} v{got['version']}: {got['rows']} rows, "
            f"{got['members']} members ({got['replaced']} replaced); holdout flags that disagree "
            f"with the lookup: {got['holdout_flag_disagreement']:.1%}\n"
        )
        rolled = got.get("rolled_back")
        tail = f"\nrolled back automatically: {rolled}" if rolled else ""
        return (
            head + watch_rows({"metrics": [{**m, "history": [m]} for m in got["metrics"]]}) + tail
        )

    _emit(args, got, human)
    return 0


@_command
def cmd_watch_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.watch(args.plan)
    _emit(
        args,
        got,
        lambda: (
            f"{got['plan']} v{got['version']}: {got['uploads']} uploads, {got['members']} members\n"
            + watch_rows(got)
        ),
    )
    return 0


@_command
def cmd_watch_auto_rollback(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.set_auto_rollback(
            args.plan,
            enabled=args.state == "on",
            min_units_per_group=args.min_units,
            reason=args.reason,
        )
    _emit(
        args,
        got,
        lambda: f"{got['plan']}: automatic rollback {args.state} ({got['auto_rollback']})",
    )
    return 0


@_command
def cmd_audit_show(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.audit(
            entity=args.entity,
            entity_id=args.entity_id,
            actor=args.actor,
            since=args.since,
            limit=args.limit,
            all_pages=args.all,
        )
    _emit(
        args,
        got,
        lambda: format_table(
            [
                [
                    e["id"],
                    e["at"],
                    f"{e['actor_name']} ({e['actor_role']})",
                    e["action"],
                    f"{e['entity']}:{e['entity_id']}",
                    e.get("reason"),
                ]
                for e in got
            ],
            ["id", "at", "actor", "action", "entity", "reason"],
        ),
    )
    return 0


@_command
def cmd_audit_check(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.audit_verify()
    _emit(
        args,
        got,
        lambda: (
            f"audit chain intact: {got['entries']} entries"
            if got["intact"]
            else f"audit chain BROKEN at entry {got['first_broken']}: {got['problem']}"
        ),
    )
    return 0 if got["intact"] else 1


@_command
def cmd_key_issue(args: argparse.Namespace) -> int:
    with _api(args) as api:
        got = api.create_key(args.name, args.role, owner=args.owner)
    if args.json:
        print(json.dumps(got, indent=2))
    else:
        print(
            f"created key {got['id']} '{got['name']}' of {got['owner']} with role {got['role']}; "
            "the secret is "
            "shown once:",
            file=sys.stderr,
        )
        print(got["secret"])
    return 0


# ---- the parser --------------------------------------------------------------------------------


def _common() -> argparse.ArgumentParser:
    c = argparse.ArgumentParser(add_help=False)
    g = c.add_argument_group("connection")
    g.add_argument(
        "--url", default=None, help=f"server address (default ${ENV_URL} or {DEFAULT_URL})"
    )
    g.add_argument(
        "--key", dest="api_key", default=None, help=f"API key secret (default ${ENV_KEY})"
    )
    g.add_argument("--timeout", type=float, default=300.0, help="seconds per request")
    c.add_argument("--json", action="store_true", help="print the server's JSON instead of tables")
    return c


def add_commands(sub: argparse._SubParsersAction, *, audit: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    """Registers the client commands on the `apportion` parser."""
    common = _common()

    def leaf(parent: argparse._SubParsersAction, name: str, fn: Any, help: str) -> Any:  # type: ignore[type-arg]
        p = parent.add_parser(name, parents=[common], help=help, description=help)
        p.set_defaults(func=fn)
        return p

    e = sub.add_parser("experiment", help="declare and read experiments (HTTP)")
    esub = e.add_subparsers(dest="experiment_action", required=True)
    p = leaf(esub, "create", cmd_experiment_create, "declare an experiment from a JSON file")
    p.add_argument(
        "file", help="JSON declaration (key, arms, control, metrics, features); - = stdin"
    )
    p = leaf(esub, "show", cmd_experiment_show, "an experiment's declaration and readouts")
    p.add_argument("key")

    r = sub.add_parser("readout", help="upload and read readouts (HTTP)")
    rsub = r.add_subparsers(dest="readout_action", required=True)
    p = leaf(rsub, "upload", cmd_readout_upload, "upload unit-level rows (CSV, Parquet, NDJSON)")
    p.add_argument("key", help="experiment key")
    p.add_argument("file")
    p.add_argument("--content-type", default=None, help="default: from the file extension")
    p = leaf(rsub, "show", cmd_readout_show, "a readout's per-arm summary")
    p.add_argument("key")
    p.add_argument("version", type=int)

    m = sub.add_parser("model", help="fit and read cohort models (HTTP)")
    msub = m.add_subparsers(dest="model_action", required=True)
    p = leaf(msub, "fit", cmd_model_fit, "fit a cohort model on a readout (runs as a job)")
    p.add_argument("key", help="experiment key")
    p.add_argument("--readout", type=int, required=True, help="readout version")
    p.add_argument(
        "--method",
        default="causal_tree",
        choices=list(MODEL_METHODS),
    )
    p.add_argument(
        "--param", action="append", metavar="NAME=VALUE", help="method parameter (repeatable)"
    )
    p.add_argument("--success-metric", default=None)
    p.add_argument(
        "--override-sample-ratio", default=None, metavar="REASON", help="fit despite a failed check"
    )
    p.add_argument("--no-wait", action="store_true", help="return once the job is queued")
    p = leaf(msub, "show", cmd_model_show, "a cohort model: cohorts, effects, diagnostics")
    p.add_argument("id", type=int)

    j = sub.add_parser("job", help="long-running work (HTTP)")
    jsub = j.add_subparsers(dest="job_action", required=True)
    p = leaf(jsub, "show", cmd_job_show, "a job's status and progress")
    p.add_argument("id")

    cm = sub.add_parser("comparison", help="compare decision methods on a readout (HTTP)")
    csub = cm.add_subparsers(dest="comparison_action", required=True)
    p = leaf(csub, "start", cmd_comparison_start,
             "cross-fit candidate methods on a readout and rank them (runs as a job)")  # fmt: skip
    p.add_argument("key", help="experiment key")
    p.add_argument("--readout", type=int, default=None, help="readout version")
    p.add_argument("--model", type=int, default=None, help="or: a cohort model (its readout)")
    p.add_argument("--spec", default=None, help="JSON file: candidates, guardrails, params...")
    p.add_argument("--success-metric", default=None)
    p.add_argument("--guardrail", action="append", metavar="METRIC=THRESHOLD[:relative][@CONF]",
                   help="a guardrail (repeatable)")  # fmt: skip
    p.add_argument("--candidate", action="append", metavar="MODEL/OPTIMIZER",
                   help="a candidate (repeatable; default: every one the service offers)")  # fmt: skip
    p.add_argument("--confidence", type=float, default=None)
    p.add_argument("--folds", type=int, default=None)
    p.add_argument("--seed", type=int, default=None)
    p.add_argument("--notes", default=None)
    p.add_argument("--no-wait", action="store_true", help="return once the job is queued")
    p = leaf(csub, "show", cmd_comparison_show, "a comparison's table and recommendation")
    p.add_argument("key")
    p.add_argument("number", type=int)
    p = leaf(csub, "list", cmd_comparison_list, "an experiment's comparisons")
    p.add_argument("key")

    pl = sub.add_parser("plan", help="draft, review, activate and roll back plans (HTTP)")
    psub = pl.add_subparsers(dest="plan_action", required=True)
    p = leaf(psub, "draft", cmd_plan_draft, "draft a plan version from a cohort model")
    p.add_argument("plan")
    p.add_argument("--model", type=int, default=None, help="cohort model id")
    p.add_argument("--spec", default=None, help="JSON file: success_metric, guardrails, method...")
    p.add_argument("--success-metric", default=None)
    p.add_argument("--method", default=None, choices=["deterministic", "chance", "stochastic"])
    p.add_argument("--allocation", default=None, choices=["mixed", "pure"])
    p.add_argument("--baseline", default=None, choices=["control", "best_arm", "live"])
    p.add_argument("--holdout-share", type=float, default=None)
    p.add_argument("--holdout-arm", default=None)
    p.add_argument("--draws", type=int, default=None, help="bootstrap draws of the impact report")
    p.add_argument("--seed", type=int, default=None)
    p.add_argument("--notes", default=None)
    p.add_argument(
        "--comparison", type=int, default=None, help="the comparison number this method follows"
    )
    p.add_argument("--no-wait", action="store_true", help="do not wait for a report job")
    leaf(psub, "list", cmd_plan_list, "all plans with their live version")
    p = leaf(psub, "show", cmd_plan_show, "a plan's versions and activations, or one version")
    p.add_argument("plan")
    p.add_argument("--version", type=int, default=None)
    for decision in ("approve", "reject"):
        p = leaf(psub, decision, cmd_plan_decide, f"{decision} a draft version, with a reason")
        p.add_argument("plan")
        p.add_argument("version", type=int)
        p.add_argument("--reason", required=True)
        p.set_defaults(decision=decision)
    p = leaf(psub, "activate", cmd_plan_activate, "make an approved version live")
    p.add_argument("plan")
    p.add_argument("version", type=int)
    p.add_argument("--reason", required=True)
    p.add_argument(
        "--expected-revision",
        type=int,
        default=None,
        help="the revision you reviewed (default: read the current one first)",
    )
    p = leaf(psub, "rollback", cmd_plan_rollback, "return to the previously live version")
    p.add_argument("plan")
    p.add_argument("--reason", required=True)
    p.add_argument("--to", type=int, default=None, help="a named earlier approved version")

    p = leaf(sub, "assign", cmd_assign, "which arm for this member?")
    p.add_argument("plan")
    p.add_argument("member", nargs="?", default=None)
    p.add_argument(
        "--feature",
        action="append",
        metavar="NAME=VALUE",
        help="a feature value (repeatable); numbers parse as numbers, quote to force text",
    )
    p.add_argument("--batch", default=None, help="JSON file of members [{member_id, features}]")

    wt = sub.add_parser("watch", help="the guardrail watch of a live plan (HTTP)")
    wsub = wt.add_subparsers(dest="watch_action", required=True)
    p = leaf(
        wsub,
        "upload",
        cmd_watch_upload,
        "upload post-launch rows (member_id, features, holdout, metrics)",
    )
    p.add_argument("plan")
    p.add_argument("file")
    p.add_argument("--version", type=int, default=None, help="default: the live version")
    p.add_argument("--content-type", default=None, help="default: from the file extension")
    p = leaf(
        wsub, "show", cmd_watch_show, "each guardrail's status and latest always-valid interval"
    )
    p.add_argument("plan")
    p = leaf(
        wsub,
        "auto-rollback",
        cmd_watch_auto_rollback,
        "turn automatic rollback on or off (approver key)",
    )
    p.add_argument("plan")
    p.add_argument("state", choices=["on", "off"])
    p.add_argument(
        "--min-units", type=int, default=1000, help="members per group before it may act"
    )
    p.add_argument("--reason", required=True)

    p = leaf(audit, "show", cmd_audit_show, "the audit trail, oldest first (HTTP)")
    p.add_argument("--entity", default=None)
    p.add_argument("--entity-id", default=None)
    p.add_argument("--actor", default=None)
    p.add_argument("--since", default=None, help="ISO-8601 UTC time")
    p.add_argument("--limit", type=int, default=100)
    p.add_argument("--all", action="store_true", help="follow pages to the end")
    leaf(audit, "check", cmd_audit_check, "verify the hash chain through the API (admin key)")

    keys = sub.choices.get("keys")
    ksub = next(
        (a for a in getattr(keys, "_actions", []) if isinstance(a, argparse._SubParsersAction)),
        None,
    )
    if ksub is not None:
        p = leaf(ksub, "issue", cmd_key_issue, "create a key through the API (admin key)")
        p.add_argument("--name", required=True)
        p.add_argument(
            "--owner", required=True, help="the person or system identity the key belongs to"
        )
        p.add_argument("--role", required=True, choices=["reader", "analyst", "approver", "admin"])
