"""Upload bodies (spooled to disk with a size limit, gzip and zstd Content-Encoding decoded on the
way) and JSON bodies (every other route, limited around the route before FastAPI reads the body).
Both answer 413 problem+json before more than the limit is held in memory."""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Callable, Coroutine
from dataclasses import dataclass
from typing import Any

import pyarrow as pa
from fastapi import Request, Response
from fastapi.routing import APIRoute
from starlette.concurrency import run_in_threadpool

from apportion.api.deps import AuthenticatedRoute
from apportion.errors import InvalidInput, PayloadTooLarge, UnsupportedMediaType

UPLOAD_TYPES = {
    "text/csv": {"schema": {"type": "string"}},
    "application/vnd.apache.parquet": {"schema": {"type": "string", "format": "binary"}},
    "application/x-ndjson": {"schema": {"type": "string"}},
}
UPLOAD_OPENAPI = {"requestBody": {"required": True, "content": UPLOAD_TYPES}}


async def read_limited(request: Request, limit: int) -> bytes:
    declared = request.headers.get("content-length")
    if declared and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(
            f"the upload is {int(declared)} bytes; the limit is {limit} bytes (APPORTION_MAX_UPLOAD_BYTES)"
        )
    chunks: list[bytes] = []
    size = 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise PayloadTooLarge(
                f"the upload exceeds the limit of {limit} bytes (APPORTION_MAX_UPLOAD_BYTES)"
            )
        chunks.append(chunk)
    return b"".join(chunks)


# Content-Encoding of uploads: the usual way to send large files. Decoded with pyarrow's codecs.
ENCODINGS = {"gzip": "gzip", "x-gzip": "gzip", "zstd": "zstd"}
_CHUNK = 1 << 20


@dataclass
class Spooled:
    """An upload body on disk (decoded), its sha256 and size; `remove()` when done."""

    path: str
    sha256: str
    size: int

    def remove(self) -> None:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(self.path)


def _encoding(request: Request) -> str | None:
    raw = request.headers.get("content-encoding", "").strip().lower()
    if raw in ("", "identity"):
        return None
    codec = ENCODINGS.get(raw)
    if codec is None:
        raise UnsupportedMediaType(
            f"unsupported content encoding '{raw}'; send the body as is, or with "
            "Content-Encoding gzip or zstd",
            errors=[{"field": "content-encoding", "problem": f"unsupported encoding '{raw}'"}],
            unsupported_content_encoding=raw,
        )
    return codec


def _too_large(limit: int, what: str = "the upload") -> PayloadTooLarge:
    return PayloadTooLarge(
        f"{what} exceeds the limit of {limit} bytes (APPORTION_MAX_UPLOAD_BYTES)"
    )


async def spool_upload(request: Request, limit: int, directory: str | None = None) -> Spooled:
    """Stream the body to a temporary file (never whole in memory), at most `limit` bytes before
    and after decoding (a small gzip body cannot expand past the limit). 413 past the limit,
    415 for an encoding other than gzip or zstd, 422 for a body that does not decode."""
    codec = _encoding(request)
    declared = request.headers.get("content-length")
    if declared and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(
            f"the upload is {int(declared)} bytes; the limit is {limit} bytes (APPORTION_MAX_UPLOAD_BYTES)"
        )
    fd, path = tempfile.mkstemp(prefix="apportion-upload-", dir=directory)
    spooled = Spooled(path=path, sha256="", size=0)
    try:
        h = hashlib.sha256()
        with os.fdopen(fd, "wb") as f:
            async for chunk in request.stream():
                spooled.size += len(chunk)
                if spooled.size > limit:
                    raise _too_large(limit)
                if codec is None:
                    h.update(chunk)
                f.write(chunk)
        if codec is None:
            spooled.sha256 = h.hexdigest()
            return spooled
        decoded = await run_in_threadpool(_decode, path, codec, limit, directory)
        spooled.remove()
        return decoded
    except BaseException:
        spooled.remove()
        raise


