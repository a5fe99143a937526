"""What the client raises: one exception type for every answer the server refused (its
problem+json body, RFC 9457), and a few for problems on this side of the wire."""

from __future__ import annotations

from typing import Any


class ClientError(Exception):
    """Base of everything the client raises."""


class ProblemError(ClientError):
    """The server refused a request (4xx or 5xx): the problem+json body's status, title, detail,
    type and instance, and its field errors (`errors`: one dict per offending field, column or
    parameter). `body` keeps the whole problem for fields beyond these."""

    def __init__(
        self,
        status: int,
        title: str,
        detail: str = "",
        *,
        errors: list[dict[str, Any]] | None = None,
        type: str | None = None,
        instance: str | None = None,
        body: dict[str, Any] | None = None,
    ) -> None:
        super().__init__(f"{title} (HTTP {status})" + (f": {detail}" if detail else ""))
        self.status, self.title, self.detail = status, title, detail
        self.errors = errors or []
        self.type, self.instance = type, instance
        self.body = body or {}

    @classmethod
    def from_body(cls, status: int, reason: str, body: Any) -> ProblemError:
        """From a refused answer's parsed body (a problem+json object, or anything else)."""
        b = body if isinstance(body, dict) else {}
        errors = b.get("errors")
        return cls(
            status,
            str(b.get("title") or reason or "Error"),
            str(b.get("detail") or ""),
            errors=[e for e in errors if isinstance(e, dict)] if isinstance(errors, list) else None,
            type=b.get("type") if isinstance(b.get("type"), str) else None,
            instance=b.get("instance") if isinstance(b.get("instance"), str) else None,
            body=b or ({"detail": body} if body is not None else None),
        )

    def field_lines(self, limit: int = 20) -> list[str]:
        """'where: what' for each field error (the first `limit`)."""
        out = []
        for e in self.errors[:limit]:
            where = e.get("field") or e.get("column") or e.get("parameter") or ""
            what = e.get("problem") or e.get("message") or ""
            out.append(f"{where}: {what}" if where and what else str(where or what))
        return out

    def one_line(self) -> str:
        """The problem as one readable line: title, status, detail."""
        return f"{self.title} (HTTP {self.status})" + (f": {self.detail}" if self.detail else "")


class Unreachable(ClientError):
    """No answer: the server could not be reached, or the connection broke."""


class JobFailed(ClientError):
    """A job the caller waited for ended `failed`; `job` is its last view."""

    def __init__(self, message: str, job: Any = None) -> None:
        super().__init__(message)
        self.job = job


class JobTimeout(ClientError):
    """A job was still running when the wait's time ran out; `job` is its last view."""

    def __init__(self, message: str, job: Any) -> None:
        super().__init__(message)
        self.job = job
