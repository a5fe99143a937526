"""`apportion worker` runs fits in a separate process that claims jobs from the database."""

from __future__ import annotations

import os
import subprocess
import sys
import time

from fastapi.testclient import TestClient
from support import EXPERIMENT, make_keys, make_settings, rows_csv, wait_job

from apportion.app import create_app


def test_a_worker_process_runs_the_fit_the_server_queued(db_url: str, tmp_path) -> None:  # type: ignore[no-untyped-def]
    app = create_app(make_settings(db_url, run_jobs_in_process=False))
    with TestClient(app) as client:
        keys = make_keys(app.state.services)
        client.post("/v1/experiments", json=EXPERIMENT, headers=keys.h(keys.analyst))
        client.post(
            "/v1/experiments/checkout-copy/readouts",
            content=rows_csv(800),
            headers={**keys.h(keys.analyst), "content-type": "text/csv"},
        )
        started = client.post(
            "/v1/experiments/checkout-copy/models",
            json={"readout_version": 1, "method": "global"},
            headers=keys.h(keys.analyst),
        ).json()
        time.sleep(0.5)
        assert client.get(started["job"], headers=keys.h(keys.reader)).json()["status"] == "queued"
        env = {
            **os.environ,
            "APPORTION_DATABASE_URL": db_url,
            "APPORTION_BLOB_URI": client.app.state.services.settings.blob_uri,
            "APPORTION_LOG_LEVEL": "WARNING",
        }
        with open(tmp_path / "worker.log", "wb") as log:
            worker = subprocess.Popen(
                [sys.executable, "-m", "apportion.cli", "worker"], env=env, stdout=log, stderr=log
            )
            try:
                job = wait_job(client, keys, started["job"], timeout=60)
            finally:
                worker.terminate()
                worker.wait(timeout=30)
        assert job["status"] == "done", (tmp_path / "worker.log").read_text()
        assert client.get(started["model"], headers=keys.h(keys.reader)).json()["status"] == "done"