def _decode(path: str, codec: str, limit: int, directory: str | None) -> Spooled:
    fd, out_path = tempfile.mkstemp(prefix="apportion-upload-", dir=directory)
    out = Spooled(path=out_path, sha256="", size=0)
    h = hashlib.sha256()
    try:
        with os.fdopen(fd, "wb") as f, pa.CompressedInputStream(pa.OSFile(path), codec) as src:
            while chunk := src.read(_CHUNK):
                out.size += len(chunk)
                if out.size > limit:
                    raise _too_large(limit, "the decoded upload")
                h.update(chunk)
                f.write(chunk)
    except (pa.ArrowException, OSError) as exc:
        out.remove()
        raise InvalidInput(
            f"the body does not decode as {codec}: {str(exc).splitlines()[0] if str(exc) else exc}",
            errors=[{"field": "content-encoding", "problem": f"not valid {codec} data"}],
        ) from exc
    except BaseException:
        out.remove()
        raise
    out.sha256 = h.hexdigest()
    return out


def _json_too_large(limit: int, size: int | None) -> PayloadTooLarge:
    said = f"the body is {size} bytes" if size is not None else "the body exceeds the limit"
    return PayloadTooLarge(f"{said}; the limit is {limit} bytes (APPORTION_MAX_JSON_BYTES)")


def _reads_raw_upload(openapi_extra: dict[str, Any] | None) -> bool:
    """Routes that accept raw upload types read their own body with the upload limit (a readout
    route that also takes a small JSON reference caps that body itself)."""
    content = (openapi_extra or {}).get("requestBody", {}).get("content", {})
    return any(media in content for media in UPLOAD_TYPES)


def _no_nul_in_path(request: Request) -> None:
    """A path segment is text that may reach the store, and no store keeps NUL (PostgreSQL
    refuses it): refuse it for every route here, whatever its own pattern says."""
    bad = [k for k, v in request.path_params.items() if isinstance(v, str) and "\x00" in v]
    if bad:
        raise InvalidInput(
            f"path segment '{bad[0]}' holds a NUL character",
            errors=[{"field": f"path.{k}", "problem": "holds a NUL character"} for k in bad],
        )


class LimitedRoute(APIRoute):
    """The route class of every router but the lookup routes': path segments holding NUL are
    refused, and the body is read here, at most
    APPORTION_MAX_JSON_BYTES of it, before FastAPI parses it (FastAPI then reuses the bytes read).

    The declared Content-Length is checked first; a body sent without one (chunked) is counted as
    it arrives, so nothing beyond the limit is held. Raw-upload routes read their own body with
    their own limit (`read_limited`) and pass through. Starlette's body-limit middleware would
    answer text/plain; the contract is problem+json, so the limit raises PayloadTooLarge."""

    def get_route_handler(self) -> Callable[[Request], Coroutine[Any, Any, Response]]:
        handler = super().get_route_handler()

        async def checked(request: Request) -> Response:
            _no_nul_in_path(request)
            return await handler(request)

        if _reads_raw_upload(self.openapi_extra):
            return checked

        async def limited(request: Request) -> Response:
            _no_nul_in_path(request)
            limit = request.app.state.services.settings.max_json_bytes
            declared = request.headers.get("content-length", "")
            if declared.isdigit() and int(declared) > limit:
                raise _json_too_large(limit, int(declared))
            chunks: list[bytes] = []
            size = 0
            async for chunk in request.stream():
                size += len(chunk)
                if size > limit:
                    raise _json_too_large(limit, None)
                chunks.append(chunk)
            request._body = b"".join(chunks)  # Starlette's own cache: request.body() returns it
            return await handler(request)

        return limited


class GuardedRoute(AuthenticatedRoute, LimitedRoute):
    """The key first (AuthenticatedRoute: no body is read for a caller without a valid key),
    then the body limit (LimitedRoute), then FastAPI's own parsing."""
