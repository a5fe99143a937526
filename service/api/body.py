"""Reading raw upload bodies with a size limit (413 before the whole body is read)."""

from __future__ import annotations

from fastapi import Request

from service.errors import PayloadTooLarge

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
