"""The reference app of bench/serve.py: a pure ASGI callable that reads the same POST body as the
assign route, parses it as JSON, and answers a constant JSON object. Served by the same server
with the same settings (`python bench/serve_reference.py --port P --workers N` runs uvicorn with
the values `apportion serve` uses), it is what the HTTP stack alone can do on this machine."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

ANSWER = b'{"arm":"control","cohort":0,"plan_version":1,"holdout":false,"defaults_used":[]}'
HEADERS = [(b"content-type", b"application/json"), (b"content-length", str(len(ANSWER)).encode())]


async def app(scope: dict[str, Any], receive: Any, send: Any) -> None:
    if scope["type"] == "lifespan":
        while True:
            message = await receive()
            if message["type"] == "lifespan.startup":
                await send({"type": "lifespan.startup.complete"})
            elif message["type"] == "lifespan.shutdown":
                await send({"type": "lifespan.shutdown.complete"})
                return
    chunks = []
    while True:
        message = await receive()
        if message["type"] != "http.request":
            return
        chunks.append(message.get("body", b""))
        if not message.get("more_body", False):
            break
    body = b"".join(chunks)
    if body:
        json.loads(body)
    await send({"type": "http.response.start", "status": 200, "headers": HEADERS})
    await send({"type": "http.response.body", "body": ANSWER})


def main() -> None:
    import uvicorn

    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    from apportion.cli.server import BACKLOG, KEEP_ALIVE_SECONDS

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--host", default="127.0.0.1")
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--workers", type=int, default=1)
    a = ap.parse_args()
    uvicorn.run(
        "bench.serve_reference:app",
        host=a.host,
        port=a.port,
        workers=a.workers,
        http="httptools",
        loop="uvloop",
        timeout_keep_alive=KEEP_ALIVE_SECONDS,
        backlog=BACKLOG,
        log_level="warning",
        access_log=False,
        app_dir=str(Path(__file__).resolve().parents[1]),
    )


if __name__ == "__main__":
    main()
