"""Exporting the OpenAPI schema with sorted keys, so the checked-in file is stable."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from apportion.config import Settings


def openapi_document() -> dict[str, Any]:
    from apportion.app import create_app

    app = create_app(
        Settings(database_url="sqlite://", migrate_on_start=False, run_jobs_in_process=False)
    )
    return app.openapi()


def render() -> str:
    return json.dumps(openapi_document(), indent=2, sort_keys=True) + "\n"


def write_openapi(path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(render())
    return path
